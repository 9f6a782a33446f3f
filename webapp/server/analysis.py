"""Figures the page plots, built from the core's results (no Flask here).

Conventions
-----------
* Every function returns plain dicts of lists and numbers; the views only serialise them.
* Responses are normalised to unit DC gain (0 dB); impulse-response times are in ms relative
  to the main peak; spectra are dB re full scale per Hz (the core's ``welch_spectrum``).
* Curves are cut down for plotting: responses and spectra keep the largest value of each bucket
  (:func:`webapp.dsp.spectrum.decimate_for_plot`, so stopband peaks survive); the passband
  close-up and the impulse response keep both extremes of each bucket (:func:`minmax_decimate`)
  so ripple troughs and negative lobes survive too.
* :class:`DesignCache` keeps designs and their views in memory (least recently used first out),
  so live edits of a slider that come back to an earlier value cost nothing.
"""

from collections import OrderedDict
from concurrent.futures import ThreadPoolExecutor
import hashlib
import json
import math
import os
import threading

import numpy as np

from webapp import media
from webapp.jsontools import jsonable
from webapp.dsp.design import design as design_filter, require_met
from webapp.dsp.errors import ParameterError
from webapp.dsp.loudness import integrated_loudness
from webapp.dsp.polyphase import convert
from webapp.dsp.spec import preset
from webapp.dsp.spectrum import (band_energy_db, db, decimate_for_plot, dense_response,
                                 welch_spectrum)
from webapp.dsp.stages import choose_plan, plan_options

__all__ = ["DesignCache", "design_key", "design_view", "mask_view", "verdict", "plans_view",
           "minmax_decimate", "spectra_view", "excerpt_plan", "make_renditions",
           "PLOT_POINTS", "SPECTRUM_WHOLE_MAX_S", "SPECTRUM_EXCERPTS", "SPECTRUM_EXCERPT_S",
           "PLAYBACK_PRESET", "RENDITION_MIN_S"]

PLOT_POINTS = 2000
IMPULSE_POINTS = 3000
GROUP_DELAY_POINTS = 400
DISPLAY_FLOOR_DB = -300.0
# Files up to this long are analysed whole; longer ones from evenly spread excerpts.
SPECTRUM_WHOLE_MAX_S = 30.0
SPECTRUM_EXCERPTS = 6
SPECTRUM_EXCERPT_S = 5.0
# Renditions for the listening area are brought to the playback rate at this preset.
PLAYBACK_PRESET = "archival_master"
RENDITION_MIN_S = 0.5
# Gated loudness needs at least one 400 ms block (ITU-R BS.1770-4).
_MARGIN_S = 0.1


def design_key(spec, fs_in, fs_out):
    """A stable text key of (spec, fs_in, fs_out) for the store."""
    text = json.dumps([spec.to_dict(), int(fs_in), int(fs_out)], sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()


def _r(values, decimals):
    """Rounded plain floats for JSON (fewer bytes on the wire)."""
    return np.round(np.asarray(values, dtype=np.float64), decimals).tolist()


def minmax_decimate(x, y, *, max_points):
    """Keep the smallest and the largest value of each bucket, in time order."""
    x = np.asarray(x)
    y = np.asarray(y)
    if x.size <= max_points:
        return x, y
    buckets = max(1, max_points // 2)
    edges = np.linspace(0, x.size, buckets + 1).astype(int)
    keep = []
    for a, b in zip(edges[:-1], edges[1:]):
        if b <= a:
            continue
        seg = y[a:b]
        i, j = a + int(np.argmin(seg)), a + int(np.argmax(seg))
        keep.extend(sorted({i, j}))
    keep = np.asarray(keep)
    return x[keep], y[keep]


# ---------------------------------------------------------------------------------------------
# designs

def mask_view(mask, *, span_hz, top_db=5.0):
    """The mask as plain edges and polygons in the (frequency, dB) plane of a response plot."""
    fp, fs, r, a = mask.passband_hz, mask.stopband_hz, mask.ripple_db, mask.attenuation_db
    span = max(span_hz, fs)
    return dict(
        passband_hz=fp, stopband_hz=fs, ripple_db=r, attenuation_db=a,
        fs_in=mask.fs_in, fs_out=mask.fs_out,
        lower_nyquist_hz=min(mask.fs_in, mask.fs_out) / 2.0,
        fs_in_nyquist_hz=mask.fs_in / 2.0, fs_out_nyquist_hz=mask.fs_out / 2.0,
        polygons=[
            dict(name="passband", kind="allowed", x_hz=[0.0, fp, fp, 0.0, 0.0],
                 y_db=[-r, -r, r, r, -r]),
            dict(name="transition", kind="transition", x_hz=[fp, fs, fs, fp, fp],
                 y_db=[-a, -a, top_db, top_db, -a]),
            dict(name="stopband", kind="forbidden", x_hz=[fs, span, span, fs, fs],
                 y_db=[-a, -a, top_db, top_db, -a]),
        ],
    )


def verdict(figures, mask):
    """Meets the mask or not, by how much, in words."""
    m = figures["measured"]
    ripple_margin = mask.ripple_db - m["passband_ripple_db"]
    att_margin = m["stopband_attenuation_db"] - mask.attenuation_db
    meets = bool(figures["meets_mask"])
    text = (f"ripple {m['passband_ripple_db']:.3g} dB (limit {mask.ripple_db:g}), rejection "
            f"{m['stopband_attenuation_db']:.1f} dB (needs {mask.attenuation_db:g})")
    interp = m.get("interpolation_error_db")
    if interp is not None:
        text += f", phase interpolation error {interp:.1f} dB"
    if meets:
        text = "meets the mask: " + text
    else:
        short = []
        if ripple_margin < 0:
            short.append(f"ripple over by {-ripple_margin:.3g} dB")
        if att_margin < 0:
            short.append(f"rejection short by {-att_margin:.1f} dB")
        if interp is not None and interp > -mask.attenuation_db:
            short.append("phase interpolation error above the stopband level")
        text = "does NOT meet the mask (" + ", ".join(short) + "): " + text
    return dict(meets_mask=meets, ripple_margin_db=ripple_margin,
                attenuation_margin_db=att_margin, text=text)


def _ring_span(h, threshold_db=-60.0):
    """First and last index where |h| is within ``threshold_db`` of its peak; the peak index."""
    mag = np.abs(h)
    peak = int(np.argmax(mag))
    above = np.flatnonzero(mag >= mag[peak] * 10 ** (threshold_db / 20.0))
    return int(above[0]), peak, int(above[-1])


def design_view(d):
    """Plot data of a single-stage :class:`~webapp.dsp.design.Design`.

    Returns a dict with ``figures``, ``verdict``, ``response``, ``passband``, ``mask``,
    ``impulse`` and ``group_delay`` (see API.md).
    """
    rate = float(d.filter_rate_hz)
    gain = float(d.phases)
    mask = d.mask
    figures = d.figures()
    span = min(rate / 2.0, float(max(mask.fs_in, mask.fs_out)))

    freqs, H = dense_response(d.taps, rate)
    mag_db = np.maximum(db(H) - 20 * math.log10(gain), DISPLAY_FLOOR_DB)
    sel = freqs <= span
    f_plot, m_plot = decimate_for_plot(freqs[sel], mag_db[sel], max_points=PLOT_POINTS)

    fp, fs = mask.passband_hz, mask.stopband_hz
    close_hi = min(fs, fp + 0.05 * (fs - fp))
    pb = freqs <= close_hi
    f_pb, m_pb = minmax_decimate(freqs[pb], mag_db[pb], max_points=PLOT_POINTS)

    # impulse response around the main peak, with the -60 dB ringing on both sides
    h = d.taps / gain
    first, peak, last = _ring_span(h)
    pre, post = peak - first, last - peak
    margin = max(8, int(0.02 * h.size))
    a = max(0, peak - int(1.2 * max(pre, post if d.phase == "linear" else 0)) - margin)
    b = min(h.size, peak + int(1.2 * post) + margin + 1)
    idx = np.arange(a, b)
    t_ms, amp = minmax_decimate((idx - peak) / rate * 1000.0, h[a:b], max_points=IMPULSE_POINTS)
    prering_ms = float(d.prering_ms)

    # group delay over the passband: exact constant for symmetric taps (linear phase,
    # Oppenheim & Schafer 1989 sec. 5.7); otherwise Re{FFT(n h) / FFT(h)}
    gd_f = np.linspace(0.0, fp, GROUP_DELAY_POINTS)
    if d.phase == "linear":
        gd_ms = np.full(gd_f.size, (d.taps.size - 1) / 2.0 / rate * 1000.0)
    else:
        nfft = 1 << int(math.ceil(math.log2(max(2 * d.taps.size, 1 << 16))))
        n = np.arange(d.taps.size)
        Hn = np.fft.rfft(n * d.taps, nfft)
        Hd = np.fft.rfft(d.taps, nfft)
        grid = np.arange(Hd.size) * (rate / nfft)
        k = grid <= fp
        gd = np.real(Hn[k] / Hd[k])
        gd_ms = np.interp(gd_f, grid[k], gd) / rate * 1000.0
    return dict(
        fs_in=mask.fs_in, fs_out=mask.fs_out, spec=d.spec.to_dict(), figures=figures,
        verdict=verdict(figures, mask),
        response=dict(freqs_hz=_r(f_plot, 4), magnitude_db=_r(m_plot, 4), span_hz=span,
                      rate_hz=rate),
        passband=dict(freqs_hz=_r(f_pb, 4), magnitude_db=_r(m_pb, 7), passband_hz=fp,
                      ripple_db=mask.ripple_db),
        mask=mask_view(mask, span_hz=span),
        impulse=dict(time_ms=_r(t_ms, 6), amplitude=_r(amp, 9), peak_ms=0.0,
                     prering_ms=prering_ms, prering_start_ms=-prering_ms,
                     window_ms=[float((a - peak) / rate * 1000.0),
                                float((b - 1 - peak) / rate * 1000.0)],
                     rate_hz=rate, numtaps=int(d.taps.size), phase=d.phase),
        group_delay=dict(freqs_hz=_r(gd_f, 2), delay_ms=_r(gd_ms, 6),
                         latency_ms=float(d.latency_ms)),
    )


def plans_view(spec, fs_in, fs_out, *, chosen_label=None):
    """The single stage and the verified multistage plans, side by side."""
    single, plans = plan_options(spec, fs_in, fs_out)
    keys = ("numtaps", "macs_per_output_sample", "mmac_per_second", "latency_ms", "meets_mask",
            "measured", "path", "method", "up", "down")
    return dict(single={k: single.figures()[k] for k in keys},
                options=[p.figures() for p in plans],
                chosen=chosen_label or "single")


class DesignCache:
    """Designs, their plot data, plans and audits kept in memory, least recently used out.

    Parameters
    ----------
    size : int
        Entries kept per kind.
    max_taps : int
        Designs are also evicted while the cached taps add up to more than this.
    """

    def __init__(self, *, size=24, max_taps=24_000_000):
        self.size = int(size)
        self.max_taps = int(max_taps)
        self._data = OrderedDict()
        self._weights = {}
        self._lock = threading.Lock()
        self._pending = {}
        self._executor = ThreadPoolExecutor(max_workers=2, thread_name_prefix="rateferry-design")

    def shutdown(self):
        self._executor.shutdown(wait=True, cancel_futures=True)

    def _memo(self, kind, key, compute, weight=lambda v: 0):
        k = (kind,) + key
        with self._lock:
            if k in self._data:
                self._data.move_to_end(k)
                return self._data[k], True
            lock = self._pending.setdefault(k, threading.Lock())
        with lock:
            with self._lock:
                if k in self._data:
                    self._data.move_to_end(k)
                    return self._data[k], True
            try:
                value = compute()
            finally:
                with self._lock:
                    self._pending.pop(k, None)
            with self._lock:
                self._data[k] = value
                self._weights[k] = weight(value)
                self._evict(kind)
        return value, False

    def _evict(self, kind):
        same = [k for k in self._data if k[0] == kind]
        while len(same) > self.size:
            old = same.pop(0)
            self._data.pop(old)
            self._weights.pop(old, None)
        while sum(self._weights.values()) > self.max_taps and len(self._weights) > 1:
            old = next(k for k in self._data if self._weights.get(k))
            self._data.pop(old)
            self._weights.pop(old, None)

    def design(self, spec, fs_in, fs_out):
        """The single-stage design (measured, maybe not meeting the mask)."""
        value, _ = self._memo("design", (spec, fs_in, fs_out),
                              lambda: design_filter(spec, fs_in, fs_out),
                              weight=lambda d: int(d.taps.size))
        return value

    def view(self, spec, fs_in, fs_out):
        """(design_view dict, cached?)."""
        return self._memo("view", (spec, fs_in, fs_out),
                          lambda: jsonable(design_view(self.design(spec, fs_in, fs_out))))

    def plans(self, spec, fs_in, fs_out):
        """(plans_view dict, cached?)."""
        def compute():
            label = None
            if spec.stages == "auto":
                chosen = self.route_plan(spec, fs_in, fs_out)
                label = getattr(chosen, "label", None)
            return jsonable(plans_view(spec, fs_in, fs_out, chosen_label=label))
        return self._memo("plans", (spec, fs_in, fs_out), compute)

    def plans_async(self, spec, fs_in, fs_out):
        """Start :meth:`plans` on a helper thread; returns a future of (dict, cached?)."""
        return self._executor.submit(self.plans, spec, fs_in, fs_out)

    def route_plan(self, spec, fs_in, fs_out):
        """What a conversion with ``spec`` runs (single design or multistage plan), unverified."""
        if spec.stages != "auto":
            return self.design(spec, fs_in, fs_out)
        value, _ = self._memo("route", (spec, fs_in, fs_out),
                              lambda: choose_plan(spec, fs_in, fs_out))
        return value

    def conversion_plan(self, spec, fs_in, fs_out):
        """The verified plan a conversion runs (as :func:`webapp.pipeline.plan_for`)."""
        plan = self.route_plan(spec, fs_in, fs_out)
        if getattr(plan, "stages", None) is None:
            return require_met(plan)
        if not plan.meets_mask:
            raise ParameterError("the multistage plan does not meet the mask", "stages")
        return plan

    def playback(self, fs_in, fs_out):
        """The archival-grade design that brings a rendition to the playback rate."""
        return self.conversion_plan(preset(PLAYBACK_PRESET), fs_in, fs_out)

    def memo(self, kind, key, compute):
        """Cache any other derived value (spectra, audits) under ``(kind,) + key``."""
        return self._memo(kind, key, compute)


# ---------------------------------------------------------------------------------------------
# spectra

def excerpt_plan(duration_s, *, start_s=None, length_s=None, max_length_s):
    """Which parts of a file the spectra look at: [(start_s, length_s), ...] and the mode."""
    if start_s is not None or length_s is not None:
        start = 0.0 if start_s is None else float(start_s)
        length = SPECTRUM_EXCERPT_S if length_s is None else float(length_s)
        _check_excerpt(start, length, duration_s, max_length_s)
        return "excerpt", [(start, min(length, duration_s - start))]
    if duration_s <= SPECTRUM_WHOLE_MAX_S:
        return "whole", [(0.0, duration_s)]
    step = (duration_s - SPECTRUM_EXCERPT_S) / (SPECTRUM_EXCERPTS - 1)
    return "excerpts", [(i * step, SPECTRUM_EXCERPT_S) for i in range(SPECTRUM_EXCERPTS)]


def _check_excerpt(start, length, duration_s, max_length_s, minimum_s=0.0):
    for value, name in ((start, "start_s"), (length, "length_s")):
        if not math.isfinite(value):
            raise ParameterError(f"{name} must be a finite number of seconds, got {value!r}",
                                 name)
    if start < 0 or start >= duration_s:
        raise ParameterError(f"start_s must lie inside the recording (0 to {duration_s:.3f} s), "
                             f"got {start:g}", "start_s")
    if length <= 0 or length < minimum_s or length > max_length_s:
        low = f"at least {minimum_s:g} s" if minimum_s > 0 else "more than 0 s"
        raise ParameterError(f"length_s must be {low} and at most "
                             f"{max_length_s:g} s, got {length:g}", "length_s")


def _read(path, start_frame, frames):
    """frames x channels from ``path`` (short at the end of the file)."""
    blocks = list(media.read_blocks(path, start=int(start_frame), frames=int(frames)))
    return np.concatenate(blocks, axis=0) if blocks else None


def _padded_convert(path, rate, channels, total_frames, start_s, length_s, plan):
    """Convert one excerpt with a margin on both sides, so the converter's start-up and
    ring-out stay outside; returns the output frames of [start_s, start_s + length_s)."""
    margin = int(math.ceil(_MARGIN_S * rate))
    a = int(round(start_s * rate))
    n = int(round(length_s * rate))
    a0 = max(0, a - margin)
    x = _read(path, a0, min(total_frames - a0, n + (a - a0) + margin))
    y = convert(x, plan)
    fs_out = plan.fs_out
    # output frame k sits at input time k / fs_out from a0 (the converter removes its delay)
    skip = int(round((a - a0) * fs_out / rate))
    count = int(round(n * fs_out / rate))
    return x[a - a0:a - a0 + n], y[skip:skip + count]


def spectra_view(path, probe, plan, *, start_s=None, length_s=None, log_axis=False,
                 max_length_s=60.0):
    """Source and target spectra, both Nyquist limits, the mask and the energy above the
    target Nyquist (see API.md)."""
    fs_in, fs_out = probe.rate_hz, plan.fs_out
    mode, parts = excerpt_plan(probe.duration_s, start_s=start_s, length_s=length_s,
                               max_length_s=max_length_s)
    src_acc = tgt_acc = None
    weight_total = 0.0
    f_src = f_tgt = None
    # the same bin width at both rates, so a tone peaks at the same density in both curves
    n_src = 8192 if fs_in <= 50000 else 16384
    n_tgt = max(16, int(round(n_src * fs_out / fs_in)))
    for s, l in parts:
        x, y = _padded_convert(path, fs_in, probe.channels, probe.frames, s, l, plan)
        f_src, p_src = welch_spectrum(x, fs_in, nperseg=n_src)
        f_tgt, p_tgt = welch_spectrum(y, fs_out, nperseg=n_tgt)
        w = float(x.shape[0])
        if src_acc is None:
            src_acc, tgt_acc = np.zeros_like(p_src), np.zeros_like(p_tgt)
        if p_src.shape != src_acc.shape or p_tgt.shape != tgt_acc.shape:
            continue  # a short last excerpt with a coarser grid: leave it out of the average
        src_acc += w * 10 ** (p_src / 10)
        tgt_acc += w * 10 ** (p_tgt / 10)
        weight_total += w
    p_src = 10 * np.log10(np.maximum(src_acc / weight_total, 1e-30))
    p_tgt = 10 * np.log10(np.maximum(tgt_acc / weight_total, 1e-30))

    mask = plan.mask
    above = dict(from_hz=fs_out / 2.0, to_hz=fs_in / 2.0, applies=fs_out < fs_in,
                 source_db=None, after_filter_db=None)
    if fs_out < fs_in:
        above["source_db"] = float(band_energy_db(f_src, p_src, fs_out / 2.0, fs_in / 2.0))
        H2 = _power_response(plan, f_src)
        power = 10 ** (p_src / 10)
        band = f_src >= fs_out / 2.0
        left = float(np.sum(power[band] * H2[band]))
        above["after_filter_db"] = (10 * math.log10(max(left / float(np.sum(power)), 1e-30)))
    fs_p, ps_p = decimate_for_plot(f_src, p_src, max_points=PLOT_POINTS, log_axis=log_axis)
    ft_p, pt_p = decimate_for_plot(f_tgt, p_tgt, max_points=PLOT_POINTS, log_axis=log_axis)
    seconds = float(sum(l for _, l in parts))
    return dict(
        source=dict(freqs_hz=_r(fs_p, 2), psd_db=_r(ps_p, 3), rate_hz=fs_in,
                    nyquist_hz=fs_in / 2.0),
        target=dict(freqs_hz=_r(ft_p, 2), psd_db=_r(pt_p, 3), rate_hz=fs_out,
                    nyquist_hz=fs_out / 2.0),
        analysis=dict(mode=mode, excerpts=[[float(s), float(l)] for s, l in parts],
                      seconds_analysed=seconds,
                      resolution_hz=float(f_src[1] - f_src[0]) if f_src.size > 1 else None,
                      window="hann", overlap=0.5),
        mask=mask_view(mask, span_hz=max(fs_in, fs_out) / 2.0),
        above_target_nyquist=above,
    )


def _power_response(plan, freqs_hz):
    """|H(f)|^2 of a design or a cascade at ``freqs_hz`` (unit DC gain)."""
    stages = getattr(plan, "stages", None) or (plan,)
    out = np.ones(np.asarray(freqs_hz).size)
    for s in stages:
        f, H = dense_response(s.taps, s.filter_rate_hz)
        mag = np.abs(H) / s.phases
        # each stage's response repeats with its filter rate; fold the query into 0..rate/2
        q = np.mod(freqs_hz, s.filter_rate_hz)
        q = np.where(q > s.filter_rate_hz / 2, s.filter_rate_hz - q, q)
        out *= np.interp(q, f, mag) ** 2
    return out


# ---------------------------------------------------------------------------------------------
# listening renditions

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


def make_renditions(*, source_path, probe, converted, start_s, length_s, rate_hz, cache,
                    folder, rendition_id, sample_format="float32", max_length_s=60.0):
    """Write the original, converted and difference excerpts as WAV files at ``rate_hz``.

    Parameters
    ----------
    source_path : str
    probe : media.Probe of the source
    converted : dict
        Either ``{"path": output file, "plan": design}`` (a finished conversion) or
        ``{"plan": design}`` (convert the excerpt now with the same design).
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
    fs_in = probe.rate_hz
    plan = converted["plan"]
    fs_out = plan.fs_out
    channels = probe.channels
    _check_excerpt(float(start_s), float(length_s), probe.duration_s, max_length_s,
                   minimum_s=RENDITION_MIN_S)
    g = _grid_hz(fs_in, fs_out, rate_hz)
    snapped = g >= 10
    if not snapped:
        g = fs_in
    start_u = int(round(start_s * g))
    total_u = probe.frames * g // fs_in
    length_u = min(int(round(length_s * g)), total_u - start_u)
    if length_u <= 0:
        raise ParameterError(f"start_s must lie inside the recording, got {start_s:g}", "start_s")
    margin_u = int(math.ceil(_MARGIN_S * g))
    s0_u = max(0, start_u - margin_u)
    e0_u = min(total_u, start_u + length_u + margin_u)

    def frames(u, rate):
        return u * rate // g

    # original at fs_in, covering [s0, e0)
    orig = _read(source_path, frames(s0_u, fs_in), frames(e0_u - s0_u, fs_in))
    # converted at fs_out, covering the same source times. A minimum-phase design keeps its
    # delay: the converted audio is taken that much later, rounded to a sample at the playback
    # rate (the finer grid of the two when it is the higher rate)
    phase = getattr(plan, "phase", "linear")
    latency_ms = float(plan.latency_ms) if phase == "minimum" else 0.0
    shift = int(round(latency_ms / 1000.0 * rate_hz))
    extra = int(math.ceil(latency_ms / 1000.0 * fs_out)) + 1 if shift else 0
    span = frames(e0_u - s0_u, fs_out) + extra
    if "path" in converted:
        out_frames = media.probe(converted["path"]).frames
        a = frames(s0_u, fs_out)
        count = min(span, max(0, out_frames - a))
        conv = _read(converted["path"], a, count) if count > 0 else None
    else:
        # convert the same stretch of the source (longer by the latency when there is one)
        need = -(-span * fs_in // fs_out) + 1
        src = orig if not extra else _read(source_path, frames(s0_u, fs_in), need)
        conv = convert(src, plan)
    conv = _fit(conv, span, channels)

    n = frames(length_u, rate_hz)
    lead = frames(start_u - s0_u, rate_hz)
    orig_r = _fit(_to_rate(orig, fs_in, rate_hz, cache)[lead:], n, channels)
    conv_r = _fit(_to_rate(conv, fs_out, rate_hz, cache)[lead + shift:], n, channels)

    l_orig, l_conv = _loudness_or_none(orig_r, rate_hz), _loudness_or_none(conv_r, rate_hz)
    if l_orig is not None and l_conv is not None:
        method, target = "integrated_loudness", min(l_orig, l_conv)
        g_orig, g_conv = target - l_orig, target - l_conv
    else:
        r_orig, r_conv = _rms_db(orig_r), _rms_db(conv_r)
        if r_orig is not None and r_conv is not None:
            method, target = "rms", min(r_orig, r_conv)
            g_orig, g_conv = target - r_orig, target - r_conv
        else:
            method, target, g_orig, g_conv = "none", None, 0.0, 0.0
    orig_m = orig_r * 10 ** (g_orig / 20)
    conv_m = conv_r * 10 ** (g_conv / 20)
    diff = conv_m - orig_m

    rms_diff, rms_orig, peak_diff = _rms_db(diff), _rms_db(orig_m), _peak_db(diff)
    level = None if rms_diff is None or rms_orig is None else rms_diff - rms_orig
    bits = "32f" if sample_format == "float32" else "24"
    paths = {}
    for kind, data in (("original", orig_m), ("converted", conv_m), ("difference", diff)):
        path = os.path.join(folder, f"{rendition_id}_{kind}.wav")
        out_plan = media.output_plan(path, rate_hz=rate_hz, channels=channels, bits=bits)
        with media.AtomicWriter(path, out_plan) as w:
            w.write(data.astype(np.float32 if bits == "32f" else np.float64))
        paths[kind] = path
    boost = None if peak_diff is None else -peak_diff
    quiet = level is None or level < -20.0
    caution_text = ("Hearing caution: the difference is "
                    + (f"{-level:.0f} dB below the original" if level is not None else "silent")
                    + ". Boosting it to hear it also boosts any sudden loud part; start with "
                    "the volume low and raise it slowly." if quiet else
                    "Hearing caution: the difference is loud; keep the volume low.")
    if phase == "minimum":
        align_text = (f"minimum phase: the converted audio was moved {shift} samples "
                      f"({shift / rate_hz * 1000:.3f} ms) earlier to undo the filter's latency of "
                      f"{latency_ms:.3f} ms (its passband group delay); the group delay varies "
                      f"with frequency, so phase differences remain")
    else:
        align_text = "the converter removes its own delay (linear phase); no shift needed"
    figures = dict(
        rate_hz=int(rate_hz), start_s=start_u / g, length_s=length_u / g, frames=int(n),
        requested_start_s=float(start_s), sample_format=sample_format,
        snapped_to_hz=g if snapped else None,
        alignment=dict(phase=phase, shift_samples=shift, shift_rate_hz=int(rate_hz),
                       shift_ms=shift / rate_hz * 1000.0,
                       latency_ms=latency_ms, text=align_text),
        level_match=dict(method=method, target=target,
                         unit="LUFS" if method == "integrated_loudness" else "dBFS"),
        original=dict(source_rate_hz=fs_in, resampled_for_playback=fs_in != rate_hz,
                      integrated_lufs=l_orig, gain_db=g_orig),
        converted=dict(source_rate_hz=fs_out, resampled_for_playback=fs_out != rate_hz,
                       integrated_lufs=l_conv, gain_db=g_conv,
                       from_output_file="path" in converted),
        difference=dict(rms_dbfs=rms_diff, level_db=level, peak_dbfs=peak_diff,
                        max_boost_db=boost, caution=True, caution_text=caution_text),
        playback_preset=PLAYBACK_PRESET,
    )
    return figures, paths
