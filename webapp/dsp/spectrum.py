"""Frequency responses of FIR filters and spectra of signals.

Conventions: frequencies in Hz with the rate explicit; responses are complex gains; levels in dB
are ``20 log10 |H|`` (responses) or ``10 log10`` of power densities (spectra).
"""

import hashlib
import threading

import numpy as np
from scipy import fft as sp_fft, signal

from .errors import ParameterError

__all__ = ["response_at", "dense_response", "welch_spectrum", "smooth_length", "db",
           "decimate_for_plot", "bucket_extreme", "band_energy_db"]

TINY = 1e-300
#: Segments per batch of FFTs in welch_spectrum (memory: this many times the segment length).
_WELCH_SEGMENTS = 64


def db(values):
    """20 log10 |values|, floored so that zeros give a finite -6000 dB."""
    return 20.0 * np.log10(np.maximum(np.abs(values), TINY))


def response_at(taps, rate_hz, freqs_hz):
    """Exact complex response of FIR ``taps`` (running at ``rate_hz``) at chosen frequencies.

    Costs len(taps) * len(freqs_hz) operations: for a few frequencies (band edges) or short filters.
    """
    taps = np.asarray(taps, dtype=np.float64)
    freqs = np.atleast_1d(np.asarray(freqs_hz, dtype=np.float64))
    n = np.arange(taps.size)
    out = np.empty(freqs.size, dtype=np.complex128)
    step = max(1, 2**22 // max(taps.size, 1))
    for i in range(0, freqs.size, step):
        w = 2 * np.pi * freqs[i:i + step, None] / rate_hz
        out[i:i + step] = np.exp(-1j * w * n[None, :]) @ taps
    return out


# The last few dense responses, keyed by the bytes of the taps: a design is measured once and
# then plotted (response, passband close-up) from the same grid without another large FFT.
_DENSE_KEPT = 2
_dense_memo = []
_dense_lock = threading.Lock()


def dense_response(taps, rate_hz, *, points_per_lobe=16, min_nfft=2**16, max_nfft=2**24):
    """Response on the uniform grid 0 .. rate/2 by one zero-padded real FFT.

    The grid holds about ``points_per_lobe`` points per sidelobe (the sidelobe period of an
    N-tap filter is rate/N), so peaks are sampled to within a small fraction of a dB.
    The last few results are kept (keyed by the taps' bytes) and returned read-only.

    Returns
    -------
    freqs_hz, H : ndarray
    """
    taps = np.ascontiguousarray(taps, dtype=np.float64)
    key = (hashlib.blake2b(taps.tobytes(), digest_size=16).digest(), taps.size,
           float(rate_hz), points_per_lobe, min_nfft, max_nfft)
    with _dense_lock:
        for k, value in _dense_memo:
            if k == key:
                return value
    value = _dense_response(taps, rate_hz, points_per_lobe, min_nfft, max_nfft)
    for a in value:
        a.flags.writeable = False
    with _dense_lock:
        _dense_memo.insert(0, (key, value))
        del _dense_memo[_DENSE_KEPT:]
    return value


def _dense_response(taps, rate_hz, points_per_lobe, min_nfft, max_nfft):
    nfft = 1 << int(np.ceil(np.log2(max(min_nfft, points_per_lobe * taps.size))))
    nfft = min(nfft, max_nfft)
    if taps.size > nfft:
        # fold the taps (time aliasing of the FFT grid) - exact on the grid
        pad = (-taps.size) % nfft
        taps = np.concatenate([taps, np.zeros(pad)]).reshape(-1, nfft).sum(axis=0)
    H = np.fft.rfft(taps, nfft)
    freqs = np.arange(H.size) * (rate_hz / nfft)
    return freqs, H


def welch_spectrum(x, rate_hz, *, resolution_hz=None, nperseg=None):
    """Welch power spectral density (Hann, 50 % overlap), averaged over channels.

    Parameters
    ----------
    x : ndarray, frames x channels (or 1-D)
    rate_hz : float
    resolution_hz : float, optional
        Target bin width; default about 5 Hz at 44.1/48 kHz (8192-point segments).
    nperseg : int, optional
        Segment length (instead of ``resolution_hz``); at most the length of ``x``.

    Returns
    -------
    freqs_hz, psd_db : ndarray
        PSD in dB relative to full scale per Hz (a full-scale sine's power is 0.5).

    Notes
    -----
    The figures of ``scipy.signal.welch(x, fs, window="hann", nperseg=nperseg, axis=0)``
    (periodic Hann window, constant detrend, one-sided density, mean of the segments), computed
    as batched real FFTs over strided segments, a few dozen at a time. Cost: an FFT per
    segment and channel, fastest when ``nperseg`` has no prime factor above 11 (see
    :func:`smooth_length`).
    """
    x = np.asarray(x, dtype=np.float64)
    if x.ndim == 1:
        x = x[:, None]
    if x.shape[0] == 0:
        raise ParameterError("x must hold at least one frame for a spectrum", "x")
    if nperseg is None:
        if resolution_hz is None:
            nperseg = 8192 if rate_hz <= 50000 else 16384
        else:
            nperseg = 1 << int(np.ceil(np.log2(rate_hz / resolution_hz)))
    nperseg = min(int(max(16, min(nperseg, x.shape[0]))), x.shape[0])
    step = nperseg - nperseg // 2
    count = (x.shape[0] - nperseg) // step + 1
    window = signal.get_window("hann", nperseg)
    power = np.zeros(nperseg // 2 + 1)
    for c in range(x.shape[1]):
        column = np.ascontiguousarray(x[:, c])
        for first in range(0, count, _WELCH_SEGMENTS):
            rows = min(_WELCH_SEGMENTS, count - first)
            segments = np.lib.stride_tricks.as_strided(
                column[first * step:], shape=(rows, nperseg),
                strides=(step * column.itemsize, column.itemsize), writeable=False)
            part = segments - segments.mean(axis=1, keepdims=True)
            part *= window
            spectrum = sp_fft.rfft(part, axis=1)
            power += (spectrum.real ** 2 + spectrum.imag ** 2).sum(axis=0)
    # one-sided density: every bin but DC (and Nyquist for an even length) twice
    power *= 2.0 / (rate_hz * np.sum(window * window) * count * x.shape[1])
    power[0] /= 2.0
    if nperseg % 2 == 0:
        power[-1] /= 2.0
    freqs = np.fft.rfftfreq(nperseg, 1.0 / rate_hz)
    return freqs, 10 * np.log10(np.maximum(power, 1e-30))


def smooth_length(n):
    """The length nearest ``n`` (the shorter on a tie) with no prime factor above 11: the FFT
    of such a length runs in fast radix passes (a large prime factor costs several times as
    much: 8916 = 4 x 3 x 743 takes five times as long as 8910 = 2 x 3^4 x 5 x 11)."""
    n = int(n)
    if n < 1:
        raise ParameterError(f"n must be a whole number from 1, got {n!r}", "n")
    for d in range(n):
        for m in (n - d, n + d):
            if m >= 1 and _is_smooth(m):
                return m
    return n


def _is_smooth(m):
    for p in (2, 3, 5, 7, 11):
        while m % p == 0:
            m //= p
    return m == 1


def band_energy_db(freqs_hz, psd_db, low_hz, high_hz):
    """Energy between two frequencies relative to the total, in dB (from a PSD in dB)."""
    p = 10 ** (np.asarray(psd_db) / 10)
    band = (freqs_hz >= low_hz) & (freqs_hz <= high_hz)
    total = p.sum()
    if total <= 0 or not band.any():
        return -np.inf
    return 10 * np.log10(max(p[band].sum() / total, 1e-30))


def decimate_for_plot(freqs, values, *, max_points=2000, log_axis=False):
    """Reduce a curve to at most ``max_points`` while keeping peaks (max of each bucket)."""
    freqs = np.asarray(freqs)
    values = np.asarray(values)
    if freqs.size <= max_points:
        return freqs, values
    if log_axis:
        lo = max(freqs[1] if freqs.size > 1 else 1.0, 1.0)
        edges = np.geomspace(lo, freqs[-1], max_points + 1)
    else:
        edges = np.linspace(freqs[0], freqs[-1], max_points + 1)
    idx = np.searchsorted(freqs, edges)
    idx[0], idx[-1] = 0, freqs.size      # the buckets cover every point, both ends included
    k = bucket_extreme(values, idx, largest=True)
    return freqs[k], values[k]


def bucket_extreme(values, edges, *, largest):
    """Index of the first largest (or smallest) value of each non-empty bucket
    ``values[edges[i]:edges[i + 1]]``, as ``np.argmax`` / ``np.argmin`` would pick it, in
    bucket order. ``edges`` rise from 0 to ``values.size``."""
    values = np.asarray(values)
    edges = np.asarray(edges, dtype=np.int64)
    starts = edges[:-1][edges[:-1] < edges[1:]]
    if starts.size == 0:
        return np.zeros(0, dtype=np.int64)
    if np.issubdtype(values.dtype, np.floating) and np.isnan(values).any():
        pick = np.argmax if largest else np.argmin
        stops = np.append(starts[1:], values.size)
        return np.asarray([a + int(pick(values[a:b])) for a, b in zip(starts, stops)],
                          dtype=np.int64)
    ufunc = np.maximum if largest else np.minimum
    best = ufunc.reduceat(values, starts)
    bucket = np.repeat(np.arange(starts.size), np.diff(np.append(starts, values.size)))
    hits = np.flatnonzero(values == best[bucket])
    _, first = np.unique(bucket[hits], return_index=True)
    return hits[first]
