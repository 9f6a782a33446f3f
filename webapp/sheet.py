"""Design sheets: one self-contained HTML file that records a conversion (its recipe inside).

A design sheet is the record a producer sends to a
colleague: what was done to a recording, why it is safe, with the plots and the recipe inside.

Conventions
-----------
* The sheet makes no external request: plotly.js comes inlined from the installed plotly
  package, the data sits in ``<script type="application/json">`` elements, a short inline
  script draws the plots (it and the stylesheet are package data in ``sheet_assets/``; the
  plots themselves are built in :mod:`webapp.sheet_plots`), and a Content-Security-Policy
  (``default-src 'none'``) makes the browser refuse any fetch, image or font from elsewhere.
  All user text goes through ``html.escape``; JSON in the page has ``<``, ``>`` and ``&``
  written as ``\\u003c`` etc.
* Plotted curves are bounded (about 1500 points each; the impulse 3000): responses keep the
  peak of each band (the worst case against the mask shows) plus the exact band edges; long
  curves keep the min and max of each bucket. The sheet stays near 5.1 MB, of which plotly.js
  is 4.8 MB (budget :data:`SHEET_BUDGET_BYTES`). Spectra come from the middle
  ``webapp.figures.SPECTRUM_EXCERPT_S`` seconds of source and output.
* Files are written atomically (:func:`webapp.recipe.write_json_atomic`).
"""

import math
import re

from . import sheet_delivery
from .jsontools import jsonable
from .recipe import recipe_file_name, recipe_from_result, write_json_atomic
from . import sheet_plots
from .sheet_markup import (CSP as _CSP, asset as _asset, cell as _cell, dump_json as _dump_json,
                           esc as _esc, fmt as _fmt, json_script as _json_script,
                           plot_div as _plot_div, plotly_js as _plotly_js, table as _table,
                           verdict_table as _verdict_table)
from .sheet_plots import axis_label
from .dsp.audit import audit as run_audit
from .dsp.errors import ParameterError, RateferryError

__all__ = ["SHEET_BUDGET_BYTES", "sheet_html", "write_sheet", "route_html", "design_html"]

#: The sheet must stay under this size (plotly.js alone is about 4.8 MB).
SHEET_BUDGET_BYTES = 6 * 1000 * 1000
# The bound on each plotted curve, kept under this name for the sheet's tests.
_CURVE_POINTS = sheet_plots.CURVE_POINTS


_TEXT_LIMITS = {"title": 200, "author": 200, "note": 10000}


# ============================================================================================
# the sheet: data

def _audit_figures(design, audit):
    """(figures dict or None, note)."""
    if audit is None:
        return None, "not run for this sheet"
    if audit == "auto":
        try:
            audit = run_audit(design)
        except RateferryError as exc:
            return None, f"the audit could not run: {exc.message}"
    if hasattr(audit, "figures"):
        audit = audit.figures()
    if not isinstance(audit, dict):
        raise ParameterError(f"audit must be an audit result, its figures (a dict), \"auto\" or "
                             f"None, got {type(audit).__name__}", "audit")
    return jsonable(audit), ""


def _without_curves(audit_figs):
    """The audit's figures for the page: everything but the raw curves, which can hold tens of
    thousands of points; the plots carry them, reduced
    (see :func:`webapp.sheet_plots.audit_plots`)."""
    if audit_figs is None:
        return None
    return {k: v for k, v in audit_figs.items() if k != "curves"}


def _blind_figures(blind):
    if blind is None:
        return None
    if not isinstance(blind, dict):
        raise ParameterError(f"blind must be a dict of blind-trial results or None, got "
                             f"{type(blind).__name__}", "blind")
    out = jsonable(dict(blind))
    trials, correct = out.get("trials"), out.get("correct")
    if out.get("p_value") is None and isinstance(trials, int) and isinstance(correct, int) \
            and 0 <= correct <= trials > 0:
        # one-sided binomial tail: P(at least `correct` of `trials` right by guessing, p = 1/2)
        out["p_value"] = math.fsum(math.comb(trials, k) for k in range(correct, trials + 1)) \
            / 2.0 ** trials
    return out


# ============================================================================================
# the sheet: markup

def _duration_text(seconds):
    m, s = divmod(float(seconds), 60.0)
    h, m = divmod(int(m), 60)
    clock = f"{h}:{m:02d}:{s:06.3f}" if h else f"{m}:{s:06.3f}"
    return f"{seconds:.3f} s ({clock})"


def _check_text(name, value):
    if value is None:
        return ""
    if not isinstance(value, str):
        raise ParameterError(f"{name} must be text, got {type(value).__name__}", name)
    limit = _TEXT_LIMITS[name]
    if len(value) > limit:
        raise ParameterError(f"{name} must be at most {limit} characters, got {len(value)}",
                             name)
    return value


def _design_rows(figs, design):
    rows = [("path", "path", figs.get("path")),
            ("method", "method", figs.get("method")),
            ("phase", "phase", figs.get("phase", design.spec.phase)),
            ("arithmetic", "arithmetic", figs.get("arithmetic", design.spec.arithmetic)),
            ("taps (prototype)", "numtaps", figs.get("numtaps"))]
    if "filter_rate_hz" in figs:
        rows.append(("filter rate", "filter_rate_hz", figs["filter_rate_hz"], "Hz"))
        rows.append(("phases", "phases", figs["phases"]))
        rows.append(("taps per phase", "taps_per_phase", figs["taps_per_phase"]))
        rows.append(("length estimate", "numtaps_estimate", figs["numtaps_estimate"]))
    rows += [("multiply-adds per output sample", "macs_per_output_sample",
              figs.get("macs_per_output_sample")),
             ("MMAC/s per channel", "mmac_per_second", figs.get("mmac_per_second")),
             ("latency", "latency_ms", figs.get("latency_ms"), "ms")]
    if "prering_ms" in figs:
        rows.append(("pre-ringing (above -60 dB)", "prering_ms", figs["prering_ms"], "ms"))
    return rows


def _verdict_rows(figs, mask):
    m = figs["measured"]
    rows = [("passband ripple", "measured.passband_ripple_db", m["passband_ripple_db"], "dB",
             f"at most {mask.ripple_db:g} dB", m["passband_ripple_db"] <= mask.ripple_db),
            ("stopband attenuation", "measured.stopband_attenuation_db",
             m["stopband_attenuation_db"], "dB", f"at least {mask.attenuation_db:g} dB",
             m["stopband_attenuation_db"] >= mask.attenuation_db)]
    if m.get("interpolation_error_db") is not None:
        rows.append(("phase interpolation error", "measured.interpolation_error_db",
                     m["interpolation_error_db"], "dB", f"at most {-mask.attenuation_db:g} dB",
                     m["interpolation_error_db"] <= -mask.attenuation_db))
    return rows


def _stage_table(design):
    out = ['<table class="stages"><thead><tr><th scope="col">stage</th><th scope="col">rates (Hz)'
           '</th><th scope="col">up/down</th><th scope="col">method</th><th scope="col">taps</th>'
           '<th scope="col">taps per phase</th><th scope="col">stopband edge</th>'
           '<th scope="col">ripple</th><th scope="col">attenuation</th></tr></thead><tbody>']
    for i, s in enumerate(design.stages):
        k = f"stages.{i}"
        m = s.measured
        stop_cell = _cell(k + ".measured.stopband_attenuation_db", m.stopband_attenuation_db,
                          unit="dB")
        out.append(
            f"<tr><th scope=\"row\">{i + 1}</th><td>{s.fs_in} &rarr; {s.fs_out}</td>"
            f"<td>{s.up}/{s.down}</td>{_cell(k + '.method', s.method)}"
            f"{_cell(k + '.numtaps', s.numtaps)}{_cell(k + '.taps_per_phase', s.taps_per_phase)}"
            f"{_cell(k + '.mask.stopband_hz', s.mask.stopband_hz, unit='Hz')}"
            f"{_cell(k + '.measured.passband_ripple_db', m.passband_ripple_db, unit='dB')}"
            f"{stop_cell}"
            "</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def _meters_rows(prefix, meters):
    return [("integrated loudness", f"{prefix}.integrated_lufs", meters.get("integrated_lufs"),
             "LUFS"),
            ("loudness range", f"{prefix}.loudness_range_lu", meters.get("loudness_range_lu"),
             "LU"),
            ("true peak", f"{prefix}.true_peak_dbtp", meters.get("true_peak_dbtp"), "dBTP"),
            ("sample peak", f"{prefix}.sample_peak_dbfs", meters.get("sample_peak_dbfs"),
             "dBFS")]


def _audit_section(audit_figs, audit_note, audit_plots):
    parts = ['<section class="sheet-section" id="audit"><h2>Artefact audit</h2>']
    if audit_figs is None:
        parts.append(f'<p class="reason">Audit: {_esc(audit_note)}.</p></section>')
        return "".join(parts)
    parts.append('<p class="reason">The converter itself was run on standard test signals; '
                 "the figures below are measured on its output, not predicted from the taps."
                 "</p>")
    verdict = audit_figs.get("verdict")
    if isinstance(verdict, list) and verdict:
        rows = []
        for i, row in enumerate(verdict):
            unit = row.get("unit") or ""
            limit = row.get("limit")
            rows.append((str(row.get("figure", "")), f"audit.verdict.{i}.measured",
                         row.get("measured"), unit,
                         "n/a" if limit is None else f"{limit:.5g} {unit}".strip(),
                         bool(row.get("passes")), str(row.get("rule") or "")))
        parts.append(_verdict_table(rows, rules=True))
    # the route facts are shown above already
    scalars = [(k, v) for k, v in audit_figs.items()
               if k not in ("verdict", "fs_in", "fs_out", "up", "down", "phase", "arithmetic")
               and (v is None or isinstance(v, (int, float, str, bool)))]
    if scalars:
        half = (len(scalars) + 1) // 2
        rows = [(axis_label(k), f"audit.{k}", v) for k, v in scalars]
        parts.append('<h3>Measured figures</h3><div class="columns"><div>'
                     f"{_table(rows[:half])}</div><div>{_table(rows[half:])}</div></div>")
    for plot_id, p in audit_plots.items():
        parts.append(_plot_div(plot_id, _esc(p["title"])))
    parts.append("</section>")
    return "".join(parts)


def _blind_section(blind):
    if blind is None:
        return ""
    first = [k for k in ("trials", "correct", "p_value") if k in blind]
    rest = [k for k in blind if k not in first]
    rows = [(k.replace("_", " "), f"blind.{k}", blind[k]) for k in first + rest
            if blind[k] is None or isinstance(blind[k], (int, float, str, bool))]
    text = ""
    p = blind.get("p_value")
    if isinstance(p, (int, float)) and not isinstance(p, bool):
        text = (f"<p class=\"reason\">p is the chance of at least this many right answers by "
                f"guessing alone (one-sided binomial, p = 1/2 per trial): {_fmt(p)}.</p>")
    return ('<section class="sheet-section" id="blind"><h2>Blind listening trials</h2>'
            f"{_table(rows)}{text}</section>")


def _head_html(result, *, title, author, note, created_text, source_name, output_name):
    meets = bool(result.plan.meets_mask)
    by = [f"Made {_esc(created_text)}"]
    if author:
        by.append(f'by <span class="author">{_esc(author)}</span>')
    h = [f'<header class="sheet-head"><h1>{_esc(title)}</h1>'
         f'<p class="byline">{" ".join(by)} with Rateferry {_esc(result.version)}</p>']
    if note:
        h.append(f'<p class="note">{_esc(note)}</p>')
    h.append(f'<p><span class="verdict-badge {"meets" if meets else "fails"}">'
             f'{"The filter meets its mask" if meets else "The filter does NOT meet its mask"}'
             f"</span> &nbsp;{_esc(source_name)}: {result.fs_in} Hz &rarr; {result.fs_out} Hz"
             "</p>")
    h.append('<p class="toolbar no-print"><button type="button" id="rf-print">Print or save as '
             f'PDF</button><button type="button" id="rf-save-recipe" data-name="'
             f'{_esc(recipe_file_name(output_name))}">Save the recipe</button></p></header>')
    return "".join(h)


def _source_html(result, source_name):
    probe = result.source_probe
    facts = _table([
        ("file", None, source_name),
        ("format", None, f"{probe.format} {probe.subtype}"),
        ("sample rate", "fs_in", result.fs_in, "Hz"),
        ("channels", "channels", result.channels),
        ("duration", None, probe.duration_s, "", _esc(_duration_text(probe.duration_s))),
        ("frames", "frames_in", result.frames_in),
    ])
    meters = _table(_meters_rows("source", result.source_meters)
                    + [("sha256", "source_sha256", result.source_sha256)])
    return ('<section class="sheet-section first" id="source"><h2>Source</h2>'
            f'<div class="columns"><div>{facts}</div><div>{meters}</div></div></section>')


def route_html(result, figs, prefix=""):
    """``result`` needs plan, spec, fs_in, fs_out; ``prefix`` keeps ids apart when a page
    shows several routes (the batch sheet)."""
    design, mask, spec = result.plan, result.plan.mask, result.spec
    edge_key = "mask.{}" if "mask" in figs else None   # a plan's figures carry no mask
    rows = [("route", None, f"{result.fs_in} Hz to {result.fs_out} Hz"),
            ("factors up/down (L/M)", None, f"{design.up}/{design.down}"),
            ("lower Nyquist frequency", None, min(result.fs_in, result.fs_out) / 2.0, "Hz"),
            ("passband edge", edge_key and edge_key.format("passband_hz"), mask.passband_hz,
             "Hz"),
            ("stopband edge", edge_key and edge_key.format("stopband_hz"), mask.stopband_hz,
             "Hz"),
            ("passband ripple limit", None, mask.ripple_db, "dB",
             f"&plusmn; {_fmt(mask.ripple_db, 'dB')}"),
            ("stopband attenuation limit", None, mask.attenuation_db, "dB"),
            ("aliases allowed in the transition band", None, spec.allow_transition_aliasing),
            ("phase asked for", None, spec.phase),
            ("method asked for", None, spec.method),
            ("stages asked for", None, spec.stages)]
    return (f'<section class="sheet-section" id="{prefix}route"><h2>Route and mask</h2>'
            f"{_table(rows)}</section>")


def design_html(result, figs, prefix=""):
    """The filter design section: the design's figures, its stages and its verdict against
    the mask (``prefix`` as for :func:`route_html`)."""
    design = result.plan
    h = [f'<section class="sheet-section" id="{prefix}design"><h2>Filter design and verdict'
         '</h2>']
    for reason in (figs.get("path_reason"), figs.get("method_reason")):
        if reason:
            h.append(f'<p class="reason">{_esc(reason)}.</p>')
    h.append(f'<div class="columns"><div>{_table(_design_rows(figs, design))}</div>'
             "<div><h3>Measured against the mask</h3>")
    h.append(_verdict_table(_verdict_rows(figs, design.mask)))
    h.append(_table([("worst stopband frequency", "measured.worst_stopband_hz",
                      figs["measured"].get("worst_stopband_hz"), "Hz"),
                     ("meets the mask", "meets_mask", bool(design.meets_mask))]))
    h.append("</div></div>")
    h.append(_plot_div(prefix + "response", "Response against the mask over the whole prototype range "
                       "(each point is the highest level of its band, so the worst case "
                       "shows), with both Nyquist limits."))
    h.append(_plot_div(prefix + "passband", "Passband close-up with the ripple limits (each point pair "
                       "is the lowest and highest level of its band)."))
    h.append(_plot_div(prefix + "impulse", "Impulse response; the shaded part before the peak is the "
                       "pre-ringing (taps above -60 dB of the peak)."))
    if design.multistage:
        rates = " → ".join(str(r) for r in design.rates)
        h.append(f"<h3>Multistage plan: {_esc(design.label)}</h3>"
                 f'<p class="reason">Rates {_esc(rates)} Hz; the cascade as a whole is '
                 "measured against the mask above.</p>")
        h.append(_stage_table(design))
    h.append("</section>")
    return "".join(h)


def _spectra_html(spectra, note):
    h = ['<section class="sheet-section" id="spectra"><h2>Source and output spectra</h2>']
    if spectra is not None:
        ex = spectra["excerpt"]
        h.append(_plot_div("spectra", f"Welch spectra (Hann window, 50 % overlap) of the same "
                           f"{ex['length_s']:.3g} s of source and output from "
                           f"{ex['start_s']:.3g} s, with both Nyquist limits."))
    else:
        h.append(f'<p class="reason">Spectra not available: {_esc(note)}.</p>')
    h.append("</section>")
    return "".join(h)


def _escaped(rows):
    """Rows whose shown text (the fifth item) is escaped, as :func:`_cell` expects."""
    return [row[:4] + (_esc(str(row[4])),) if len(row) > 4 else row for row in rows]


def _delivery_html(result, output_name, profile=None):
    delivery = result.delivery
    dith = delivery.dither if result.bits in ("16", "24") else "none (float or lossy output)"
    chain = _table([
        ("file", None, output_name),
        ("format", None, f"{result.output_format} {result.output_subtype}"),
        ("word length", "bits", result.bits, "", _esc(_word_text(result.bits))),
        ("dither", "delivery.dither", delivery.dither, "", _esc(dith)),
        ("dither seed", "delivery.dither_seed", delivery.dither_seed),
        ("true-peak ceiling", "delivery.ceiling_dbtp", delivery.ceiling_dbtp, "dBTP"),
        ("loudness target", "delivery.loudness_lufs", delivery.loudness_lufs, "LUFS"),
        ("gain applied", "gain_db", result.gain_db, "dB"),
        ("why", "gain_reason", result.gain_reason),
        ("passes", "passes", result.passes),
    ] + _escaped(sheet_delivery.chain_rows(result)))
    measured = _table([("sample rate", "fs_out", result.fs_out, "Hz"),
                       ("frames", "frames_out", result.frames_out)]
                      + _meters_rows("output", result.output_meters)
                      + [("clipped samples", "clipped_samples", result.clipped_samples),
                         ("sha256", "output_sha256", result.output_sha256)]
                      + _escaped(sheet_delivery.verification_rows(result)))
    sources = ("" if profile is None else
               '<h3>Destination and the source of each number</h3>'
               + _table(_escaped(sheet_delivery.profile_rows(profile, result))))
    return ('<section class="sheet-section" id="delivery"><h2>Delivery</h2>'
            f'<div class="columns"><div>{chain}</div><div>{measured}</div></div>{sources}'
            '</section>')


def _recipe_html(recipe, source_name, output_name):
    command = " ".join(_shell_word(w) for w in (source_name, output_name))
    return ('<section class="sheet-section" id="recipe"><h2>Recipe</h2>'
            '<p class="reason">Everything needed to reproduce the output bit for bit on the '
            "same machine and software version: save it as JSON and run "
            f"<code>rateferry convert {_esc(command)} --recipe "
            f"{_esc(_shell_word(recipe_file_name(output_name)))}</code>.</p>"
            f'<pre class="recipe">{_esc(_dump_json(recipe, indent=2))}</pre></section>')


def sheet_html(result, *, title=None, author=None, note=None, blind=None, audit="auto",
               block_frames=None, created=None, source_name=None, output_name=None,
               profile=None):
    """The design sheet of ``result`` as one self-contained HTML document (str).

    Parameters
    ----------
    result : pipeline.ConversionResult
    title, author, note : str, optional
        Free text from the user, shown escaped (at most 200, 200 and 10000 characters).
    blind : dict, optional
        Blind-trial results (``trials``, ``correct``, ``p_value``, ...); None leaves the
        section out. A missing ``p_value`` is computed (one-sided binomial tail).
    profile : webapp.profiles.Profile, optional
        The destination chosen: its numbers are listed with their sources.
    audit : "auto", AuditResult, dict or None, optional
        "auto" (the default) runs :func:`webapp.dsp.audit.audit` on the design; an
        AuditResult or its figures are shown as given; None skips the audit.
    block_frames, created, source_name, output_name : optional
        As :func:`recipe_from_result`, for the embedded recipe (the names show on the sheet
        too).

    Returns
    -------
    str

    Raises
    ------
    ParameterError
        For text that is not a string or too long, or a bad ``blind``/``audit`` value.
    """
    title = _check_text("title", title)
    author = _check_text("author", author)
    note = _check_text("note", note)
    blind_figs = _blind_figures(blind)
    recipe = recipe_from_result(result, block_frames=block_frames, created=created,
                                source_name=source_name, output_name=output_name)
    figs = jsonable(result.figures())
    source_name = recipe["source"]["name"]
    output_name = recipe["output"]["name"]
    title = title or f"Design sheet: {source_name}"
    created_text = recipe["created"].replace("T", " ").replace("Z", " UTC")

    plots = sheet_plots.response_plots(result)
    plots["impulse"] = sheet_plots.impulse_plot(result)
    spectra, spectra_note = sheet_plots.spectra_plot(result)
    if spectra is not None:
        plots["spectra"] = spectra
    audit_figs, audit_note = _audit_figures(result.plan, audit)
    audit_plots = ({} if audit_figs is None
                   else sheet_plots.audit_plots(audit_figs, result.plan.mask))
    plots.update(audit_plots)

    return "".join([
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">',
        f'<meta http-equiv="Content-Security-Policy" content="{_CSP}">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f'<meta name="generator" content="Rateferry {_esc(result.version)}">',
        f"<title>{_esc(title)}</title><style>\n{_asset('sheet.css')}</style></head><body><main>",
        _head_html(result, title=title, author=author, note=note, created_text=created_text,
                   source_name=source_name, output_name=output_name),
        _source_html(result, source_name),
        route_html(result, figs),
        design_html(result, figs),
        _spectra_html(spectra, spectra_note),
        _delivery_html(result, output_name, profile),
        _audit_section(audit_figs, audit_note, audit_plots),
        _blind_section(blind_figs),
        _recipe_html(recipe, source_name, output_name),
        f"<footer><p>Rateferry {_esc(result.version)} &middot; sheet made "
        f"{_esc(created_text)}</p></footer></main>",
        _json_script("rf-recipe", recipe),
        _json_script("rf-figures", figs),
        _json_script("rf-audit", _without_curves(audit_figs)),
        _json_script("rf-blind", blind_figs),
        _json_script("rf-plots", plots),
        f'<script id="rf-plotly">{_plotly_js()}</script>',
        f"<script>\n{_asset('sheet.js')}</script></body></html>\n",
    ])


def _word_text(bits):
    return {"16": "16-bit integer", "24": "24-bit integer", "32f": "32-bit float",
            "64f": "64-bit float", None: "none (lossy codec)"}.get(bits, str(bits))


def _shell_word(text):
    """Quote a file name for a POSIX shell when it holds anything but plain characters."""
    if re.fullmatch(r"[A-Za-z0-9._+-]+", text):
        return text
    return "'" + text.replace("'", "'\\''") + "'"


def write_sheet(result, path, *, title=None, author=None, note=None, blind=None, audit="auto",
                block_frames=None, created=None, source_name=None, output_name=None,
                profile=None):
    """Write the design sheet of ``result`` to ``path`` (atomically); return the path.

    See :func:`sheet_html` for the options.

    Raises
    ------
    ParameterError
        As :func:`sheet_html`, or when the file can't be written; the sheet is then not
        created and an existing file at ``path`` is left as it was.
    """
    text = sheet_html(result, title=title, author=author, note=note, blind=blind, audit=audit,
                      block_frames=block_frames, created=created, source_name=source_name,
                      output_name=output_name, profile=profile)
    return write_json_atomic(path, text, "sheet")
