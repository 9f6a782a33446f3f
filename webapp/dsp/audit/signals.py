"""Test signals at the source rate: tones, multitones, log sweeps, impulses and (dithered)
silence, each at an exact whole-Hz frequency so a one-second segment is coherent (see the
package notes)."""

import math

import numpy as np

from ..dither import DITHERS, WORD_LENGTHS, Quantizer
from ..errors import ParameterError
from ..rates import validate_rate

__all__ = ["AES17_FREQUENCY_HZ", "AUDIT_WORD_LENGTHS", "tone", "multitone", "log_sweep",
           "impulse", "silence", "schroeder_phases"]

AES17_FREQUENCY_HZ = 997.0          # AES17's standard test frequency (prime, never a bin of a
                                    # common rate unless the segment is a whole second)
LOW_LEVEL_DBFS = -60.0              # AES17 dynamic range test level
TONE_LEVEL_DBFS = -1.0
# The audit quantises its low-level signals to integer codes: the integer word lengths of
# dither.WORD_LENGTHS (the float ones, "32f" and "64f", carry no quantisation to measure).
AUDIT_WORD_LENGTHS = tuple(b for b in WORD_LENGTHS if not b.endswith("f"))


def _frames(rate_hz, duration_s, frames):
    if frames is None:
        if not (isinstance(duration_s, (int, float)) and duration_s > 0):
            raise ParameterError(f"duration_s must be a number above 0, got {duration_s!r}",
                                 "duration_s")
        frames = int(round(duration_s * rate_hz))
    if int(frames) < 1:
        raise ParameterError(f"frames must be at least 1, got {frames!r}", "frames")
    return int(frames)


def _whole_hz(freqs_hz, rate_hz, field_name="freqs_hz"):
    f = np.atleast_1d(np.asarray(freqs_hz, dtype=np.float64))
    if f.size == 0 or np.any(f != np.round(f)) or np.any(f <= 0) or np.any(f >= rate_hz / 2):
        raise ParameterError(f"{field_name} must be whole numbers of Hz above 0 and below the "
                             f"Nyquist frequency {rate_hz / 2:g} Hz, got {freqs_hz!r}", field_name)
    return f.astype(np.int64)


def tone(rate_hz, freq_hz=AES17_FREQUENCY_HZ, *, level_dbfs=TONE_LEVEL_DBFS, duration_s=1.0,
         frames=None, phase_rad=0.0):
    """A sine at ``level_dbfs`` (AES17 dBFS: peak 10**(level/20)), 997 Hz by default.

    Parameters
    ----------
    rate_hz : int
        Sample rate.
    freq_hz : float, optional
        Default is 997 Hz, the AES17 test frequency.
    level_dbfs : float, optional
        Default is -1 dBFS.
    duration_s : float, optional
        Length; ignored when ``frames`` is given. Default is 1 s.
    frames : int, optional
    phase_rad : float, optional
        The signal is ``A cos(2 pi f m / rate + phase_rad)`` at frame m.

    Returns
    -------
    ndarray, 1-D float64

    Notes
    -----
    For whole-Hz frequencies the phase is computed from the exact integer ``f m mod rate``,
    so long signals don't drift.
    """
    rate_hz = validate_rate(rate_hz, field="rate_hz")
    n = _frames(rate_hz, duration_s, frames)
    m = np.arange(n, dtype=np.int64)
    f = float(freq_hz)
    if f.is_integer():
        arg = 2 * np.pi * ((int(f) * m) % rate_hz) / rate_hz
    else:
        arg = 2 * np.pi * f * m / rate_hz
    return 10 ** (level_dbfs / 20.0) * np.cos(arg + phase_rad)


def schroeder_phases(count):
    """Schroeder's low-crest-factor phases -pi k (k - 1) / K for K equal tones (Schroeder,
    "Synthesis of low-peak-factor signals and binary sequences with low autocorrelation",
    IEEE Trans. Information Theory, 1970)."""
    k = np.arange(1, int(count) + 1, dtype=np.float64)
    return -np.pi * k * (k - 1) / count


def _multitone(rate_hz, freqs, n, peak_dbfs, amplitudes, phases_rad):
    """One second synthesised exactly by an inverse FFT (1 Hz bins), tiled to ``n`` frames."""
    f = _whole_hz(freqs, rate_hz)
    if np.unique(f).size != f.size:
        raise ParameterError("freqs_hz must not repeat a frequency", "freqs_hz")
    ph = schroeder_phases(f.size) if phases_rad is None else np.broadcast_to(
        np.asarray(phases_rad, dtype=np.float64), f.shape)
    amps = np.ones(f.size) if amplitudes is None else np.broadcast_to(
        np.asarray(amplitudes, dtype=np.float64), f.shape).copy()
    spec = np.zeros(rate_hz // 2 + 1, dtype=np.complex128)
    spec[f] = amps * (rate_hz / 2.0) * np.exp(1j * ph)
    period = np.fft.irfft(spec, n=rate_hz)
    if amplitudes is None:
        scale = 10 ** (peak_dbfs / 20.0) / np.max(np.abs(period))
        period *= scale
        amps = amps * scale
    x = period[np.arange(n) % rate_hz]
    return x, amps, np.asarray(ph)


def multitone(rate_hz, freqs_hz, *, duration_s=1.0, frames=None, peak_dbfs=TONE_LEVEL_DBFS,
              amplitudes=None, phases_rad=None):
    """A sum of cosines at whole-Hz frequencies, periodic with period one second.

    Parameters
    ----------
    rate_hz : int
    freqs_hz : array_like of whole numbers of Hz, each above 0 and below rate/2
    duration_s : float, optional
        Default is 1 s; ignored when ``frames`` is given.
    frames : int, optional
    peak_dbfs : float, optional
        With equal tones (``amplitudes`` None) the sum is scaled so its peak sits here.
        Default is -1 dBFS.
    amplitudes : array_like, optional
        Peak amplitude of each tone; overrides ``peak_dbfs``.
    phases_rad : array_like, optional
        Default: Schroeder phases (low crest factor).

    Returns
    -------
    ndarray, 1-D float64
    """
    rate_hz = validate_rate(rate_hz, field="rate_hz")
    n = _frames(rate_hz, duration_s, frames)
    return _multitone(rate_hz, freqs_hz, n, peak_dbfs, amplitudes, phases_rad)[0]


def _sweep_at(t, duration_s, start_hz, stop_hz, fade_s):
    """Exponential sine sweep sin(2 pi f1 T / ln(f2/f1) (exp(t ln(f2/f1) / T) - 1)) with
    raised-cosine fades, evaluated at arbitrary times ``t`` (seconds)."""
    rate = math.log(stop_hz / start_hz) / duration_s
    phase = 2 * np.pi * start_hz / rate * np.expm1(rate * t)
    g = np.ones_like(t)
    if fade_s > 0:
        a = np.clip(t / fade_s, 0, 1)
        b = np.clip((duration_s - t) / fade_s, 0, 1)
        g = 0.5 - 0.5 * np.cos(np.pi * np.minimum(a, b))
    return g * np.sin(phase)


def _sweep_frequency_time(f_hz, duration_s, start_hz, stop_hz):
    return duration_s * np.log(f_hz / start_hz) / math.log(stop_hz / start_hz)


def log_sweep(rate_hz, *, duration_s=1.0, frames=None, start_hz=20.0, stop_hz=None,
              level_dbfs=TONE_LEVEL_DBFS, fade_s=0.005):
    """Exponential (log) sine sweep from ``start_hz`` to the source Nyquist frequency.

    The instantaneous frequency is f1 (f2/f1)**(t/T) (Farina, "Simultaneous measurement of
    impulse response and distortion with a swept-sine technique", AES 108th Convention, 2000).

    Parameters
    ----------
    rate_hz : int
    duration_s : float, optional
        Default is 1 s; ignored when ``frames`` is given (then T = frames / rate).
    frames : int, optional
    start_hz : float, optional
        Default is 20 Hz.
    stop_hz : float, optional
        Default is rate/2, the Nyquist frequency.
    level_dbfs : float, optional
        Peak level, default -1 dBFS.
    fade_s : float, optional
        Raised-cosine fade in and out; default 5 ms.

    Returns
    -------
    ndarray, 1-D float64
    """
    rate_hz = validate_rate(rate_hz, field="rate_hz")
    n = _frames(rate_hz, duration_s, frames)
    stop_hz = rate_hz / 2.0 if stop_hz is None else float(stop_hz)
    if not 0 < start_hz < stop_hz <= rate_hz / 2:
        raise ParameterError(f"sweep needs 0 < start_hz < stop_hz <= {rate_hz / 2:g} Hz, got "
                             f"{start_hz!r} to {stop_hz!r}", "stop_hz")
    t = np.arange(n) / rate_hz
    return 10 ** (level_dbfs / 20.0) * _sweep_at(t, n / rate_hz, start_hz, stop_hz, fade_s)


def impulse(rate_hz, *, duration_s=1.0, frames=None, position=None, level=1.0):
    """A single sample of value ``level`` at frame ``position`` (default the middle), else 0."""
    rate_hz = validate_rate(rate_hz, field="rate_hz")
    n = _frames(rate_hz, duration_s, frames)
    position = n // 2 if position is None else int(position)
    if not 0 <= position < n:
        raise ParameterError(f"position must be a frame from 0 to {n - 1}, got {position}",
                             "position")
    x = np.zeros(n)
    x[position] = level
    return x


def _impulse_positions(n_in, start, spacing, up, down, count):
    """Input frames for the impulses: the first on a multiple of ``down`` (an output sample
    sits exactly on it), the others at sub-sample offsets spread over one output sample."""
    if down == 1:
        return [start]
    if down <= spacing:
        # each frame moves up to down - 1 past its slot: slots of spacing + down keep the
        # responses apart
        step = spacing + down
        count = max(1, min(count, (n_in - 2 * start) // step))
        inv = pow(up, -1, down)
        out = []
        for j in range(count):
            base = start + j * step
            r = int(round(j * down / count)) % down
            out.append(base + (r * inv - base) % down)
        return out
    # huge down (arbitrary-ratio path): frames spread over the signal have offsets
    # p up / down mod 1 spread over the sample; one sits on a multiple of down when it fits
    count = max(1, min(count, (n_in - 2 * start) // (2 * spacing)))
    grid = start + np.round(np.arange(count) * (n_in - 2 * start - 1) / max(count - 1, 1))
    grid = [int(v) for v in grid]
    exact = down * int(math.ceil(start / down))
    if exact <= n_in - start - 1:
        k = int(np.argmin([abs(v - exact) for v in grid]))
        grid.pop(k)
        grid.insert(0, exact)
    return grid


def _check_dither(dither, bits):
    if dither not in DITHERS:
        raise ParameterError(f"dither must be one of {', '.join(DITHERS)}, got {dither!r}",
                             "dither")
    bits = str(bits)
    if bits not in AUDIT_WORD_LENGTHS:
        raise ParameterError(f"bits must be one of {', '.join(AUDIT_WORD_LENGTHS)}, got "
                             f"{bits!r}", "bits")
    return dither, bits


def _word_length(x, rate_hz, *, dither, bits, seed):
    """Quantise ``x`` to ``bits`` with ``dither`` through :class:`webapp.dsp.dither.Quantizer`
    (the quantiser the pipeline writes files with) and return the codes over full scale.

    ``dither="none"`` leaves the signal unquantised: the converter is measured alone.
    """
    dither, bits = _check_dither(dither, bits)
    if dither == "none":
        return np.asarray(x, dtype=np.float64)
    q = Quantizer(bits=bits, dither=dither, seed=seed, channels=1, rate_hz=rate_hz)
    codes = np.asarray(q.process(np.asarray(x, dtype=np.float64)[:, None]))[:, 0]
    return codes.astype(np.float64) / (float(np.iinfo(codes.dtype).max) + 1.0)


def silence(rate_hz, *, duration_s=1.0, frames=None, dither="none", bits="16", seed=0):
    """Digital silence, or silence through a quantiser with ``dither`` at ``bits``.

    Parameters
    ----------
    rate_hz : int
    duration_s, frames : optional
    dither : {"none", "tpdf", "shaped"}, optional
        ``"none"`` (default) gives exact zeros.
    bits : {"16", "24"}, optional
    seed : int, optional

    Returns
    -------
    ndarray, 1-D float64 (codes divided by full scale)
    """
    rate_hz = validate_rate(rate_hz, field="rate_hz")
    n = _frames(rate_hz, duration_s, frames)
    return _word_length(np.zeros(n), rate_hz, dither=dither, bits=bits, seed=seed)

