"""Generate the invented demo recordings in demo_media/.

Everything here is synthetic: a speech-like interview clip, a music-bed clip and a short station
ident, built from numpy arrays with a fixed seed, so the same files come out on every run (with
the same libsndfile). No real recording, voice, person or station is involved.

Run from the repository root::

    python scripts/make_demo_media.py            # writes demo_media/*.flac, *.wav
    python scripts/make_demo_media.py --out /tmp/demo

Files are written through webapp.media (atomic output, 16/24-bit codes with TPDF dither), so the
demo also exercises the writer it is meant to feed.
"""

import argparse
import os
import sys

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), os.pardir))

from webapp.media import (  # noqa: E402
    AtomicWriter, output_plan, probe, read_blocks, sha256_file,
)

__all__ = ["SEED", "make_interview", "make_music_bed", "make_promo", "main"]

SEED = 20261201
SOURCE_RATE_HZ = 44100
PROMO_RATE_HZ = 48000
INTERVIEW_S = 12.0
MUSIC_BED_S = 10.0
PROMO_S = 3.5

# Average vowel formants of adult male speakers, Hz (Peterson & Barney 1952, from memory);
# only shapes of the invented voice, nothing is measured against them.
VOWELS = {
    "a": (730, 1090, 2440),
    "e": (530, 1840, 2480),
    "i": (270, 2290, 3010),
    "o": (570, 840, 2410),
    "u": (300, 870, 2240),
}
FORMANT_BANDWIDTHS_HZ = (90.0, 110.0, 170.0)  # typical, common practice


def db(value_db):
    """Amplitude ratio of a level in dB."""
    return 10.0 ** (value_db / 20.0)


def _smoothstep(x):
    x = np.clip(x, 0.0, 1.0)
    return x * x * (3.0 - 2.0 * x)


def _fade(n, fs, *, attack_ms, release_ms):
    """Raised-cosine attack and release over n samples."""
    env = np.ones(n)
    a = min(n // 2, max(1, int(fs * attack_ms / 1000)))
    r = min(n - a, max(1, int(fs * release_ms / 1000)))
    env[:a] = 0.5 - 0.5 * np.cos(np.pi * np.arange(a) / a)
    env[n - r:] *= 0.5 + 0.5 * np.cos(np.pi * np.arange(r) / r)
    return env


def shaped_noise(n, fs, rng, gain):
    """White Gaussian noise given the magnitude response ``gain(f_hz)`` by FFT shaping."""
    spectrum = np.fft.rfft(rng.standard_normal(n))
    spectrum *= gain(np.fft.rfftfreq(n, 1.0 / fs))
    return np.fft.irfft(spectrum, n)


def _band(f, lo_a, lo_b, hi_a, hi_b):
    """1 between lo_b and hi_a, raised-cosine edges from lo_a and to hi_b, 0 outside."""
    g = np.zeros_like(f)
    rise = (f >= lo_a) & (f < lo_b)
    g[rise] = 0.5 - 0.5 * np.cos(np.pi * (f[rise] - lo_a) / (lo_b - lo_a))
    g[(f >= lo_b) & (f <= hi_a)] = 1.0
    fall = (f > hi_a) & (f < hi_b)
    g[fall] = 0.5 + 0.5 * np.cos(np.pi * (f[fall] - hi_a) / (hi_b - hi_a))
    return g


# ---------------------------------------------------------------------------------------------
# speech-like signal

def _resonance(f, centre_hz, bandwidth_hz):
    """Magnitude of a second-order band-pass resonance, 1 at its centre."""
    f = np.maximum(f, 1e-3)
    return 1.0 / np.sqrt(1.0 + ((f * f - centre_hz * centre_hz) / (f * bandwidth_hz)) ** 2)


FORMANT_LEVELS = (1.0, 0.5, 0.25)  # F2 6 dB and F3 12 dB under F1, a typical vowel balance


def voiced(n, fs, rng, *, f0_start_hz, f0_end_hz, vowel_a, vowel_b, top_hz=7500.0):
    """A vowel: harmonic series of a glottal-pulse-like source through three formants
    (a parallel formant model over a weak low-pass floor for the voice's fundamental region).

    All harmonics start in cosine phase, so each period is a sharp pulse (a high crest factor
    like a real voice); the pitch glides from ``f0_start_hz`` to ``f0_end_hz`` with a little
    jitter, and the formants glide from ``vowel_a`` to ``vowel_b``.
    """
    t = np.arange(n) / fs
    glide = _smoothstep(t / max(t[-1], 1e-9))
    jitter = np.cumsum(rng.standard_normal(n)) / np.sqrt(n) * 0.02  # slow wander, about 2 %
    f0 = (f0_start_hz + (f0_end_hz - f0_start_hz) * glide) * (1.0 + jitter)
    phase = 2.0 * np.pi * np.cumsum(f0) / fs
    formants = [a + (b - a) * glide for a, b in zip(VOWELS[vowel_a], VOWELS[vowel_b])]
    out = np.zeros(n)
    for k in range(1, int(top_hz / f0.min()) + 1):
        fk = k * f0
        # source tilt about -6 dB/octave after lip radiation (common practice)
        shape = 0.3 / (1.0 + (fk / 400.0) ** 2)
        for centre, bw, level in zip(formants, FORMANT_BANDWIDTHS_HZ, FORMANT_LEVELS):
            shape = shape + level * _resonance(fk, centre, bw)
        # fade the series out from 60 % of top_hz, so there is no hard edge in the spectrum
        amp = shape / k * (1.0 - _smoothstep((fk - 0.6 * top_hz) / (0.4 * top_hz)))
        out += amp * np.cos(k * phase)
    return out / max(np.abs(out).max(), 1e-12)


def sibilant(n, fs, rng, *, kind="s"):
    """A fricative burst: noise shaped 4-11 kHz ("s") or 2.5-7 kHz ("sh"), with weaker air to
    16-20 kHz."""
    if kind == "s":
        def gain(f):
            air = _band(f, 9000, 11000, 16000, 20000)
            return _band(f, 3500, 4500, 10000, 12500) + db(-14) * air
    else:
        def gain(f):
            return _band(f, 1800, 2600, 6500, 8500) + db(-20) * _band(f, 6000, 8000, 15000, 19000)
    burst = shaped_noise(n, fs, rng, gain)
    return burst / np.abs(burst).max() * _fade(n, fs, attack_ms=25, release_ms=35)


def room_tone(n, fs, rng, *, level_db=-60.0, hum_db=-72.0):
    """Pink-ish room noise with a little 50 Hz mains hum (and its 3rd harmonic)."""
    def gain(f):
        g = 1.0 / np.sqrt(np.maximum(f, 30.0))
        return g * _band(f, 20, 60, 9000, 16000)
    noise = shaped_noise(n, fs, rng, gain)
    noise *= db(level_db) / np.sqrt(np.mean(noise ** 2))
    t = np.arange(n) / fs
    hum = db(hum_db) * (np.sin(2 * np.pi * 50 * t) + 0.4 * np.sin(2 * np.pi * 150 * t + 0.3))
    return noise + hum


def _phrase(fs, rng, *, pitch_hz, syllables=None):
    """One spoken phrase: 4 to 8 syllables (or ``syllables``) with falling pitch (declination)."""
    parts = []
    syllables = syllables or int(rng.integers(4, 9))
    lo, hi = pitch_hz
    for i in range(syllables):
        stress = 1.0 if rng.random() < 0.35 else float(rng.uniform(0.45, 0.75))
        top = hi - (hi - lo) * (i / syllables) * 0.8
        f_start = float(rng.uniform(top - 0.25 * (hi - lo), top))
        f_end = max(lo, f_start - float(rng.uniform(0, 0.25 * (hi - lo))))
        if rng.random() < 0.35:  # onset fricative
            n = int(fs * rng.uniform(0.06, 0.14))
            parts.append(db(-9) * stress * sibilant(n, fs, rng, kind=rng.choice(["s", "sh"])))
        n = int(fs * rng.uniform(0.12, 0.30))
        v_a, v_b = rng.choice(list(VOWELS), size=2)
        nucleus = voiced(n, fs, rng, f0_start_hz=f_start, f0_end_hz=f_end,
                         vowel_a=v_a, vowel_b=v_b)
        parts.append(stress * nucleus * _fade(n, fs, attack_ms=20, release_ms=40))
        if rng.random() < 0.2:  # coda fricative
            n = int(fs * rng.uniform(0.07, 0.15))
            parts.append(db(-8) * stress * sibilant(n, fs, rng, kind="s"))
        if rng.random() < 0.6:
            parts.append(np.zeros(int(fs * rng.uniform(0.02, 0.08))))
    return np.concatenate(parts)


def make_interview(rng, *, fs=SOURCE_RATE_HZ, duration_s=INTERVIEW_S, voices=None):
    """A mono interview-like clip: host (about 90-150 Hz) and guest (about 160-220 Hz) take
    turns, with pauses of room tone between phrases. Peak -3 dBFS."""
    voices = voices or [(90.0, 150.0), (160.0, 220.0)]
    n_total = int(round(fs * duration_s))
    speech = np.zeros(n_total)
    pos, turn, misses = int(0.45 * fs), 0, 0
    while misses < 4:
        phrase = _phrase(fs, rng, pitch_hz=voices[turn % len(voices)])
        if pos + phrase.size > n_total - int(0.3 * fs):
            misses += 1  # too long for the time left: try a shorter one
            continue
        speech[pos:pos + phrase.size] += phrase
        pos += phrase.size + int(fs * rng.uniform(0.35, 0.8))
        turn += 1 if rng.random() < 0.7 else 0
    speech *= db(-3.0) / np.abs(speech).max()
    mix = speech + room_tone(n_total, fs, rng)
    return mix * (db(-3.0) / np.abs(mix).max())


# ---------------------------------------------------------------------------------------------
# music-like signal

def _midi_hz(note):
    return 440.0 * 2.0 ** ((note - 69) / 12.0)


def pluck(n, fs, rng, *, f0_hz, tau_s, top_hz=16000.0, inharmonicity=1e-4):
    """A plucked/struck harmonic tone: partials 1/k^1.3, higher partials decaying faster,
    slightly stretched like a real string."""
    t = np.arange(n) / fs
    out = np.zeros(n)
    k = 1
    while True:
        fk = k * f0_hz * np.sqrt(1.0 + inharmonicity * k * k)
        if fk > top_hz:
            break
        tau = tau_s / (1.0 + 0.35 * (k - 1))
        out += k ** -1.3 * np.exp(-t / tau) * np.sin(2 * np.pi * fk * t + rng.uniform(0, 2 * np.pi))
        k += 1
    return out * (1.0 - np.exp(-t / 0.004))


def hihat(n, fs, rng, *, decay_s):
    """A hi-hat: noise shaped 6-21 kHz with a fast exponential decay."""
    def gain(f):
        return _band(f, 5000, 7500, 19500, 21500) * (1.0 + f / 12000.0)
    burst = shaped_noise(n, fs, rng, gain)
    t = np.arange(n) / fs
    return burst / np.abs(burst).max() * np.exp(-t / decay_s) * (1.0 - np.exp(-t / 0.0005))


def snare(n, fs, rng):
    """A snare/clap: noise shaped 0.8-9 kHz over a 190 Hz body, 70 ms decay."""
    def gain(f):
        return _band(f, 500, 1200, 7000, 12000) + 0.25 * _band(f, 9000, 11000, 17000, 20000)
    burst = shaped_noise(n, fs, rng, gain)
    t = np.arange(n) / fs
    body = 0.6 * np.sin(2 * np.pi * 190.0 * t) * np.exp(-t / 0.05)
    return (burst / np.abs(burst).max() + body) * np.exp(-t / 0.07) * (1.0 - np.exp(-t / 0.0008))


def kick(n, fs):
    """A bass drum: sine sweeping 120 -> 45 Hz with a 180 ms decay."""
    t = np.arange(n) / fs
    f = 45.0 + 75.0 * np.exp(-t / 0.04)
    return np.sin(2 * np.pi * np.cumsum(f) / fs) * np.exp(-t / 0.18) * (1.0 - np.exp(-t / 0.002))


# Partials deliberately between 20 and 21.5 kHz (an "air" layer of a synth pad): inaudible to
# most listeners, but a conversion down to 16 kHz must remove them or they fold back.
AIR_PARTIALS_HZ = (20200.0, 20750.0, 21300.0)


def _place(track, sound, start, gains):
    end = min(track.shape[0], start + sound.shape[0])
    track[start:end] += sound[: end - start, None] * np.asarray(gains)[None, :]


def _pan(position):
    """Constant-power pan gains for position -1 (left) .. +1 (right)."""
    angle = (position + 1.0) * np.pi / 4.0
    return np.array([np.cos(angle), np.sin(angle)])


def soft_ceiling(x, *, ceiling_db, knee=0.75):
    """Linear below ``knee * ceiling``, tanh into the ceiling above (slope 1 at the knee)."""
    c = db(ceiling_db)
    k = knee * c
    mag = np.abs(x)
    over = mag > k
    out = x.copy()
    out[over] = np.sign(x[over]) * (k + (c - k) * np.tanh((mag[over] - k) / (c - k)))
    return out


SNARE_LEVEL = 1.2


def make_music_bed(rng, *, fs=SOURCE_RATE_HZ, duration_s=MUSIC_BED_S, tempo_bpm=96.0):
    """A stereo music bed: four bars of D - Bm - G - A, bass, kick, hi-hats and an air layer.

    Mixed hot and brought under a -1 dBFS sample ceiling by a soft limiter, as loud masters
    are, so inter-sample peaks above the sample peak are present.
    """
    n_total = int(round(fs * duration_s))
    beat = int(round(fs * 60.0 / tempo_bpm))
    mix = np.zeros((n_total, 2))
    chords = [(62, 66, 69, 74), (59, 62, 66, 71), (55, 59, 62, 67), (57, 61, 64, 69)]
    roots = [38, 35, 31, 33]
    for bar, (chord, root) in enumerate(zip(chords, roots)):
        for b in range(4):
            start = (bar * 4 + b) * beat
            if start >= n_total:
                break
            if b in (0, 2):  # strum: notes 12 ms apart
                for i, note in enumerate(chord):
                    tone = pluck(int(2.2 * fs), fs, rng, f0_hz=_midi_hz(note), tau_s=0.9)
                    gain = 0.22 * (0.8 if b == 2 else 1.0)
                    _place(mix, gain * tone, start + i * int(0.012 * fs),
                           _pan(-0.6 + 1.2 * i / (len(chord) - 1)))
                _place(mix, 0.9 * kick(int(0.6 * fs), fs), start, _pan(0.0))
            else:
                _place(mix, SNARE_LEVEL * snare(int(0.4 * fs), fs, rng), start, _pan(0.1))
            bass = pluck(int(0.7 * fs), fs, rng, f0_hz=_midi_hz(root), tau_s=0.35, top_hz=2500)
            _place(mix, 0.45 * bass, start, _pan(-0.1))
            for half in (0, 1):
                open_hat = b == 3 and half == 1
                hat = hihat(int((0.3 if open_hat else 0.09) * fs), fs, rng,
                            decay_s=0.11 if open_hat else 0.022)
                level = 0.32 if half == 0 else 0.22
                _place(mix, level * hat, start + half * beat // 2, _pan(0.35))
    t = np.arange(n_total) / fs
    for i, f in enumerate(AIR_PARTIALS_HZ):
        tremolo = 0.75 + 0.25 * np.sin(2 * np.pi * (0.3 + 0.11 * i) * t + i)
        swell = _smoothstep(t / 1.5) * _smoothstep((duration_s - t) / 1.0)
        air = db(-40.0) * tremolo * swell * np.sin(2 * np.pi * f * t + rng.uniform(0, 2 * np.pi))
        mix += air[:, None] * _pan(-0.5 + 0.5 * i)[None, :]
    mix *= db(+6.5) / np.abs(mix).max()  # a hot mix pushed into the ceiling
    return soft_ceiling(mix, ceiling_db=-1.0)


# ---------------------------------------------------------------------------------------------
# station ident at 48 kHz

# Partials between the 44.1 kHz Nyquist (22050 Hz) and 24 kHz: converting the ident to 44.1 kHz
# must remove them.
SPARKLE_PARTIALS_HZ = (22400.0, 23000.0, 23600.0)


def make_promo(rng, *, fs=PROMO_RATE_HZ, duration_s=PROMO_S):
    """A mono station ident: a rising bell arpeggio, a spoken-like tag and a sparkle layer above
    22.05 kHz. Peak -2 dBFS."""
    n_total = int(round(fs * duration_s))
    out = np.zeros(n_total)
    for i, note in enumerate((62, 66, 69, 74, 78)):
        start = int(i * 0.14 * fs)
        tone = pluck(n_total - start, fs, rng, f0_hz=_midi_hz(note), tau_s=1.2,
                     top_hz=12000.0, inharmonicity=6e-4)
        out[start:] += 0.25 * tone
    tag = _phrase(fs, rng, pitch_hz=(120.0, 170.0), syllables=4)[: int(2.1 * fs)]
    tag *= _fade(tag.size, fs, attack_ms=5, release_ms=60) / np.abs(tag).max()
    start = int(1.2 * fs)
    out[start:start + tag.size] += 0.7 * tag
    out += room_tone(n_total, fs, rng, level_db=-66.0, hum_db=-90.0)
    t = np.arange(n_total) / fs
    env = np.exp(-t / 0.9) * (1.0 - np.exp(-t / 0.01))
    for f in SPARKLE_PARTIALS_HZ:
        out += db(-30.0) * env * np.sin(2 * np.pi * f * t + rng.uniform(0, 2 * np.pi))
    out *= _fade(n_total, fs, attack_ms=2, release_ms=300)
    return out * (db(-2.0) / np.abs(out).max())


# ---------------------------------------------------------------------------------------------
# writing and figures

def to_codes(x, rng, *, bits):
    """TPDF-dithered integer codes (triangular dither of +-1 LSB, common practice) in the
    int16 / int32-shifted form the writer keeps exactly."""
    full = 2 ** (bits - 1)
    tpdf = rng.uniform(-0.5, 0.5, x.shape) + rng.uniform(-0.5, 0.5, x.shape)
    codes = np.clip(np.round(x * (full - 1) + tpdf), -full, full - 1)
    if bits == 16:
        return codes.astype(np.int16)
    return codes.astype(np.int32) << 8


def oversampled_peak(x, *, factor=8):
    """Peak magnitude of x interpolated ``factor`` times by FFT zero padding (an estimate of
    the true peak of the continuous signal; the edges are treated as periodic)."""
    x = np.atleast_2d(x.T).T
    n = x.shape[0]
    spectrum = np.fft.rfft(x, axis=0)
    up = np.fft.irfft(spectrum, n * factor, axis=0) * factor
    return float(np.abs(up).max())


def _dbfs(value):
    return 20.0 * np.log10(max(value, 1e-12))


def write_demo(path, signal, rate_hz, rng, *, bits, tags):
    """Write ``signal`` (frames or frames x channels) as dithered codes; return the figures of
    the written file (read back through webapp.media)."""
    data = signal if signal.ndim == 2 else signal[:, None]
    plan = output_plan(path, rate_hz=rate_hz, channels=data.shape[1], bits=str(bits))
    with AtomicWriter(path, plan, tags=tags) as out:
        out.write(to_codes(data, rng, bits=bits))
    info = probe(path)
    data = np.concatenate(list(read_blocks(path)))  # figures of what was written, read back
    return {
        "file": os.path.basename(path),
        "rate_hz": info.rate_hz,
        "channels": info.channels,
        "subtype": info.subtype,
        "duration_s": round(info.duration_s, 3),
        "size_bytes": info.size_bytes,
        "peak_dbfs": round(_dbfs(np.abs(data).max()), 2),
        "oversampled_peak_dbfs": round(_dbfs(oversampled_peak(data)), 2),
        "rms_dbfs": round(_dbfs(np.sqrt(np.mean(data ** 2))), 2),
        "sha256": sha256_file(path),
    }


def _tags(title, comment):
    return {
        "title": title,
        "artist": "Harbour Lane Radio (invented)",
        "album": "Rateferry demo media",
        "comment": comment,
        "copyright": "Invented demo data, generated by scripts/make_demo_media.py",
        "date": "2026",
    }


def main(argv=None):
    here = os.path.dirname(os.path.abspath(__file__))
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default=os.path.join(here, os.pardir, "demo_media"),
                        help="folder for the files (default: demo_media/ of the repository)")
    parser.add_argument("--no-promo", action="store_true", help="skip the 48 kHz ident")
    args = parser.parse_args(argv)
    out = os.path.abspath(args.out)
    os.makedirs(out, exist_ok=True)

    rng = np.random.default_rng(SEED)
    jobs = [
        ("harbour_interview_44k1.flac", make_interview(rng), SOURCE_RATE_HZ, 16,
         _tags("Interview, episode 12 (speech-like)",
               "Synthetic speech-like clip: voiced pitch 90-220 Hz, sibilance 4-11 kHz, "
               "room tone")),
        ("harbour_music_bed_44k1.flac", make_music_bed(rng), SOURCE_RATE_HZ, 16,
         _tags("Music bed, episode 12",
               "Synthetic music bed; air partials at 20.2, 20.75, 21.3 kHz; -1 dBFS ceiling")),
    ]
    if not args.no_promo:
        jobs.append(("harbour_promo_48k.wav", make_promo(rng), PROMO_RATE_HZ, 24,
                     _tags("Station ident (48 kHz)",
                           "Synthetic ident; sparkle partials at 22.4, 23.0, 23.6 kHz")))
    total = 0
    for name, signal, rate, bits, tags in jobs:
        figures = write_demo(os.path.join(out, name), signal, rate, rng, bits=bits, tags=tags)
        total += figures["size_bytes"]
        print("  ".join(f"{k}={v}" for k, v in figures.items()))
    print(f"total_bytes={total}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
