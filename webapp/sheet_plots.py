"""The design sheet's plots: plotly traces and layouts around the shared figure data of
:mod:`webapp.figures` (response, passband, impulse, decimation, palette).

Curves are bounded for the file's size: about :data:`CURVE_POINTS` points each (the impulse
3000), numbers rounded to 7 significant digits for frequencies and times, 6 for levels.
"""

import math

import numpy as np

from . import media
from .figures import (PALETTE, SPECTRUM_EXCERPT_S, impulse_curve, minmax_decimate,
                      passband_curve, peak_decimate, response_with_edges)
from .dsp.errors import RateferryError
from .dsp.spectrum import welch_spectrum

__all__ = ["CURVE_POINTS", "AUDIT_CAPTIONS", "axis_label", "response_plots", "impulse_plot",
           "spectra_plot", "audit_plots"]

CURVE_POINTS = 1500
_IMPULSE_POINTS = 3000
_IMPULSE_FLOOR = 1e-6          # the impulse plot spans taps above -120 dB of the peak
_FREQ_DIGITS = 7               # significant digits kept in plotted curves (size budget)
_LEVEL_DIGITS = 6


def _sig(values, digits):
    """Round to ``digits`` significant digits for the page (keeps the file small)."""
    out = []
    for v in np.asarray(values, dtype=np.float64).ravel():
        out.append(float(f"{v:.{digits}g}") if math.isfinite(v) else None)
    return out



_INK, _FILTER, _MASK = PALETTE["ink"], PALETTE["filter"], PALETTE["mask"]
_LIMIT, _SOURCE, _OUTPUT = PALETTE["limit"], PALETTE["source"], PALETTE["output"]
_PRERING = PALETTE["prering"]


def _line(x, y, name, color, *, dash=None, width=1.6):
    trace = {"type": "scatter", "mode": "lines", "x": x, "y": y, "name": name,
             "line": {"color": color, "width": width}, "hoverinfo": "x+y+name"}
    if dash:
        trace["line"]["dash"] = dash
    return trace


def _vline(x, label, color, dash="dot"):
    return {"type": "line", "xref": "x", "yref": "paper", "x0": x, "x1": x, "y0": 0, "y1": 1,
            "line": {"color": color, "width": 1.2, "dash": dash}, "label_text": label}


def _layout(xtitle, ytitle, *, xlog=False, xrange=None, yrange=None, shapes=(), notes=()):
    lay = {
        "margin": {"l": 64, "r": 18, "t": 12, "b": 52},
        "font": {"family": "system-ui, 'Segoe UI', Helvetica, Arial, sans-serif", "size": 12,
                 "color": _INK},
        "paper_bgcolor": PALETTE["paper"], "plot_bgcolor": PALETTE["plot"],
        "xaxis": {"title": {"text": xtitle}, "gridcolor": PALETTE["grid"], "zeroline": False},
        "yaxis": {"title": {"text": ytitle}, "gridcolor": PALETTE["grid"], "zeroline": False},
        "legend": {"orientation": "h", "y": -0.2, "x": 0},
        "showlegend": True,
        "shapes": [],
        "annotations": [],
    }
    if xlog:
        lay["xaxis"]["type"] = "log"
    if xrange is not None:
        lay["xaxis"]["range"] = list(xrange)
    if yrange is not None:
        lay["yaxis"]["range"] = list(yrange)
    for s in shapes:
        s = dict(s)
        text = s.pop("label_text", None)
        lay["shapes"].append(s)
        if text:
            lay["annotations"].append({"x": s["x0"], "y": 1, "xref": "x", "yref": "paper",
                                       "text": text, "showarrow": False, "xanchor": "left",
                                       "yanchor": "top", "font": {"size": 10, "color": _LIMIT},
                                       "textangle": -90})
    lay["annotations"].extend(notes)
    if xlog:
        # annotations on a log axis take log10 positions
        for a in lay["annotations"]:
            if a.get("xref") == "x" and a["x"] > 0:
                a["x"] = math.log10(a["x"])
    return lay


def _nyquist_shapes(result):
    a, b = result.fs_in / 2.0, result.fs_out / 2.0
    if a == b:
        return [_vline(a, f"Nyquist {a:g} Hz", _LIMIT)]
    return [_vline(a, f"source Nyquist {a:g} Hz", _SOURCE),
            _vline(b, f"target Nyquist {b:g} Hz", _OUTPUT)]


def response_plots(result):
    design = result.plan
    mask = design.mask
    freqs, level, rate = response_with_edges(design)
    top = rate / 2.0
    low = max(freqs[1], 1.0)
    # decimate each band on its own, so no bucket straddles an edge of the mask
    pieces = []
    bands = ((freqs > 0) & (freqs <= mask.passband_hz),
             (freqs > mask.passband_hz) & (freqs < mask.stopband_hz),
             freqs >= mask.stopband_hz)
    for sel, share in zip(bands, (0.4, 0.1, 0.5)):
        if sel.any():
            pieces.append(peak_decimate(freqs[sel], level[sel], int(CURVE_POINTS * share),
                                    log_axis=True))
    f_full = np.concatenate([p[0] for p in pieces])
    v_full = np.concatenate([p[1] for p in pieces])
    floor = -mask.attenuation_db - 40.0
    full = {
        "traces": [
            _line(_sig(f_full, _FREQ_DIGITS), _sig(np.maximum(v_full, floor - 20), _LEVEL_DIGITS),
                  "filter response (peak of each band)", _FILTER),
            _line([low, mask.passband_hz], [-mask.ripple_db, -mask.ripple_db],
                  "mask: passband", _MASK, dash="dash", width=2),
            _line([mask.stopband_hz, top], [-mask.attenuation_db, -mask.attenuation_db],
                  "mask: stopband", _MASK, width=2),
        ],
        "layout": _layout("frequency (Hz)", "gain (dB)", xlog=True,
                          xrange=[math.log10(low), math.log10(top)],
                          yrange=[floor, 10], shapes=_nyquist_shapes(result)),
    }
    # passband close-up: to a quarter of the way into the transition band
    f_pb, v_pb = passband_curve(design)
    edge = float(f_pb[-1])
    r = mask.ripple_db
    close = {
        "traces": [
            _line(_sig(f_pb, _FREQ_DIGITS), _sig(v_pb, _LEVEL_DIGITS), "filter response",
                  _FILTER),
            _line([0, mask.passband_hz], [r, r], "mask: +ripple", _MASK, dash="dash", width=2),
            _line([0, mask.passband_hz], [-r, -r], "mask: -ripple", _MASK, dash="dash",
                  width=2),
        ],
        "layout": _layout("frequency (Hz)", "gain (dB)", xrange=[0, edge],
                          yrange=[-3 * r, 3 * r],
                          shapes=[_vline(mask.passband_hz,
                                         f"passband edge {mask.passband_hz:g} Hz", _MASK)]),
    }
    return {"response": full, "passband": close}


def _impulse_trace(design, name, color):
    t, v, _, _, _ = impulse_curve(design, max_points=_IMPULSE_POINTS, floor=_IMPULSE_FLOOR)
    return _line(_sig(t, _FREQ_DIGITS), _sig(v, _LEVEL_DIGITS), name, color, width=1.2)


def impulse_plot(result):
    plan = result.plan
    colours = [_FILTER, _SOURCE, _OUTPUT, _INK]
    traces, shapes, notes = [], [], []
    for i, d in enumerate(plan.stages):
        name = f"stage {i + 1} ({d.up}/{d.down})" if plan.multistage else "impulse response"
        traces.append(_impulse_trace(d, name, colours[i % len(colours)]))
        if d.prering_ms > 0:
            shapes.append({"type": "rect", "xref": "x", "yref": "paper", "x0": -d.prering_ms,
                           "x1": 0, "y0": 0, "y1": 1, "fillcolor": _PRERING, "line":
                           {"width": 0}, "layer": "below"})
            notes.append({"x": -d.prering_ms, "y": 0.98 - 0.08 * i, "xref": "x", "yref": "paper",
                          "text": f"pre-ringing {d.prering_ms:.3g} ms" +
                          (f" (stage {i + 1})" if plan.multistage else ""),
                          "showarrow": False, "xanchor": "left",
                          "font": {"size": 10, "color": _MASK}})
    return {"traces": traces,
            "layout": _layout("time from the peak (ms)", "amplitude", shapes=shapes,
                              notes=notes)}


def spectra_plot(result):
    """Welch spectra of the same stretch of source and output, or None and the reason."""
    probe = result.source_probe
    length = min(SPECTRUM_EXCERPT_S, probe.duration_s)
    start = max(0.0, (probe.duration_s - length) / 2.0)
    try:
        src = media.read_excerpt(result.source_path, start_s=start, length_s=length)
        out = media.read_excerpt(result.output_path, start_s=start, length_s=length)
    except (RateferryError, OSError) as exc:
        return None, getattr(exc, "message", str(exc))
    f_in, p_in = welch_spectrum(src, result.fs_in)
    f_out, p_out = welch_spectrum(out, result.fs_out)
    f_in, p_in = peak_decimate(f_in, p_in, CURVE_POINTS)
    f_out, p_out = peak_decimate(f_out, p_out, CURVE_POINTS)
    mask = result.plan.mask
    top = max(result.fs_in, result.fs_out) / 2.0
    shapes = _nyquist_shapes(result) + [
        _vline(mask.passband_hz, f"passband edge {mask.passband_hz:g} Hz", _MASK, dash="dash")]
    plot = {
        "traces": [
            _line(_sig(f_in, _FREQ_DIGITS), _sig(p_in, _LEVEL_DIGITS),
                  f"source ({result.fs_in} Hz)", _SOURCE, width=1.3),
            _line(_sig(f_out, _FREQ_DIGITS), _sig(p_out, _LEVEL_DIGITS),
                  f"output ({result.fs_out} Hz)", _OUTPUT, width=1.3),
        ],
        "layout": _layout("frequency (Hz)", "power density (dB FS/Hz)", xrange=[0, top],
                          shapes=shapes),
        "excerpt": {"start_s": start, "length_s": length,
                    "nyquist_hz": [result.fs_in / 2.0, result.fs_out / 2.0]},
    }
    return plot, ""



AUDIT_CAPTIONS = {
    "deviation": "Passband deviation measured on the converter's output, beside the prediction "
                 "from the taps, with the ripple limits.",
    "alias": "Alias (downsampling) or image (upsampling) level against the input tone's "
             "frequency, relative to that tone, beside the prediction, with the stopband limit.",
    "impulse": "Impulse response measured at the converter's output (level relative to its "
               "peak).",
}


_LABELS = {"thd_n": "THD+N", "thd_n_limit": "THD+N limit", "prering": "pre-ringing",
           "prering_predicted": "pre-ringing predicted", "alignment_error_us":
           "alignment error (µs)", "audit_ms": "audit time (ms)", "freq": "frequency",
           "input": "input tone frequency"}


def axis_label(key):
    """"worst_alias_input_hz" -> "worst alias input (Hz)"; a few figures keep trade names."""
    if key in _LABELS:
        return _LABELS[key]
    for suffix, unit in (("_hz", "Hz"), ("_ms", "ms"), ("_dbfs", "dBFS"), ("_db", "dB")):
        if key.endswith(suffix):
            stem = key[:-len(suffix)]
            return f"{_LABELS.get(stem, stem.replace('_', ' '))} ({unit})"
    return key.replace("_", " ")


def _keep_index(y, max_points):
    """Indices that keep the shape of a long curve: the min and the max of each bucket."""
    idx = np.arange(y.size)
    return minmax_decimate(idx, np.where(np.isfinite(y), y, 0.0), max_points=max_points)[0]


def _as_floats(values):
    """A JSON list of numbers (None for a missing value) as a float array (nan)."""
    return np.array([np.nan if v is None else v for v in values], dtype=np.float64)


def audit_plots(figures, mask):
    """Plots of the audit's curves: per curve, the first *_hz / *_ms list against every
    *_db list of the same length (other lists, e.g. flags, are left out)."""
    plots = {}
    curves = figures.get("curves") if isinstance(figures, dict) else None
    if not isinstance(curves, dict):
        return plots
    colours = [_FILTER, _LIMIT, _SOURCE, _OUTPUT, _INK]
    for name, curve in curves.items():
        if not isinstance(curve, dict):
            continue
        lists = {k: v for k, v in curve.items() if isinstance(v, list) and len(v) > 0}
        xs = [k for k in lists if k.endswith(("_hz", "_ms"))]
        if not xs:
            continue
        xk = xs[0]
        ys = [k for k in lists if k.endswith("_db") and len(lists[k]) == len(lists[xk])]
        if not ys:
            continue
        # long curves (the measured impulse) keep their shape at a bounded size
        keep = _keep_index(_as_floats(lists[ys[0]]), CURVE_POINTS)
        x = _sig(_as_floats(lists[xk])[keep], _FREQ_DIGITS)
        traces = [dict(_line(x, _sig(_as_floats(lists[k])[keep], _LEVEL_DIGITS),
                             k.replace("_db", "").replace("_", " "),
                             colours[j % len(colours)], width=1.4),
                       mode="lines+markers" if len(x) <= 400 else "lines",
                       marker={"size": 3})
                  for j, k in enumerate(ys)]
        finite = [v for v in x if v is not None]
        if name == "alias" and finite:
            traces.append(_line([min(finite), max(finite)], [-mask.attenuation_db] * 2,
                                "mask: stopband", _MASK, width=2))
        if name == "deviation" and finite:
            for sign, label in ((1, "+ripple"), (-1, "-ripple")):
                traces.append(_line([min(finite), max(finite)], [sign * mask.ripple_db] * 2,
                                    f"mask: {label}", _MASK, dash="dash", width=2))
        caption = AUDIT_CAPTIONS.get(name, f"Audit curve: {name.replace('_', ' ')}.")
        yrange = [-(mask.attenuation_db + 80.0), 5.0] if name == "impulse" else None
        plots[f"audit-{name}"] = {"title": caption, "traces": traces,
                                  "layout": _layout(axis_label(xk), "level (dB)",
                                                    yrange=yrange)}
    return plots

