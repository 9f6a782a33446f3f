"""Listening: renditions of an excerpt (original, converted, difference) level-matched and
time-aligned at the playback rate, and the statistics of blind trials (no Flask here)."""

from dataclasses import dataclass
from fractions import Fraction
import math
import os

import numpy as np
from scipy import special

from webapp import media
from webapp.dsp.errors import ParameterError
from webapp.dsp.loudness import integrated_loudness
from webapp.dsp.polyphase import convert
from webapp.designs import PLAYBACK_PRESET
from webapp.figures import MARGIN_S, check_excerpt, read_frames

__all__ = ["make_renditions", "binomial_tail", "RENDITION_MIN_S", "BLIND_TRIAL_COUNTS",
           "BLIND_TRIAL_DEFAULT"]

RENDITION_MIN_S = 0.5
#: Trials a blind session can have; ten is the default (with 9 of 10 right, p = 0.011).
BLIND_TRIAL_COUNTS = (6, 8, 10, 12, 16, 20)
BLIND_TRIAL_DEFAULT = 10


def binomial_tail(correct, trials):
    """P(at least ``correct`` right of ``trials`` by guessing, p = 1/2): the one-sided
    binomial tail. Summed exactly in integers up to 1000 trials; beyond, the regularised
    incomplete beta function I_1/2(k, n - k + 1), which equals that tail (Abramowitz & Stegun
    26.5.24, from memory; the tests check it against scipy.stats.binomtest) and keeps a
    request of thousands of trials fast."""
    correct, trials = int(correct), int(trials)
    if correct <= 0:
        return 1.0
    if correct > trials:
        return 0.0
    if trials <= 1000:
        return float(Fraction(sum(math.comb(trials, k) for k in range(correct, trials + 1)),
                              1 << trials))
    return float(special.betainc(correct, trials - correct + 1, 0.5))


def _grid_hz(*rates):
    g = 0
    for r in rates:
        g = math.gcd(g, int(r))
    return g


def _to_rate(x, rate, target, cache):
    if rate == target:
        return x
    return convert(x, cache.playback(rate, target))


def _fit(x, frames, channels):
    """Cut or zero-pad ``x`` to ``frames``."""
    if x is None:
        return np.zeros((frames, channels))
    if x.shape[0] >= frames:
        return x[:frames]
    return np.concatenate([x, np.zeros((frames - x.shape[0], x.shape[1]))], axis=0)


def _loudness_or_none(x, rate):
    try:
        v = integrated_loudness(x, rate)
    except ParameterError:
        return None
    return float(v) if math.isfinite(v) else None


def _rms_db(x):
    ms = float(np.mean(np.square(x))) if x.size else 0.0
    return 10 * math.log10(ms) if ms > 0 else None


def _peak_db(x):
    p = float(np.max(np.abs(x))) if x.size else 0.0
    return 20 * math.log10(p) if p > 0 else None


@dataclass(frozen=True)
class _Window:
    """An excerpt on a time grid common to the three rates (``g`` Hz): the asked part
    [start_u, start_u + length_u) and the part read with margins [s0_u, e0_u), in grid units."""

    g: int
    snapped: bool
    start_u: int
    length_u: int
    s0_u: int
    e0_u: int

    def frames(self, u, rate):
        return u * rate // self.g


def _window(probe, fs_out, rate_hz, start_s, length_s):
    fs_in = probe.rate_hz
    g = _grid_hz(fs_in, fs_out, rate_hz)
    snapped = g >= 10
    if not snapped:
        g = fs_in
    start_u = int(round(start_s * g))
    total_u = probe.frames * g // fs_in
    length_u = min(int(round(length_s * g)), total_u - start_u)
    if length_u <= 0:
        raise ParameterError(f"start_s must lie inside the recording, got {start_s:g}", "start_s")
    margin_u = int(math.ceil(MARGIN_S * g))
    return _Window(g=g, snapped=snapped, start_u=start_u, length_u=length_u,
                   s0_u=max(0, start_u - margin_u),
                   e0_u=min(total_u, start_u + length_u + margin_u))


def _converted_excerpt(source_path, orig, converted, w, fs_in, rate_hz, channels):
    """The converted audio at fs_out covering the same source times as ``orig``, and the shift
    (samples at the playback rate) that undoes a minimum-phase design's delay.

    A minimum-phase design keeps its delay: the converted audio is taken that much later,
    rounded to a sample at the playback rate (the finer grid of the two when it is the higher
    rate)."""
    plan = converted["plan"]
    fs_out = plan.fs_out
    latency_ms = float(plan.latency_ms) if plan.phase == "minimum" else 0.0
    shift = int(round(latency_ms / 1000.0 * rate_hz))
    extra = int(math.ceil(latency_ms / 1000.0 * fs_out)) + 1 if shift else 0
    span = w.frames(w.e0_u - w.s0_u, fs_out) + extra
    if "path" in converted:
        out_frames = media.probe(converted["path"]).frames
        a = w.frames(w.s0_u, fs_out)
        count = min(span, max(0, out_frames - a))
        conv = read_frames(converted["path"], a, count) if count > 0 else None
    else:
        # convert the same stretch of the source (longer by the latency when there is one)
        need = -(-span * fs_in // fs_out) + 1
        src = orig if not extra else read_frames(source_path, w.frames(w.s0_u, fs_in), need)
        conv = convert(src, plan)
    return _fit(conv, span, channels), shift, latency_ms


def _level_match(orig_r, conv_r, rate_hz):
    """Gains (dB) that bring both to the quieter one's integrated loudness (or rms when the
    excerpt is too short to gate), the method, the target and both loudness figures."""
    l_orig, l_conv = _loudness_or_none(orig_r, rate_hz), _loudness_or_none(conv_r, rate_hz)
    if l_orig is not None and l_conv is not None:
        target = min(l_orig, l_conv)
        return dict(method="integrated_loudness", target=target, g_orig=target - l_orig,
                    g_conv=target - l_conv, l_orig=l_orig, l_conv=l_conv)
    r_orig, r_conv = _rms_db(orig_r), _rms_db(conv_r)
    if r_orig is not None and r_conv is not None:
        target = min(r_orig, r_conv)
        return dict(method="rms", target=target, g_orig=target - r_orig,
                    g_conv=target - r_conv, l_orig=l_orig, l_conv=l_conv)
    return dict(method="none", target=None, g_orig=0.0, g_conv=0.0, l_orig=l_orig,
                l_conv=l_conv)


def _write_renditions(folder, rendition_id, rate_hz, channels, sample_format, parts):
    bits = "32f" if sample_format == "float32" else "24"
    paths = {}
    for kind, data in parts:
        path = os.path.join(folder, f"{rendition_id}_{kind}.wav")
        out_plan = media.output_plan(path, rate_hz=rate_hz, channels=channels, bits=bits)
        with media.AtomicWriter(path, out_plan) as w:
            w.write(data.astype(np.float32 if bits == "32f" else np.float64))
        paths[kind] = path
    return paths


def _caution_text(level):
    if level is None or level < -20.0:
        return ("Hearing caution: the difference is "
                + (f"{-level:.0f} dB below the original" if level is not None else "silent")
                + ". Boosting it to hear it also boosts any sudden loud part; start with "
                "the volume low and raise it slowly.")
    return "Hearing caution: the difference is loud; keep the volume low."


def _alignment_text(phase, shift, rate_hz, latency_ms):
    if phase == "minimum":
        return (f"minimum phase: the converted audio was moved {shift} samples "
                f"({shift / rate_hz * 1000:.3f} ms) earlier to undo the filter's latency of "
                f"{latency_ms:.3f} ms (its passband group delay); the group delay varies "
                f"with frequency, so phase differences remain")
    return "the converter removes its own delay (linear phase); no shift needed"


def make_renditions(*, source_path, probe, converted, start_s, length_s, rate_hz, cache,
                    folder, rendition_id, sample_format="float32", max_length_s=60.0):
    """Write the original, converted and difference excerpts as WAV files at ``rate_hz``.

    Parameters
    ----------
    source_path : str
    probe : media.Probe of the source
    converted : dict
        Either ``{"path": output file, "plan": plan}`` (a finished conversion) or
        ``{"plan": plan}`` (convert the excerpt now with the same plan).
    start_s, length_s : float
        The excerpt; the start is snapped to a grid common to all three rates so every
        rendition starts on a whole sample (exact alignment).
    rate_hz : int
        Playback rate.
    cache : DesignCache
    folder : str
        Where the files go, named ``<rendition_id>_<kind>.wav``.

    Returns
    -------
    figures : dict
    paths : dict of kind -> path
    """
    fs_in, plan, channels = probe.rate_hz, converted["plan"], probe.channels
    fs_out = plan.fs_out
    check_excerpt(float(start_s), float(length_s), probe.duration_s, max_length_s,
                  minimum_s=RENDITION_MIN_S)
    w = _window(probe, fs_out, rate_hz, start_s, length_s)
    orig = read_frames(source_path, w.frames(w.s0_u, fs_in), w.frames(w.e0_u - w.s0_u, fs_in))
    conv, shift, latency_ms = _converted_excerpt(source_path, orig, converted, w, fs_in,
                                                 rate_hz, channels)
    n = w.frames(w.length_u, rate_hz)
    lead = w.frames(w.start_u - w.s0_u, rate_hz)
    orig_r = _fit(_to_rate(orig, fs_in, rate_hz, cache)[lead:], n, channels)
    conv_r = _fit(_to_rate(conv, fs_out, rate_hz, cache)[lead + shift:], n, channels)
    lm = _level_match(orig_r, conv_r, rate_hz)
    orig_m = orig_r * 10 ** (lm["g_orig"] / 20)
    conv_m = conv_r * 10 ** (lm["g_conv"] / 20)
    diff = conv_m - orig_m
    rms_diff, rms_orig, peak_diff = _rms_db(diff), _rms_db(orig_m), _peak_db(diff)
    level = None if rms_diff is None or rms_orig is None else rms_diff - rms_orig
    paths = _write_renditions(folder, rendition_id, rate_hz, channels, sample_format,
                              (("original", orig_m), ("converted", conv_m),
                               ("difference", diff)))
    figures = dict(
        rate_hz=int(rate_hz), start_s=w.start_u / w.g, length_s=w.length_u / w.g,
        frames=int(n), requested_start_s=float(start_s), sample_format=sample_format,
        snapped_to_hz=w.g if w.snapped else None,
        alignment=dict(phase=plan.phase, shift_samples=shift, shift_rate_hz=int(rate_hz),
                       shift_ms=shift / rate_hz * 1000.0, latency_ms=latency_ms,
                       text=_alignment_text(plan.phase, shift, rate_hz, latency_ms)),
        level_match=dict(method=lm["method"], target=lm["target"],
                         unit="LUFS" if lm["method"] == "integrated_loudness" else "dBFS"),
        original=dict(source_rate_hz=fs_in, resampled_for_playback=fs_in != rate_hz,
                      integrated_lufs=lm["l_orig"], gain_db=lm["g_orig"]),
        converted=dict(source_rate_hz=fs_out, resampled_for_playback=fs_out != rate_hz,
                       integrated_lufs=lm["l_conv"], gain_db=lm["g_conv"],
                       from_output_file="path" in converted),
        difference=dict(rms_dbfs=rms_diff, level_db=level, peak_dbfs=peak_diff,
                        max_boost_db=None if peak_diff is None else -peak_diff, caution=True,
                        caution_text=_caution_text(level)),
        playback_preset=PLAYBACK_PRESET,
    )
    return figures, paths
