"""Start offset and clock drift between two recordings of the same event.

Conventions
-----------
* The model is the time base's (see timebase.py): t_track = offset + (1 + e) * t_ref, seconds by
  each file's nominal rate. The lag of the track at reference time t is offset + e * t:
  ``offset_ms`` is positive when the track's content comes late (its first word sits later in
  its file than in the reference), ``drift_ppm`` = e * 1e6 is positive when the track runs fast.
* Both recordings are mixed to mono and decimated, block by block, to ``analysis_rate_hz`` (a
  linear-phase converter that removes its own delay, so times are kept exactly); memory is that
  of the decimated copies only (an hour at 4 kHz is 58 MB of float32 each).
* Delay per window: generalised cross-correlation with phase transform (GCC-PHAT, Knapp & Carter,
  "The generalized correlation method for estimation of time delay", IEEE Trans. ASSP 24(4),
  1976), restricted to a band; the peak is refined below one sample by evaluating the
  band-limited correlation on a 1/8-sample grid (an exact sinc interpolation of the correlation)
  and fitting a parabola through the best three points.
* A window is used when its correlation peak stands ``min_peak_ratio_db`` above the rms of its
  sidelobes (the peak-to-sidelobe gate: windows with no common signal have none) and it is not
  an outlier of the line. The line is a Theil-Sen fit (Theil 1950; Sen, JASA 63, 1968;
  scipy.stats.theilslopes), whose interval for the slope is Sen's.
* A coarse pass first finds the offset within +-``max_offset_ms`` from a few long stretches, so
  the many short windows only search a few tens of milliseconds around the coarse line.
"""

from dataclasses import dataclass, field
from functools import lru_cache
import math

import numpy as np
from scipy import stats

from .errors import ParameterError
from .polyphase import make_converter
from .rates import validate_rate
from .spec import Spec
from .stages import choose_plan
from .timebase import TimeBase

__all__ = ["DriftMeasurement", "measure_drift", "decimated_mono", "gcc_phat_delay",
           "ANALYSIS_RATE_HZ"]

ANALYSIS_RATE_HZ = 4000
BAND_LOW_HZ = 100.0
BAND_FRACTION = 0.8        # PHAT band top, as a fraction of the analysis Nyquist
COARSE_WINDOW_S = 20.0
COARSE_SEGMENTS = 9
FINE_MARGIN_S = 0.02       # fine search: +- this around the coarse line, plus its spread
_SUBSAMPLE_GRID = np.linspace(-1.0, 1.0, 17)
_EXCLUDE_S = 0.005         # sidelobes are counted this far from the peak and beyond


@dataclass(frozen=True, eq=False)
class DriftMeasurement:
    """Offset and drift of a track against a reference, with the per-window points.

    ``times_s`` are window centres in reference time; ``offsets_ms`` the measured lag of the
    track there; ``used`` marks the windows in the fit; ``peak_ratio_db`` their gate figure.
    """

    ref_rate_hz: int
    track_rate_hz: int
    ref_frames: int
    track_frames: int
    analysis_rate_hz: int
    offset_ms: float
    drift_ppm: float
    drift_ppm_low: float
    drift_ppm_high: float
    confidence: float
    residual_rms_ms: float
    residual_worst_ms: float
    windows_used: int
    windows_total: int
    used_share: float
    window_s: float
    times_s: np.ndarray = field(repr=False)
    offsets_ms: np.ndarray = field(repr=False)
    peak_ratio_db: np.ndarray = field(repr=False)
    used: np.ndarray = field(repr=False)

    def offset_at_ms(self, t_s):
        """The fitted lag of the track (ms) at reference time ``t_s``."""
        return self.offset_ms + self.drift_ppm * 1e-3 * np.asarray(t_s, dtype=float)

    def time_base(self, frames_out=None):
        """The :class:`TimeBase` that corrects the track (to the reference's length by default)."""
        return TimeBase(self.track_rate_hz, self.ref_rate_hz, self.drift_ppm, self.offset_ms,
                        self.ref_frames if frames_out is None else frames_out)

    def figures(self):
        """Plain figures (no arrays) plus the points as lists, for reports and plots."""
        keys = ("ref_rate_hz", "track_rate_hz", "ref_frames", "track_frames",
                "analysis_rate_hz", "offset_ms", "drift_ppm", "drift_ppm_low",
                "drift_ppm_high", "confidence", "residual_rms_ms", "residual_worst_ms",
                "windows_used", "windows_total", "used_share", "window_s")
        out = {k: getattr(self, k) for k in keys}
        out["points"] = dict(times_s=self.times_s.tolist(), offsets_ms=self.offsets_ms.tolist(),
                             peak_ratio_db=self.peak_ratio_db.tolist(),
                             used=self.used.tolist())
        return out


# ---------------------------------------------------------------- decimation (streaming)

@lru_cache(maxsize=16)
def _decimator_design(rate_hz, analysis_rate_hz):
    # Loose on purpose: the correlation only uses the band up to BAND_FRACTION of the analysis
    # Nyquist; aliases may fall in the transition band above it. A multistage plan when it saves
    # work (48 kHz -> 4 kHz: 48 -> 16 -> 4 kHz, about 40 % fewer multiply-adds).
    spec = Spec(passband_fraction=BAND_FRACTION, ripple_db=0.5, attenuation_db=60.0,
                allow_transition_aliasing=True, arithmetic="float32", stages="auto")
    return choose_plan(spec, rate_hz, analysis_rate_hz)


def _blocks(source, block_frames):
    if isinstance(source, np.ndarray):
        for i in range(0, source.shape[0], block_frames):
            yield source[i:i + block_frames]
        return
    it = source() if callable(source) else source
    yield from it


def decimated_mono(source, rate_hz, analysis_rate_hz, *, block_frames=1 << 16):
    """Mix ``source`` to mono and decimate it to ``analysis_rate_hz``, one block at a time.

    Parameters
    ----------
    source : ndarray, iterable of ndarray, or callable returning one
        frames or frames x channels at ``rate_hz``; a callable (a block reader) is called once.

    Returns
    -------
    (ndarray, int)
        The float32 decimated signal and the number of source frames read.
    """
    if rate_hz == analysis_rate_hz:
        conv = None          # already at the analysis rate: mono mix only
    else:
        conv = make_converter(_decimator_design(rate_hz, analysis_rate_hz), channels=1)
    parts, frames = [], 0
    for block in _blocks(source, block_frames):
        b = np.asarray(block)
        if b.ndim == 2:
            b = b.mean(axis=1) if b.shape[1] > 1 else b[:, 0]
        elif b.ndim != 1:
            raise ParameterError(f"blocks must be frames or frames x channels, got shape "
                                 f"{b.shape}", "block")
        if not np.all(np.isfinite(b)):
            raise ParameterError("audio must be finite numbers; a block holds NaN or infinity",
                                 "block")
        frames += b.shape[0]
        b = b.astype(np.float32)
        parts.append(b if conv is None else conv.process(b[:, None])[:, 0])
    if conv is not None:
        parts.append(conv.flush()[:, 0])
    return np.concatenate(parts), frames


# ---------------------------------------------------------------- one window

def gcc_phat_delay(ref_seg, track_seg, rate_hz, lag_range, *, band_hz=None, refine=True):
    """GCC-PHAT delay of ``ref_seg`` inside the longer ``track_seg`` (Knapp & Carter 1976).

    ``lag_range`` = (k_lo, k_hi): lags k in samples such that track_seg[n + k] ~ ref_seg[n];
    both ends must keep the whole reference segment inside the track segment.

    Returns
    -------
    (lag, peak_ratio_db)
        The lag in samples (sub-sample when ``refine``) and the peak's height over the rms of
        the sidelobes in dB (-inf when either segment is silent).
    """
    r = np.asarray(ref_seg, dtype=np.float64)
    g = np.asarray(track_seg, dtype=np.float64)
    if g.size < r.size + int(lag_range[1]):
        raise ParameterError(f"the track segment ({g.size} frames) must hold the reference "
                             f"segment ({r.size}) at every lag up to {lag_range[1]}", "lag_range")
    # lags 0..k_hi never wrap when the transform is as long as the track segment: the product
    # below is the linear correlation there (the other lags only serve as sidelobes)
    n_fft = 1 << int(math.ceil(math.log2(g.size)))
    R = np.fft.rfft(r, n_fft)
    G = np.fft.rfft(g, n_fft)
    cross = G * np.conj(R)
    f = np.fft.rfftfreq(n_fft, 1.0 / rate_hz)
    lo_hz, hi_hz = band_hz or (BAND_LOW_HZ, BAND_FRACTION * rate_hz / 2)
    mag = np.abs(cross)
    floor = 1e-9 * mag.max() if mag.size else 0.0
    in_band = (f >= lo_hz) & (f <= hi_hz) & (mag > floor)
    if not np.any(in_band) or floor == 0.0:
        return float("nan"), float("-inf")
    w = np.zeros_like(cross)
    w[in_band] = cross[in_band] / mag[in_band]
    c = np.fft.irfft(w, n_fft)                 # c[k] = sum_n g[n + k] r[n], whitened
    k_lo, k_hi = int(lag_range[0]), int(lag_range[1])
    search = c[k_lo:k_hi + 1]
    k_rel = int(np.argmax(np.abs(search)))
    k0 = k_lo + k_rel
    peak = c[k0]
    exclude = max(2, int(round(_EXCLUDE_S * rate_hz)))
    near = np.take(c, np.arange(k0 - exclude, k0 + exclude + 1), mode="wrap")
    side_energy = max(0.0, float(np.sum(c * c)) - float(np.sum(near * near)))
    side_rms = math.sqrt(side_energy / max(1, n_fft - near.size))
    ratio_db = 20 * math.log10(abs(peak) / side_rms) if side_rms > 0 else float("inf")
    if not refine:
        return float(k0), ratio_db
    # exact band-limited interpolation of c around k0: c(tau) = (2/N) Re sum_f W_f e^{j2pi f tau/N}
    bins = np.nonzero(in_band)[0]
    tau = k0 + _SUBSAMPLE_GRID
    h = _SUBSAMPLE_GRID[1] - _SUBSAMPLE_GRID[0]
    term = w[bins] * np.exp(2j * np.pi * bins * (tau[0] / n_fft))
    turn = np.exp(2j * np.pi * bins * (h / n_fft))
    vals = np.empty(tau.size)
    for j in range(tau.size):        # the grid by recurrence: one complex product per point
        vals[j] = term.real.sum()
        term *= turn
    vals *= np.sign(peak)
    b = int(np.argmax(vals))
    b = min(max(b, 1), vals.size - 2)
    y0, y1, y2 = vals[b - 1], vals[b], vals[b + 1]
    den = y0 - 2 * y1 + y2
    frac = 0.5 * h * (y0 - y2) / den if den < 0 else 0.0
    return float(tau[b] + frac), ratio_db


# ---------------------------------------------------------------- coarse and fine passes

def _coarse(ref_d, trk_d, fa, max_lag, min_ratio_db):
    """Integer lags of a few long stretches; returns (times_s, lags, best_ratio_db)."""
    nr, nt = ref_d.size, trk_d.size
    wc = min(int(COARSE_WINDOW_S * fa), nr)
    starts = np.unique(np.linspace(0, nr - wc, min(COARSE_SEGMENTS, max(1, nr // wc + 1)))
                       .round().astype(int))
    times, lags, best = [], [], float("-inf")
    for s in starts:
        t0 = max(0, s - max_lag)
        t1 = min(nt, s + wc + max_lag)
        if t1 - t0 < wc:
            continue
        lag, ratio = gcc_phat_delay(ref_d[s:s + wc], trk_d[t0:t1], fa, (0, t1 - t0 - wc),
                                    refine=False)
        best = max(best, ratio)
        if ratio >= min_ratio_db:
            times.append((s + wc / 2) / fa)
            lags.append(lag + t0 - s)
    return np.array(times), np.array(lags, dtype=float), best


def _predictor(times, lags, fa, max_drift):
    """The coarse line: lag(t) in samples and the search margin (samples) around it."""
    if times.size >= 3:
        slope, icpt, _, _ = stats.theilslopes(lags, times)
        spread = float(np.max(np.abs(lags - (icpt + slope * times))))
        spread = min(spread, 4 * float(np.median(np.abs(lags - (icpt + slope * times)))) + 2)
        return (lambda t: icpt + slope * t), (lambda t: FINE_MARGIN_S * fa + 3 * spread)
    lag0 = float(np.median(lags))
    t_near = float(np.median(times))
    return (lambda t: lag0), (lambda t: FINE_MARGIN_S * fa + max_drift * abs(t - t_near) * fa)


def _fine(ref_d, trk_d, fa, w, count, predict, margin):
    nr, nt = ref_d.size, trk_d.size
    starts = np.linspace(0, nr - w, count).round().astype(int)
    times, offsets, ratios = [], [], []
    for s in starts:
        t_c = (s + w / 2) / fa
        p = int(round(predict(t_c)))
        m = int(math.ceil(margin(t_c)))
        a, b = s + p - m, s + p + w + m
        if a < 0 or b > nt:
            continue        # the track doesn't cover this window with its search margin
        lag, ratio = gcc_phat_delay(ref_d[s:s + w], trk_d[a:b], fa, (0, 2 * m))
        if not math.isfinite(lag):
            lag, ratio = float(p), float("-inf")
        times.append(t_c)
        offsets.append((lag + a - s) / fa * 1000.0)
        ratios.append(ratio)
    return np.array(times), np.array(offsets), np.array(ratios)


def _robust_fit(times, offsets_ms, used, fa, confidence):
    """Theil-Sen line on the used points, dropping outliers of it; returns the fit and mask."""
    used = used.copy()
    floor_ms = 0.25 / fa * 1000.0     # a quarter sample: below that, points agree
    for _ in range(3):
        slope, icpt, _, _ = stats.theilslopes(offsets_ms[used], times[used])
        resid = offsets_ms - (icpt + slope * times)
        mad = float(np.median(np.abs(resid[used])))
        keep = used & (np.abs(resid) <= max(6 * 1.4826 * mad, floor_ms))
        if keep.sum() == used.sum() or keep.sum() < 3:
            break
        used = keep
    slope, icpt, lo, hi = stats.theilslopes(offsets_ms[used], times[used], alpha=confidence)
    return slope, icpt, lo, hi, used


# ---------------------------------------------------------------- the measurement

def measure_drift(ref, ref_rate_hz, track, track_rate_hz, *, analysis_rate_hz=ANALYSIS_RATE_HZ,
                  window_s=4.0, windows=None, window_spacing_s=10.0, max_offset_ms=30000.0,
                  max_drift_ppm=500.0, min_peak_ratio_db=18.0, min_windows=8, min_share=0.1,
                  confidence=0.95, mapper=map):
    """Estimate the start offset and clock drift of ``track`` against ``ref``.

    Parameters
    ----------
    ref, track : ndarray, iterable of blocks, or callable returning one
        frames or frames x channels (channels are mixed to mono); read once, block by block.
    ref_rate_hz, track_rate_hz : int
        Nominal rates in Hz; they may differ.
    analysis_rate_hz : int, optional
        Rate of the decimated copies (default 4000; never above either rate).
    window_s : float, optional
        Length of each correlation window, default 4 s.
    windows : int, optional
        Number of windows across the reference; default one per ``window_spacing_s`` (10 s),
        at least 24 and at most 360.
    max_offset_ms : float, optional
        Largest start offset searched, default 30 s either way.
    max_drift_ppm : float, optional
        Largest drift assumed when only one coarse stretch is found (widens the search).
    min_peak_ratio_db : float, optional
        Peak-to-sidelobe gate of a window, default 18 dB.
    min_windows, min_share : optional
        Refuse unless at least this many windows, and this share of them, are used.
    confidence : float, optional
        Confidence of the drift interval (Sen's interval for the Theil-Sen slope), default 0.95.
    mapper : callable, optional
        ``mapper(fn, sources, rates)`` runs the two decimations (reference, track), default the
        built-in ``map`` (one after the other); a caller may pass a thread pool's map to read
        and decimate both recordings at once.

    Returns
    -------
    DriftMeasurement

    Raises
    ------
    ParameterError
        For bad rates or options, recordings too short for two windows, or when the two
        recordings share too little to measure (the message gives the gate and the counts).
    """
    ref_rate_hz = validate_rate(ref_rate_hz, field="ref_rate_hz")
    track_rate_hz = validate_rate(track_rate_hz, field="track_rate_hz")
    fa = min(validate_rate(analysis_rate_hz, field="analysis_rate_hz"), ref_rate_hz,
             track_rate_hz)
    _check_positive("window_s", window_s, 0.25, 600.0)
    _check_positive("max_offset_ms", max_offset_ms, 0.0, 3.6e6)
    _check_positive("confidence", confidence, 0.5, 0.999)
    (ref_d, ref_frames), (trk_d, track_frames) = mapper(
        lambda source, rate: decimated_mono(source, rate, fa), (ref, track),
        (ref_rate_hz, track_rate_hz))
    w = int(round(window_s * fa))
    if ref_d.size < 2 * w or trk_d.size < w:
        raise ParameterError(
            f"drift needs recordings of at least two windows ({2 * window_s:g} s); the reference "
            f"has {ref_frames / ref_rate_hz:.3g} s and the track {track_frames / track_rate_hz:.3g}"
            " s", "window_s")
    duration_s = ref_d.size / fa
    max_lag = int(math.ceil((max_offset_ms / 1000.0 + max_drift_ppm * 1e-6 * duration_s) * fa))
    c_times, c_lags, best = _coarse(ref_d, trk_d, fa, max_lag, min_peak_ratio_db)
    if c_times.size == 0:
        raise ParameterError(
            f"the recordings share too little to measure: no {COARSE_WINDOW_S:g} s stretch of the "
            f"reference was found in the track within +-{max_offset_ms:g} ms (best correlation "
            f"peak {best:.1f} dB above its sidelobes; the gate min_peak_ratio_db is "
            f"{min_peak_ratio_db:g} dB)", "min_peak_ratio_db")
    predict, margin = _predictor(c_times, c_lags, fa, max_drift_ppm * 1e-6)
    count = windows if windows is not None else int(np.clip(round(duration_s / window_spacing_s),
                                                            24, 360))
    if isinstance(count, bool) or int(count) != count or count < 3:
        raise ParameterError(f"windows must be a whole number >= 3, got {windows!r}", "windows")
    times, offsets, ratios = _fine(ref_d, trk_d, fa, w, int(count), predict, margin)
    gated = ratios >= min_peak_ratio_db
    n_gated, total = int(gated.sum()), int(times.size)
    if n_gated < max(3, min_windows) or n_gated < min_share * max(total, 1):
        raise ParameterError(
            f"the recordings share too little to measure: {n_gated} of {total} windows have a "
            f"correlation peak {min_peak_ratio_db:g} dB above its sidelobes (min_peak_ratio_db); "
            f"at least {max(3, min_windows)} and {min_share:.0%} are needed", "min_peak_ratio_db")
    slope, icpt, lo, hi, used = _robust_fit(times, offsets, gated, fa, confidence)
    resid = offsets[used] - (icpt + slope * times[used])
    return DriftMeasurement(
        ref_rate_hz=ref_rate_hz, track_rate_hz=track_rate_hz, ref_frames=int(ref_frames),
        track_frames=int(track_frames), analysis_rate_hz=int(fa),
        offset_ms=float(icpt), drift_ppm=float(slope * 1e3),
        drift_ppm_low=float(lo * 1e3), drift_ppm_high=float(hi * 1e3),
        confidence=float(confidence),
        residual_rms_ms=float(np.sqrt(np.mean(resid * resid))),
        residual_worst_ms=float(np.max(np.abs(resid))),
        windows_used=int(used.sum()), windows_total=total,
        used_share=float(used.sum() / total), window_s=float(w / fa),
        times_s=times, offsets_ms=offsets, peak_ratio_db=ratios, used=used)


def _check_positive(name, value, low, high):
    ok = isinstance(value, (int, float)) and not isinstance(value, bool)
    if not ok or not math.isfinite(value) or not low <= value <= high:
        raise ParameterError(f"{name} must be a number from {low:g} to {high:g}, got {value!r}",
                             name)
