"""The sheets' HTML building blocks: escaping, figure cells and tables, inlined JSON, plotly.js
and the sheets' own stylesheet and script, and the policy that keeps a sheet self-contained.

Used by the design sheet (:mod:`webapp.sheet`) and the batch report
(:mod:`webapp.batch.report`). A figure cell carries its key and exact value as data
attributes (``data-key``, ``data-value``), so a test or a script can read what a cell shows.
"""

import functools
import html
from importlib import resources
import json
import math
import os
import re

import numpy as np

from .jsontools import jsonable
from .dsp.errors import ParameterError

__all__ = ["CSP", "dump_json", "esc", "fmt", "cell", "table", "verdict_table", "plot_div",
           "json_script", "plotly_js", "asset"]


def dump_json(obj, *, indent=None):
    if indent is None:
        return json.dumps(obj, allow_nan=False, separators=(",", ":"), ensure_ascii=False)
    return json.dumps(obj, allow_nan=False, indent=indent, ensure_ascii=False)


esc = functools.partial(html.escape, quote=True)


def fmt(value, unit="", digits=4):
    if value is None:
        return "n/a"
    if unit == "Hz":
        digits = max(digits, 7)
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        text = f"{int(value)}"
    elif isinstance(value, (float, np.floating)):
        v = float(value)
        if not math.isfinite(v):
            return "n/a"
        text = f"{v:.{digits}g}" if abs(v) < 1e6 else f"{v:.{digits + 3}g}"
    else:
        text = str(value)
    return esc(text + (f" {unit}" if unit else ""))


def cell(key, value, text=None, unit="", digits=4):
    shown = text if text is not None else fmt(value, unit, digits)
    if key is None:
        return f"<td>{shown}</td>"
    raw = esc(dump_json(jsonable(value)))
    cls = ' class="hash"' if key.endswith("sha256") else ""
    return f'<td{cls} data-key="{esc(key)}" data-value="{raw}">{shown}</td>'


def table(rows, cls="facts"):
    """rows: (label, key, value[, unit[, text]])."""
    out = [f'<table class="{cls}"><tbody>']
    for row in rows:
        label, key, value = row[:3]
        unit = row[3] if len(row) > 3 else ""
        text = row[4] if len(row) > 4 else None
        out.append(f"<tr><th scope=\"row\">{esc(label)}</th>{cell(key, value, text, unit)}"
                   "</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def verdict_table(rows, *, rules=False):
    """rows: (label, key, measured, unit, limit text, passes[, rule])."""
    head = ["figure", "measured", "limit", "result"] + (["where the limit comes from"]
                                                        if rules else [])
    out = ['<table class="verdict"><thead><tr>'
           + "".join(f'<th scope="col">{esc(h)}</th>' for h in head) + "</tr></thead><tbody>"]
    for row in rows:
        label, key, measured, unit, limit_text, passes = row[:6]
        out.append(f'<tr class="{"meets" if passes else "fails"}"><th scope="row">'
                   f"{esc(label)}</th>{cell(key, measured, unit=unit, digits=5)}"
                   f'<td>{esc(limit_text)}</td><td class="result">'
                   f"{'meets' if passes else 'FAILS'}</td>")
        if rules:
            out.append(f'<td class="rule">{esc(row[6] if len(row) > 6 else "")}</td>')
        out.append("</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def plot_div(plot_id, caption):
    return (f'<figure class="plot-figure"><div class="plot" id="plot-{esc(plot_id)}" '
            f'data-plot="{esc(plot_id)}"></div><figcaption>{caption}</figcaption></figure>')


def json_script(element_id, obj):
    text = dump_json(obj).replace("<", "\\u003c").replace(">", "\\u003e") \
        .replace("&", "\\u0026").replace("\u2028", "\\u2028").replace("\u2029", "\\u2029")
    return f'<script type="application/json" id="{element_id}">{text}</script>'


@functools.lru_cache(maxsize=1)
def plotly_js():
    import plotly
    path = os.path.join(os.path.dirname(plotly.__file__), "package_data", "plotly.min.js")
    try:
        with open(path, encoding="utf-8") as f:
            js = f.read()
    except OSError as exc:
        raise ParameterError(f"the design sheet needs plotly.js from the plotly package "
                             f"({path}): {exc.strerror}", "sheet") from None
    if re.search(r"</script|<!--", js, re.IGNORECASE):
        # an inline <script> ends at the first "</script"; this bundle can't be inlined as is
        raise ParameterError(f"{path} holds '</script' or '<!--' and can't be inlined",
                             "sheet")
    return js


@functools.lru_cache(maxsize=None)
def asset(name):
    """The text of ``webapp/sheet_assets/<name>``: the sheet's stylesheet (sheet.css) and the
    script that draws its plots and runs its buttons (sheet.js), inlined into every sheet."""
    path = resources.files(__package__) / "sheet_assets" / name
    try:
        return path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ParameterError(f"the design sheet needs {name} from the installed package "
                             f"({path}): {exc.strerror}", "sheet") from None


# The sheet's own script and style are inline, as is plotly.js: 'unsafe-inline' lets them run,
# and nothing else may load.
CSP = ("default-src 'none'; script-src 'unsafe-inline'; style-src 'unsafe-inline'; "
        "img-src data: blob:; font-src data:; connect-src 'none'; form-action 'none'; "
        "base-uri 'none'")
