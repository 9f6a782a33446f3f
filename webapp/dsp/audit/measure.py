"""Running the converter on test signals and measuring what comes out: coherent line and power
spectra, AES17 figures, group delay, the equivalent-time impulse response, pre-ringing,
alignment, and the response the design predicts (see the package notes)."""

import math

import numpy as np
from scipy import optimize, signal

from ..errors import ParameterError
from ..polyphase import make_converter
from ..spectrum import response_at
from .signals import AES17_FREQUENCY_HZ

__all__ = ["FLOOR_DB", "settle_time_s", "convert_channels", "steady_segment", "line_spectrum",
           "power_spectrum", "thd_n_db", "residual_dbfs", "band_rms_dbfs",
           "impulse_group_delay", "equivalent_time_response", "prering_ms",
           "alignment_from_lines", "alignment_from_signals", "predicted_response"]

MEASUREMENT_LOW_HZ = 20.0           # AES17 measurement bandwidth 20 Hz - 20 kHz
MEASUREMENT_HIGH_HZ = 20000.0
FLOOR_DB = -400.0                   # levels of exactly zero lines are reported at this floor
PRERING_THRESHOLD_DB = -60.0        # the same threshold design.py uses on the taps
CLUSTER_GAP_HZ = 16384              # predicted_response: gaps that split a chirp-z grid


# ------------------------------------------------------------------ running the converter

def _stages(d):
    return tuple(getattr(d, "stages", None) or (d,))


def _check_design(d):
    need = ("up", "down", "mask", "spec", "fs_in", "fs_out")
    if any(not hasattr(d, name) for name in need):
        raise ParameterError(f"audit needs a Design or a multistage Plan, got {type(d).__name__}",
                             "design")
    for s in _stages(d):
        if any(not hasattr(s, name) for name in ("taps", "filter_rate_hz", "phases",
                                                 "delay_samples", "path")):
            raise ParameterError(f"audit needs a Design or a multistage Plan, got a stage of "
                                 f"type {type(s).__name__}", "design")


def settle_time_s(design_or_plan):
    """Seconds of input a converter needs on either side of an output sample (the sum of its
    filters' lengths): beyond this from the ends, the output of a steady input is steady."""
    return float(sum(np.asarray(s.taps).size / s.filter_rate_hz for s in _stages(design_or_plan)))


def convert_channels(design_or_plan, x):
    """Run the converter :func:`make_converter` builds (the design's own arithmetic) on a whole
    frames x channels (or 1-D) signal; return float64 output of ceil(frames up / down) frames."""
    x = np.asarray(x, dtype=np.float64)
    flat = x.ndim == 1
    x2 = x[:, None] if flat else x
    conv = make_converter(design_or_plan, channels=x2.shape[1])
    y = np.asarray(conv.process_all(x2), dtype=np.float64)
    return y[:, 0] if flat else y


def steady_segment(y, rate_hz, *, start_s, seconds=1):
    """The ``seconds`` whole seconds of ``y`` (at ``rate_hz``) from the first sample at or after
    ``start_s``; raises when ``y`` is too short."""
    start = int(math.ceil(start_s * rate_hz - 1e-9))
    n = int(seconds * rate_hz)
    if start < 0 or start + n > len(y):
        raise ParameterError(f"the signal has {len(y)} frames; a steady segment needs frames "
                             f"{start} to {start + n}", "y")
    return y[start:start + n]


# ------------------------------------------------------------------ spectra and AES17 figures

def line_spectrum(segment, rate_hz):
    """Complex peak amplitude of each DFT line of a coherent segment.

    A component ``A cos(2 pi f n / rate + phi)`` that completes a whole number of periods in the
    segment reads ``A exp(j phi)`` at its bin (``phi`` relative to the segment's first sample).

    Returns
    -------
    freqs_hz, lines : ndarray
        Bins 0 .. N/2 at rate/N spacing; axis 0 of ``segment`` is time.
    """
    x = np.asarray(segment, dtype=np.float64)
    n = x.shape[0]
    spec = np.fft.rfft(x, axis=0) * (2.0 / n)
    spec[0] *= 0.5
    if n % 2 == 0:
        spec[-1] *= 0.5
    return np.arange(spec.shape[0]) * (rate_hz / n), spec


def power_spectrum(segment, rate_hz):
    """Mean-square power of each line of ``segment`` (sums to mean(x**2), Parseval)."""
    x = np.asarray(segment, dtype=np.float64)
    n = x.shape[0]
    p = np.abs(np.fft.rfft(x, axis=0)) ** 2 * (2.0 / n ** 2)
    p[0] *= 0.5
    if n % 2 == 0:
        p[-1] *= 0.5
    return np.arange(p.shape[0]) * (rate_hz / n), p


def _band(freqs, rate_hz, low_hz, high_hz):
    hi = min(float(high_hz), rate_hz / 2.0)
    return (freqs >= low_hz) & (freqs <= hi)


def _bin_of(freqs, rate_hz, n, f_hz):
    k = int(round(f_hz * n / rate_hz))
    if k < 0 or k >= freqs.size or abs(freqs[k] - f_hz) > 1e-9 * max(1.0, f_hz):
        raise ParameterError(f"the segment of {n} frames at {rate_hz:g} Hz has no bin at "
                             f"{f_hz:g} Hz; use a whole number of periods (a whole second for "
                             "whole-Hz tones)", "fundamental_hz")
    return k


def _notched(segment, rate_hz, fundamental_hz, low_hz, high_hz):
    x = np.asarray(segment, dtype=np.float64)
    freqs, p = power_spectrum(x, rate_hz)
    k = _bin_of(freqs, rate_hz, x.shape[0], fundamental_hz)
    band = _band(freqs, rate_hz, low_hz, high_hz)
    total = float(np.sum(p[band]))
    band[k] = False
    return float(np.sum(p[band])), total


def _db10(power):
    return 10 * math.log10(power) if power > 0 else -math.inf


def _level_db(ratio):
    with np.errstate(divide="ignore"):
        v = 20 * np.log10(np.asarray(ratio, dtype=np.float64))
    return np.maximum(v, FLOOR_DB)


def thd_n_db(segment, rate_hz, fundamental_hz=AES17_FREQUENCY_HZ, *,
             low_hz=MEASUREMENT_LOW_HZ, high_hz=MEASUREMENT_HIGH_HZ):
    """THD+N ratio in dB, AES17 style, of a coherent segment.

    The fundamental's bin is removed (an ideal notch) and the rest is summed over
    ``low_hz`` .. min(``high_hz``, rate/2); the result is relative to the whole band-limited
    signal (AES17-2015, THD+N ratio; clause number from memory, see the module notes).

    Parameters
    ----------
    segment : ndarray, 1-D
        A whole number of periods of every component (one second for whole-Hz tones).
    rate_hz : float
    fundamental_hz : float, optional
        Default is 997 Hz (AES17).
    low_hz, high_hz : float, optional
        Measurement bandwidth, default 20 Hz - 20 kHz.

    Returns
    -------
    float
        ``-inf`` for a perfectly pure tone.
    """
    resid, total = _notched(segment, rate_hz, fundamental_hz, low_hz, high_hz)
    if total <= 0:
        raise ParameterError("the segment carries no signal in the measurement band", "segment")
    return _db10(resid / total)


def residual_dbfs(segment, rate_hz, fundamental_hz=AES17_FREQUENCY_HZ, *,
                  low_hz=MEASUREMENT_LOW_HZ, high_hz=MEASUREMENT_HIGH_HZ):
    """Band-limited rms of what remains after notching the fundamental, in AES17 dBFS.

    On a 997 Hz tone at -60 dBFS this is the noise floor of the AES17 dynamic-range
    measurement; the dynamic range is its negative.
    """
    resid, _ = _notched(segment, rate_hz, fundamental_hz, low_hz, high_hz)
    return _db10(2 * resid)


def band_rms_dbfs(segment, rate_hz, *, low_hz=MEASUREMENT_LOW_HZ, high_hz=MEASUREMENT_HIGH_HZ):
    """rms of ``segment`` between ``low_hz`` and min(``high_hz``, rate/2) in AES17 dBFS
    (``low_hz=0, high_hz=inf`` gives the whole band)."""
    freqs, p = power_spectrum(segment, rate_hz)
    return _db10(2 * float(np.sum(p[_band(freqs, rate_hz, low_hz, high_hz)])))


# ------------------------------------------------------------------ time

def impulse_group_delay(y, rate_hz, impulse_at, *, passband_hz, half_width):
    """Group delay of an impulse response measured at the output, in output samples.

    Parameters
    ----------
    y : ndarray, 1-D
        The converter's output for an input holding a unit impulse.
    rate_hz : float
        Output rate.
    impulse_at : float
        Output-sample time of the input impulse (``position * up / down``; may be fractional).
    passband_hz : float
        The delay is the median of the group delay at 64 frequencies from 0 to this edge (the
        rule design.py applies to the taps).
    half_width : int
        Output samples used on either side of the impulse.

    Returns
    -------
    float
        Delay relative to the impulse (0 for an aligned linear-phase converter).
    """
    y = np.asarray(y, dtype=np.float64)
    c = int(math.floor(impulse_at))
    lo, hi = max(0, c - half_width), min(y.size, c + half_width + 1)
    freqs = np.linspace(0.0, passband_hz, 64)
    _, gd = signal.group_delay((y[lo:hi], [1.0]), w=freqs, fs=rate_hz)
    return float(np.median(gd)) + (lo - c) - float(impulse_at - c)


def equivalent_time_response(y, fs_in, fs_out, positions, *, half_width):
    """Merge the responses to several impulses into one finely sampled impulse response.

    The output sample n answers the impulse at input frame p at time n / fs_out - p / fs_in
    after it; impulses at frames with different ``p * up mod down`` sample the same response at
    different sub-sample offsets (equivalent-time sampling), so the merged points trace the
    response far more finely than one output-rate copy does.

    Returns
    -------
    times_s, h : ndarray
        Sorted times relative to the impulse and the response values there.
    """
    y = np.asarray(y, dtype=np.float64)
    ts, hs = [], []
    for p in positions:
        at = p * fs_out / fs_in
        c = int(math.floor(at))
        n = np.arange(max(0, c - half_width), min(y.size, c + half_width + 1))
        ts.append(n / fs_out - p / fs_in)
        hs.append(y[n])
    t = np.concatenate(ts)
    h = np.concatenate(hs)
    order = np.argsort(t, kind="stable")
    return t[order], h[order]


def prering_ms(times_s, h):
    """Time from the first point within 60 dB of the peak to the peak, in ms (the rule
    design.py applies to the taps)."""
    mag = np.abs(np.asarray(h, dtype=np.float64))
    if mag.size == 0:
        return 0.0
    peak = int(np.argmax(mag))
    above = np.nonzero(mag[:peak] >= mag[peak] * 10 ** (PRERING_THRESHOLD_DB / 20))[0]
    if above.size == 0:
        return 0.0
    return float((times_s[peak] - times_s[above[0]]) * 1000.0)


def alignment_from_lines(freqs_hz, measured, expected, *, max_lag_s):
    """Time offset (s) that maximises the cross-correlation of two line spectra.

    With measured lines Y_k and the analytic signal's lines X_k at f_k, the circular
    cross-correlation at lag s is R(s) = sum_k Re(Y_k conj(X_k) exp(j 2 pi f_k s)); its peak
    is the delay of the measured signal. R is searched on a fine grid within +-``max_lag_s``
    and refined between grid points (bounded scalar search on the exact trigonometric sum).
    """
    f = np.asarray(freqs_hz, dtype=np.float64)
    z = np.asarray(measured) * np.conj(np.asarray(expected))
    step = 1.0 / (6.0 * max(f.max(), 1.0))
    grid = np.arange(-max_lag_s, max_lag_s + step, step)
    r = np.empty(grid.size)
    for i in range(0, grid.size, 2048):
        g = grid[i:i + 2048]
        r[i:i + 2048] = np.real(np.exp(2j * np.pi * g[:, None] * f[None, :]) @ z)
    s0 = grid[int(np.argmax(r))]

    def neg(s):
        return -float(np.real(np.sum(z * np.exp(2j * np.pi * f * s))))

    res = optimize.minimize_scalar(neg, bounds=(s0 - step, s0 + step), method="bounded",
                                   options=dict(xatol=1e-13))
    return float(res.x)


def alignment_from_signals(y, reference, rate_hz, *, max_lag_samples):
    """Lag (in samples, fractional) at which ``y`` best matches ``reference``.

    The linear cross-correlation c(s) = sum_n y[n + s] reference[n] is computed by zero-padded
    FFTs; its peak within +-``max_lag_samples`` is refined between samples by evaluating the
    band-limited interpolation of c (its DFT sum) with a bounded scalar search.
    """
    y = np.asarray(y, dtype=np.float64)
    r = np.asarray(reference, dtype=np.float64)
    nfft = 1 << int(math.ceil(math.log2(y.size + r.size)))
    cross = np.fft.rfft(y, nfft) * np.conj(np.fft.rfft(r, nfft))
    c = np.fft.irfft(cross, nfft)
    lags = np.arange(-int(max_lag_samples), int(max_lag_samples) + 1)
    k0 = int(lags[int(np.argmax(c[lags % nfft]))])
    k = np.arange(cross.size)
    wgt = np.full(cross.size, 2.0)
    wgt[0] = 1.0
    wgt[-1] = 1.0

    def neg(s):
        return -float(np.real(np.sum(wgt * cross * np.exp(2j * np.pi * k * s / nfft))))

    res = optimize.minimize_scalar(neg, bounds=(k0 - 1.0, k0 + 1.0), method="bounded",
                                   options=dict(xatol=1e-9))
    return float(res.x)


# ------------------------------------------------------------------ the design's prediction

def predicted_response(design_or_plan, freqs_hz):
    """Normalised complex response H(f) / gain of the design (product over a plan's stages)
    at ``freqs_hz``, where f is the frequency in the up-sampled (zero-stuffed) spectrum.

    Whole-Hz frequencies are grouped into clusters; a cluster dense enough is evaluated on a
    1 Hz grid by one chirp-z transform per stage (scipy.signal.zoom_fft, exact to rounding),
    the rest directly (:func:`~webapp.dsp.spectrum.response_at`).
    """
    f = np.atleast_1d(np.asarray(freqs_hz, dtype=np.float64))
    out = np.ones(f.size, dtype=np.complex128)
    if f.size == 0:
        return out
    stages = _stages(design_or_plan)
    if not np.all(f == np.round(f)):
        for s in stages:
            out *= response_at(s.taps, s.filter_rate_hz, f) / s.phases
        return out
    order = np.argsort(f, kind="stable")
    fs = f[order]
    cuts = np.nonzero(np.diff(fs) > CLUSTER_GAP_HZ)[0] + 1
    for idx in np.split(np.arange(fs.size), cuts):
        part = fs[idx]
        lo, hi = int(part[0]), int(part[-1])
        m = hi - lo + 1
        h = np.ones(part.size, dtype=np.complex128)
        for s in stages:
            taps = np.asarray(s.taps, dtype=np.float64)
            if m > 1 and m <= max(1 << 16, 64 * part.size) and part.size > 8:
                grid = signal.zoom_fft(taps, [lo, hi], m=m, fs=s.filter_rate_hz, endpoint=True)
                h *= grid[(part - lo).astype(np.int64)] / s.phases
            else:
                h *= response_at(taps, s.filter_rate_hz, part) / s.phases
        out[order[idx]] = h
    return out

