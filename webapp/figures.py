"""Every plot's data, built from the core's results: the page's JSON and the design sheet use
these same builders (no Flask here).

Conventions
-----------
* Every function returns plain dicts of lists and numbers (or arrays for the sheet's own
  rounding); the views only serialise them.
* Responses are normalised to unit DC gain (0 dB); impulse-response times are in ms relative
  to the main peak; spectra are dB re full scale per Hz (the core's ``welch_spectrum``).
* Curves are cut down for plotting: responses and spectra keep the largest value of each bucket
  (:func:`peak_decimate`, so stopband peaks survive, with both end points kept); the passband
  close-up and the impulse response keep both extremes of each bucket (:func:`minmax_decimate`)
  so ripple troughs and negative lobes survive too.
* One palette (:data:`PALETTE`) for the page and the sheet: our own colours.
* A plan is a :class:`webapp.dsp.stages.Plan` (one or more stages); a single-stage
  :class:`~webapp.dsp.design.Design` is accepted wherever a plan is.
"""

import math

import numpy as np

from webapp import media
from webapp.dsp.errors import ParameterError
from webapp.dsp.polyphase import convert
from webapp.dsp.spectrum import band_energy_db, bucket_extreme, db, decimate_for_plot, \
    dense_response, response_at, smooth_length, welch_spectrum
from webapp.dsp.stages import as_plan, cascade_response, plan_options
from webapp.threads import one_blas_thread

__all__ = ["design_view", "mask_view", "verdict", "plans_view", "minmax_decimate",
           "peak_decimate", "spectra_view", "excerpt_plan", "check_excerpt", "read_frames",
           "plan_response", "response_grid", "response_with_edges", "passband_curve",
           "impulse_curve", "PALETTE", "PLOT_POINTS",
           "SPECTRUM_WHOLE_MAX_S", "SPECTRUM_EXCERPTS", "SPECTRUM_EXCERPT_S"]

PLOT_POINTS = 2000
IMPULSE_POINTS = 3000
GROUP_DELAY_POINTS = 400
DISPLAY_FLOOR_DB = -300.0
# Files up to this long are analysed whole; longer ones from evenly spread excerpts.
SPECTRUM_WHOLE_MAX_S = 30.0
SPECTRUM_EXCERPTS = 6
SPECTRUM_EXCERPT_S = 5.0
# Excerpts are converted with this margin on both sides, so start-up and ring-out stay outside.
MARGIN_S = 0.1
#: Our own palette: ink, a deep sea green for the filter, rust for the mask, slate for limits,
#: blue for the source and green for the output; the page's plots and the sheet both use it
#: (served to the page in GET /api/options).
PALETTE = {
    "ink": "#1f2a30", "muted": "#5b6770", "grid": "#e4e1da", "paper": "#ffffff",
    "plot": "#fbfaf7", "axis": "#b9b6ad", "filter": "#16697a", "mask": "#b4532a",
    "limit": "#5b6770", "source": "#4b5f8a", "output": "#2c8c5a",
    "prering": "rgba(180, 83, 42, 0.16)", "prering_text": "#8a4a20",
    "passband_fill": "rgba(44, 140, 90, 0.14)", "passband_line": "rgba(44, 120, 80, 0.7)",
    "transition_fill": "rgba(120, 120, 120, 0.12)", "transition_line": "rgba(120, 120, 120, 0.5)",
    "stopband_fill": "rgba(180, 83, 42, 0.12)", "alias_fill": "rgba(214, 150, 40, 0.40)",
    "filter_faint": "rgba(22, 105, 122, 0.45)", "source_faint": "rgba(75, 95, 138, 0.35)",
    "measured": "#7a4f96", "measured_faint": "rgba(122, 79, 150, 0.28)", "predicted": "#2b2b2b",
    "envelope": "rgba(75, 95, 138, 0.55)", "loudness": "#2c8c5a", "full_scale": "#b4332a",
    "over": "#d98a1e", "excerpt": "rgba(22, 105, 122, 0.14)", "label_bg": "rgba(255, 255, 255, 0.85)",
}


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
    keep = np.unique(np.concatenate([bucket_extreme(y, edges, largest=False),
                                     bucket_extreme(y, edges, largest=True)]))
    return x[keep], y[keep]


def peak_decimate(x, y, max_points, *, log_axis=False):
    """:func:`webapp.dsp.spectrum.decimate_for_plot` (the peak of each bucket), keeping both end
    points of the curve."""
    x = np.asarray(x)
    y = np.asarray(y)
    if x.size <= max_points:
        return x, y
    dx, dy = decimate_for_plot(x, y, max_points=max_points, log_axis=log_axis)
    inner = (dx > x[0]) & (dx < x[-1])
    return (np.concatenate([x[:1], dx[inner], x[-1:]]),
            np.concatenate([y[:1], dy[inner], y[-1:]]))


def response_grid(plan):
    """|H| (unit DC gain) on a uniform grid 0 .. filter rate / 2, and that rate. A multistage
    plan is one up L -> H_eq -> down M converter; H_eq is what the plan verifies."""
    plan = as_plan(plan)
    if plan.multistage:
        rate = float(plan.fs_in * plan.up)
        freqs, mag = cascade_response(plan.stages, rate)
        return freqs, mag, rate
    d = plan.design
    freqs, H = dense_response(d.taps, d.filter_rate_hz)
    return freqs, np.abs(H) / d.phases, float(d.filter_rate_hz)


def plan_response(plan, freqs_hz, *, exact=False):
    """|H(f)| (unit DC gain) of a plan at ``freqs_hz``: the product over its stages, each
    folded into its own 0 .. rate / 2. ``exact`` evaluates the taps at each frequency (for a
    few points, such as the band edges); otherwise a dense grid is interpolated."""
    freqs_hz = np.asarray(freqs_hz, dtype=np.float64)
    out = np.ones(freqs_hz.size)
    for s in as_plan(plan).stages:
        q = np.mod(freqs_hz, s.filter_rate_hz)
        q = np.where(q > s.filter_rate_hz / 2, s.filter_rate_hz - q, q)
        if exact:
            out *= np.abs(response_at(s.taps, s.filter_rate_hz, q)) / s.phases
        else:
            f, H = dense_response(s.taps, s.filter_rate_hz)
            out *= np.interp(q, f, np.abs(H) / s.phases)
    return out


def response_with_edges(plan):
    """(freqs, level dB, filter rate): the dense response plus the exact values at both band
    edges, so a plot shows what the verdict measured there."""
    plan = as_plan(plan)
    mask = plan.mask
    freqs, mag, rate = response_grid(plan)
    edge_f = np.asarray([mask.passband_hz, mask.stopband_hz])
    edge_mag = plan_response(plan, edge_f, exact=True)
    order = np.argsort(np.concatenate([freqs, edge_f]), kind="stable")
    return (np.concatenate([freqs, edge_f])[order],
            db(np.concatenate([mag, edge_mag]))[order], rate)


def passband_curve(plan, *, max_points=PLOT_POINTS, into_transition=0.25):
    """(freqs, level dB) of the passband close-up, to ``into_transition`` of the way into the
    transition band, min/max decimated (ripple troughs survive). The page and the sheet both
    plot this."""
    mask = as_plan(plan).mask
    freqs, level, _ = response_with_edges(plan)
    edge = mask.passband_hz + into_transition * (mask.stopband_hz - mask.passband_hz)
    band = freqs <= edge
    return minmax_decimate(freqs[band], level[band], max_points=max_points)


def impulse_curve(design, *, max_points=IMPULSE_POINTS, floor=None):
    """(time from the peak in ms, amplitude, first index, last index + 1, peak index) of one
    stage's impulse response (unit DC gain), min/max decimated.

    The window spans the -60 dB ringing on both sides with a margin, or with ``floor`` (a
    fraction of the peak) every tap above it."""
    rate = float(design.filter_rate_hz)
    h = np.asarray(design.taps, dtype=np.float64) / design.phases
    if floor is not None:
        peak = int(np.argmax(np.abs(h)))
        keep = np.nonzero(np.abs(h) >= np.abs(h[peak]) * floor)[0]
        a, b = int(keep[0]), int(keep[-1]) + 1
    else:
        first, peak, last = _ring_span(h)
        pre, post = peak - first, last - peak
        margin = max(8, int(0.02 * h.size))
        a = max(0, peak - int(1.2 * max(pre, post if design.phase == "linear" else 0)) - margin)
        b = min(h.size, peak + int(1.2 * post) + margin + 1)
    idx = np.arange(a, b)
    t_ms, amp = minmax_decimate((idx - peak) / rate * 1000.0, h[a:b], max_points=max_points)
    return t_ms, amp, a, b, peak


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
    """Plot data of a single-stage :class:`~webapp.dsp.design.Design` (or one-stage plan).

    Returns a dict with ``figures``, ``verdict``, ``response``, ``passband``, ``mask``,
    ``impulse`` and ``group_delay`` (see API.md).
    """
    d = as_plan(d).design
    rate = float(d.filter_rate_hz)
    gain = float(d.phases)
    mask = d.mask
    figures = d.figures()
    span = min(rate / 2.0, float(max(mask.fs_in, mask.fs_out)))

    freqs, H = dense_response(d.taps, rate)
    mag_db = np.maximum(db(H) - 20 * math.log10(gain), DISPLAY_FLOOR_DB)
    sel = freqs <= span
    f_plot, m_plot = decimate_for_plot(freqs[sel], mag_db[sel], max_points=PLOT_POINTS)

    fp = mask.passband_hz
    f_pb, m_pb = passband_curve(d)

    # impulse response around the main peak, with the -60 dB ringing on both sides
    t_ms, amp, a, b, peak = impulse_curve(d)
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



# ---------------------------------------------------------------------------------------------
# spectra

def excerpt_plan(duration_s, *, start_s=None, length_s=None, max_length_s):
    """Which parts of a file the spectra look at: [(start_s, length_s), ...] and the mode."""
    if start_s is not None or length_s is not None:
        start = 0.0 if start_s is None else float(start_s)
        length = SPECTRUM_EXCERPT_S if length_s is None else float(length_s)
        check_excerpt(start, length, duration_s, max_length_s)
        return "excerpt", [(start, min(length, duration_s - start))]
    if duration_s <= SPECTRUM_WHOLE_MAX_S:
        return "whole", [(0.0, duration_s)]
    step = (duration_s - SPECTRUM_EXCERPT_S) / (SPECTRUM_EXCERPTS - 1)
    return "excerpts", [(i * step, SPECTRUM_EXCERPT_S) for i in range(SPECTRUM_EXCERPTS)]


def check_excerpt(start, length, duration_s, max_length_s, minimum_s=0.0):
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


def read_frames(path, start_frame, frames):
    """frames x channels from ``path`` (short at the end of the file)."""
    blocks = list(media.read_blocks(path, start=int(start_frame), frames=int(frames)))
    return np.concatenate(blocks, axis=0) if blocks else None


def _padded_convert(path, rate, channels, total_frames, start_s, length_s, plan):
    """Convert one excerpt with a margin on both sides, so the converter's start-up and
    ring-out stay outside; returns the output frames of [start_s, start_s + length_s)."""
    margin = int(math.ceil(MARGIN_S * rate))
    a = int(round(start_s * rate))
    n = int(round(length_s * rate))
    a0 = max(0, a - margin)
    x = read_frames(path, a0, min(total_frames - a0, n + (a - a0) + margin))
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
    # the same bin width at both rates (to 0.1 %, a length the FFT takes in fast passes), so a
    # tone peaks at the same density in both curves
    n_src = 8192 if fs_in <= 50000 else 16384
    n_tgt = smooth_length(max(16, int(round(n_src * fs_out / fs_in))))
    # one BLAS thread, as in the pipeline: the converter's products gain nothing from more
    with one_blas_thread():
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
        H2 = plan_response(plan, f_src) ** 2
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
