"""The batch's record: a CSV and a JSON report, and one batch sheet (HTML, offline).

Every file gets one row (:data:`REPORT_FIELDS`): its state (``done``, ``skipped`` = done in an
earlier run with the same source and options, ``failed`` with the one-line message), the route,
loudness and true peak before and after, the gain, clipped samples, the conversion time, the
worker and both sha256 sums; ``use`` says how the options were applied (the batch's options, a
recipe as a template, or an exact recipe re-run).

The batch sheet follows the design sheet (:mod:`webapp.sheet`, whose pieces it reuses): the
shared design of each route with its plots and verdict, then the table of files; plotly.js is
inlined, the data sits in JSON script elements and a Content-Security-Policy forbids any fetch.
"""

import csv
import io
import os
import time

from .. import __version__
from ..jsontools import jsonable
from ..recipe import write_json_atomic
from .. import sheet as design_sheet
from .. import sheet_markup
from .. import sheet_plots

__all__ = ["REPORT_FIELDS", "REPORT_NAMES", "file_row", "write_reports", "batch_sheet_html"]

REPORT_NAMES = {"csv": "batch-report.csv", "json": "batch-report.json",
                "sheet": "batch-sheet.html"}
REPORT_FIELDS = (
    "output", "source", "state", "message", "use", "fs_in", "fs_out", "channels", "route",
    "duration_s", "source_integrated_lufs", "source_true_peak_dbtp", "output_integrated_lufs",
    "output_true_peak_dbtp", "gain_db", "clipped_samples", "seconds", "worker", "output_sha256",
    "source_sha256", "reproduces_recipe",
)
_esc = sheet_markup.esc


def _route_text(figs):
    return (f"{figs['fs_in']} -> {figs['fs_out']} Hz, {figs['up']}/{figs['down']}, "
            f"{figs['path']}, {figs['method']}")


def file_row(entry, *, state, figures=None, message=None, worker=None, task_s=None,
             reproduces_recipe=None):
    """The report row of one file (plain JSON types)."""
    job = entry.job
    row = dict.fromkeys(REPORT_FIELDS)
    row.update(output=entry.name, source=entry.item.source, state=state, message=message,
               use=entry.use, worker=worker, reproduces_recipe=reproduces_recipe)
    if job is not None:
        plan = jsonable(job.plan.figures())
        plan.update(fs_in=job.fs_in, fs_out=job.fs_out, up=job.plan.up, down=job.plan.down)
        row.update(fs_in=job.fs_in, fs_out=job.fs_out, channels=job.probe.channels,
                   route=_route_text(plan), duration_s=job.probe.duration_s)
    if figures:
        src, out = figures.get("source") or {}, figures.get("output") or {}
        row.update(source_integrated_lufs=src.get("integrated_lufs"),
                   source_true_peak_dbtp=src.get("true_peak_dbtp"),
                   output_integrated_lufs=out.get("integrated_lufs"),
                   output_true_peak_dbtp=out.get("true_peak_dbtp"),
                   gain_db=figures.get("gain_db"), clipped_samples=figures.get("clipped_samples"),
                   seconds=figures.get("seconds"), output_sha256=figures.get("output_sha256"),
                   source_sha256=figures.get("source_sha256"))
        if job is None:
            row.update(fs_in=figures.get("fs_in"), fs_out=figures.get("fs_out"),
                       channels=figures.get("channels"))
    row["task_s"] = task_s
    return jsonable(row)


def _counts(rows):
    out = {"done": 0, "skipped": 0, "failed": 0}
    for r in rows:
        out[r["state"]] += 1
    return out


def _csv_text(rows):
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=REPORT_FIELDS, extrasaction="ignore",
                            lineterminator="\n")
    writer.writeheader()
    for r in rows:
        writer.writerow({k: "" if r.get(k) is None else r[k] for k in REPORT_FIELDS})
    return buf.getvalue()


def _designs(plans):
    out = []
    for (spec_json, fs_in, fs_out), plan in plans.items():
        figs = jsonable(plan.figures())
        out.append(dict(fs_in=fs_in, fs_out=fs_out, spec=plan.spec.to_dict(),
                        up=plan.up, down=plan.down, path=figs.get("path"),
                        method=figs.get("method"), numtaps=figs.get("numtaps"),
                        meets_mask=bool(plan.meets_mask), measured=figs.get("measured")))
    return out


def write_reports(out_dir, rows, plans, *, cluster="", sheet=True, created=None):
    """Write the CSV, the JSON and (with ``sheet``) the batch sheet into ``out_dir``
    (atomically, replacing the previous run's); returns {kind: path}."""
    import json
    created = created or time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
    paths = {k: os.path.join(out_dir, name) for k, name in REPORT_NAMES.items()}
    data = dict(software=f"Rateferry {__version__}", created=created, cluster=cluster,
                counts=_counts(rows), designs=_designs(plans), files=rows)
    write_json_atomic(paths["csv"], _csv_text(rows), "report")
    write_json_atomic(paths["json"], json.dumps(jsonable(data), indent=2, allow_nan=False)
                      + "\n", "report")
    if sheet:
        write_json_atomic(paths["sheet"], batch_sheet_html(rows, plans, created=created,
                                                           cluster=cluster), "sheet")
    else:
        paths.pop("sheet")
    return paths


class _Route:
    """What the design sheet's route and design sections read from a result."""

    def __init__(self, plan):
        self.plan, self.spec = plan, plan.spec
        self.fs_in, self.fs_out = plan.fs_in, plan.fs_out


def _file_table(rows):
    cols = [("output", "output", ""), ("state", "state", ""), ("route", "route", ""),
            ("duration", "duration_s", "s"), ("source loudness", "source_integrated_lufs", "LUFS"),
            ("source true peak", "source_true_peak_dbtp", "dBTP"),
            ("output loudness", "output_integrated_lufs", "LUFS"),
            ("output true peak", "output_true_peak_dbtp", "dBTP"), ("gain", "gain_db", "dB"),
            ("clipped samples", "clipped_samples", ""), ("time", "seconds", "s"),
            ("output sha256", "output_sha256", "")]
    out = ['<table class="files"><thead><tr>'
           + "".join(f'<th scope="col">{_esc(c[0])}</th>' for c in cols) + "</tr></thead><tbody>"]
    for i, r in enumerate(rows):
        cells = []
        for _, key, unit in cols:
            if key == "state" and r.get("message"):
                cells.append(f'<td data-key="files.{i}.state" data-value="{_esc(r["state"])}">'
                             f'{_esc(r["state"])}<div class="reason">{_esc(r["message"])}</div>'
                             "</td>")
            else:
                cells.append(sheet_markup.cell(f"files.{i}.{key}", r.get(key), unit=unit))
        out.append(f'<tr class="{_esc(r["state"])}">{"".join(cells)}</tr>')
    out.append("</tbody></table>")
    return "".join(out)


_EXTRA_CSS = """
table.files { font-size: 12px; } table.files td.hash { max-width: 12em; }
tr.failed td { color: var(--bad); } tr.skipped td { color: var(--muted); }
"""


def batch_sheet_html(rows, plans, *, created, cluster=""):
    """The batch sheet (str): the shared designs and the table of files."""
    counts = _counts(rows)
    ok = counts["failed"] == 0
    title = f"Batch sheet: {len(rows)} file{'s' if len(rows) != 1 else ''}"
    created_text = created.replace("T", " ").replace("Z", " UTC")
    plots, sections = {}, []
    for i, plan in enumerate(plans.values()):
        prefix = f"r{i}-"
        route = _Route(plan)
        figs = jsonable(plan.figures())
        for name, p in sheet_plots.response_plots(route).items():
            plots[prefix + name] = p
        plots[prefix + "impulse"] = sheet_plots.impulse_plot(route)
        sections.append(f'<h2 class="route-title">Design {i + 1}: {plan.fs_in} Hz &rarr; '
                        f"{plan.fs_out} Hz</h2>")
        sections.append(design_sheet.route_html(route, figs, prefix))
        sections.append(design_sheet.design_html(route, figs, prefix))
    badge = ("every file is done" if ok else f"{counts['failed']} file"
             f"{'s' if counts['failed'] != 1 else ''} failed")
    head = (f'<header class="sheet-head"><h1>{_esc(title)}</h1><p class="byline">Made '
            f"{_esc(created_text)} with Rateferry {_esc(__version__)}"
            f"{(' on ' + _esc(cluster)) if cluster else ''}</p>"
            f'<p><span class="verdict-badge {"meets" if ok else "fails"}">{_esc(badge)}</span>'
            f" &nbsp;{counts['done']} converted, {counts['skipped']} already done, "
            f"{counts['failed']} failed; {len(plans)} design"
            f"{'s' if len(plans) != 1 else ''} shared by the files of their route</p>"
            '<p class="toolbar no-print"><button type="button" id="rf-print">Print or save as '
            "PDF</button></p></header>")
    table = ('<section class="sheet-section first" id="files"><h2>Files</h2>'
             f"{_file_table(rows)}</section>")
    return "".join([
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">',
        f'<meta http-equiv="Content-Security-Policy" content="{sheet_markup.CSP}">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f'<meta name="generator" content="Rateferry {_esc(__version__)}">',
        f"<title>{_esc(title)}</title>"
        f"<style>\n{sheet_markup.asset('sheet.css')}{_EXTRA_CSS}</style></head>"
        "<body><main>",
        head, table, *sections,
        f"<footer><p>Rateferry {_esc(__version__)} &middot; batch sheet made "
        f"{_esc(created_text)}</p></footer></main>",
        sheet_markup.json_script("rf-report", dict(counts=counts, files=rows)),
        sheet_markup.json_script("rf-plots", plots),
        f'<script id="rf-plotly">{sheet_markup.plotly_js()}</script>',
        f"<script>\n{sheet_markup.asset('sheet.js')}</script></body></html>\n",
    ])
