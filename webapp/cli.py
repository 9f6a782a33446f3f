"""The `rateferry` command: design, convert, batch, drift, audit, plans, serve, clean.

Bad input ends with one line, ``rateferry: error: <rule and value>``, exit code 2, nothing written.
Every command takes ``--quiet`` (no progress and no detail: only the line that states the
result, such as "wrote ...") and ``--silent`` (not even that; the exit status and ``--json``
still speak). ``convert --json`` prints the report of :func:`webapp.report.convert_report`,
documented by ``webapp/schemas/convert-report.schema.json``.
"""

import argparse
import os
import sys

from . import __version__
from .dsp.dither import DITHERS
from .dsp.errors import RateferryError
from .cli_args import OneLineParser, number_arg, rate_arg, whole_arg
from .cli_shared import (Progress, add_delivery_options, add_rate_options, add_replace_option,
                         add_spec_options, common_options, db_text, delivery_from_args, detail,
                         fs_out_of, grouped, level_text, print_json, profile_of, say,
                         spec_from_args)
from .cli_batch import add_batch_parser
from .cli_drift import add_drift_parser

EXIT_BAD_INPUT = 2

# ---------------------------------------------------------------- commands

def cmd_design(args):
    from .dsp.stages import choose_plan
    spec = spec_from_args(args)
    d = choose_plan(spec, args.fs_in, args.fs_out)   # the single stage unless stages is auto
    if args.json:
        print_json(d.figures())
        return 0 if d.meets_mask else EXIT_BAD_INPUT
    m = d.measured
    detail(args, f"{d.fs_in} -> {d.fs_out} Hz: {d.up}/{d.down}, {d.path}, {d.method}")
    detail(args, f"  {grouped(d.numtaps)} taps, {d.macs_per_output_sample:.1f} multiply-adds "
                  f"per output sample, {d.mmac_per_second:.2f} MMAC/s per channel, latency "
                  f"{d.latency_ms:.3f} ms")
    detail(args, f"  measured ripple {m.passband_ripple_db:.3g} dB (limit "
                  f"{d.mask.ripple_db:g}), attenuation {m.stopband_attenuation_db:.1f} dB "
                  f"(needs {d.mask.attenuation_db:g})")
    say(args, f"{d.fs_in} -> {d.fs_out} Hz meets the mask: {'yes' if d.meets_mask else 'NO'}")
    return 0 if d.meets_mask else EXIT_BAD_INPUT


def _yes(flag):
    return "yes" if flag else "no"


def cmd_plans(args):
    from dataclasses import replace
    from .dsp.stages import choose_plan, plan_options
    spec = spec_from_args(args)
    single, plans = plan_options(spec, args.fs_in, args.fs_out)
    used = choose_plan(spec, args.fs_in, args.fs_out, single=single, plans=plans)
    auto = choose_plan(replace(spec, stages="auto"), args.fs_in, args.fs_out, single=single,
                       plans=plans)

    def name(plan):
        return plan.label if plan.multistage else "single stage"

    if args.json:
        print_json({"single": single.figures(), "plans": [p.figures() for p in plans],
                     "stages": spec.stages, "used": name(used), "auto_uses": name(auto)})
        return 0
    detail(args, f"{'single stage':>28}: {single.macs_per_output_sample:8.1f} MACs/output, "
                  f"{single.numtaps:7d} taps, meets the mask: {_yes(single.meets_mask)}")
    for p in plans:
        detail(args, f"{p.label:>28}: {p.macs_per_output_sample:8.1f} MACs/output, "
                      f"{p.numtaps:7d} taps, rates {' -> '.join(map(str, p.rates))}, "
                      f"meets the mask: {_yes(p.meets_mask)}")
    text = f"used with --stages {spec.stages}: {name(used)}"
    if spec.stages != "auto":
        text += f" (--stages auto would use {name(auto)})"
    say(args, text)
    return 0


def _prepare_convert(args):
    from . import jobs
    if args.recipe:
        from .recipe import load_recipe
        recipe = load_recipe(args.recipe)
        # the source is checked before any work: nothing is written for a wrong source
        return recipe, jobs.prepare_rerun(recipe, args.input, args.output)
    fs_out = fs_out_of(args)
    if fs_out is None and (args.speed or args.true_rate or args.profile):
        from .media import probe
        fs_out = probe(args.input).rate_hz     # a speed change (or such a profile) keeps the rate
    if fs_out is None:
        from .dsp.errors import ParameterError
        raise ParameterError("convert needs --to HZ (or --profile NAME, or --recipe FILE)",
                             "fs_out")
    return None, jobs.prepare(args.input, args.output, fs_out=fs_out,
                              spec=spec_from_args(args), delivery=delivery_from_args(args),
                              block_frames=args.block_frames, speed=args.speed,
                              true_rate_hz=args.true_rate, filter_same_rate=args.filter_same_rate)


def cmd_convert(args):
    from . import jobs, partials
    from .report import convert_report
    recipe, job = _prepare_convert(args)
    jobs.refuse_existing(args.output, replace_existing=args.replace)
    partials.sweep(os.path.dirname(os.path.abspath(args.output)))   # a crashed run's leftovers
    bar = Progress(os.path.basename(args.input),
                   enabled=not (args.quiet or args.silent or args.json))
    try:
        if recipe is not None:
            check = jobs.rerun(recipe, args.input, args.output, progress=bar, job=job)
            result = check.result
        else:
            check, result = None, jobs.run(job, progress=bar)
    except BaseException:
        bar.close(finished=False)
        raise
    bar.close()
    if args.write_recipe:
        from .recipe import write_recipe
        write_recipe(result, args.write_recipe)
    if args.sheet:
        from . import sheet
        sheet.write_sheet(result, args.sheet, title=args.title, author=args.author,
                          note=args.note, profile=None if args.recipe else profile_of(args))
    for warning in result.warnings:
        sys.stderr.write(f"rateferry: warning: {warning}\n")
    report = convert_report(result, rerun=check)
    if args.json:
        print_json(report)
    else:
        _print_convert(args, report)
    if check is not None and not check.reproduces:
        err = jobs.RecipeMismatch(check.differences)
        sys.stderr.write(f"rateferry: error: {err.message}; the output was kept for inspection\n")
        return jobs.EXIT_RECIPE_MISMATCH
    if result.delivery_met is False:
        notes = "; ".join(result.delivery_report.get("notes") or ()) or "see the report"
        sys.stderr.write(f"rateferry: delivery target NOT met: {notes}; the file was kept\n")
        return jobs.EXIT_DELIVERY_NOT_MET
    return 0


def _print_convert(args, r):
    src, out, dl, t = r["source"], r["output"], r["delivery"], r["timing"]
    say(args, f"wrote {args.output}: {grouped(out['frames'])} frames at {out['rate_hz']} Hz "
               f"({out['duration_s']:.2f} s), {out['subtype']}, gain {db_text(dl['gain_db'])} "
               f"({dl['gain_reason']}), true peak {db_text(out['true_peak_dbtp'], 'dBTP', 1)}, "
               f"{grouped(out['clipped_samples'])} clipped samples, in {t['seconds']:.2f} s")
    detail(args, f"  source {level_text(src['integrated_lufs'], 'LUFS')}, true peak "
                  f"{db_text(src['true_peak_dbtp'], 'dBTP', 1)}; output "
                  f"{level_text(out['integrated_lufs'], 'LUFS')}; design "
                  f"{grouped(r['design']['numtaps'])} taps ({r['design']['method']})")
    detail(args, _delivery_line(dl))
    if "recipe" in r and r["recipe"]["reproduces"]:
        say(args, "output is byte-identical to the recipe's (same sha256), and every recorded "
                   "figure was reproduced")


def _delivery_line(dl):
    """The delivery's verification in one line: loudness, true peak, limiter, passes."""
    parts = []
    meters = dl.get("verified") or {}
    if meters.get("integrated_lufs") is not None:
        parts.append(f"loudness {meters['integrated_lufs']:.2f} LUFS")
    if meters.get("true_peak_dbtp") is not None:
        parts.append(f"true peak {meters['true_peak_dbtp']:.2f} dBTP")
    lim = dl.get("limiter")
    if lim:
        parts.append(f"limiter: largest reduction {lim['max_gain_reduction_db']:.2f} dB, "
                     f"limiting {lim['limited_s']:.2f} s")
    parts.append(f"{dl.get('write_passes', 1)} write pass(es), verified on "
                 f"{dl.get('verified_on', 'the written samples')}")
    if not dl.get("filter_applied", True):
        parts.append("same rate: no filter")
    verdict = {True: "delivery met", False: "delivery NOT met", None: "nothing promised"}[
        dl.get("met")]
    return f"  {verdict}: " + ", ".join(parts)


def cmd_audit(args):
    from .dsp.audit import audit
    from .dsp.stages import choose_plan
    spec = spec_from_args(args)
    d = choose_plan(spec, args.fs_in, args.fs_out)
    result = audit(d, dither=args.dither, seed=args.seed)
    figs = result.figures()
    passes = figs.get("passes", True)
    if args.json:
        print_json(figs)
        return 0 if passes else EXIT_BAD_INPUT
    detail(args, f"{d.fs_in} -> {d.fs_out} Hz, measured on the converter's output:")
    for row in figs["verdict"]:
        mark = "ok  " if row["passes"] else "FAIL"
        unit = row.get("unit") or ""
        detail(args, f"  {mark} {row['figure']:>22}: {_num(row['measured'])} {unit} "
                      f"(limit {_num(row['limit'])} {unit})")
    detail(args, f"  THD+N {_num(figs['thd_n_db'])} dB, noise floor "
                  f"{_num(figs['noise_floor_dbfs'])} dBFS, group delay "
                  f"{_num(figs['group_delay_ms'])} ms")
    say(args, f"{d.fs_in} -> {d.fs_out} Hz: the converter "
               f"{'meets' if passes else 'does NOT meet'} the mask on its real output")
    return 0 if passes else EXIT_BAD_INPUT


def _num(v):
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:.4g}"
    return str(v)


def cmd_serve(args):
    from .server.run import serve
    return serve(host=args.host, port=args.port, open_browser=not args.no_browser,
                 debug=args.debug, instance_path=args.instance, announce=not args.silent)


def cmd_clean(args):
    from .store import clear_old
    removed = clear_old(args.instance, older_than_days=args.days)
    say(args, f"removed {removed} old file{'' if removed == 1 else 's'}")
    return 0


def _convert_options(p):
    p.add_argument("input")
    p.add_argument("output")
    p.add_argument("--to", dest="fs_out", type=rate_arg("--to"), help="target rate, Hz")
    add_spec_options(p)
    add_delivery_options(p)
    p.add_argument("--speed", default=None, metavar="P/Q",
                   help="change the speed by the exact factor P/Q: pitch and pace times P/Q, "
                        "duration times Q/P (pull-down 1000/1001, pull-up 1001/1000, 24/25, "
                        "25/24); the rate stays the source's unless --to is given")
    p.add_argument("--true-rate", dest="true_rate", default=None, metavar="HZ",
                   help="take the source at this true rate (N or N/D Hz) instead of the rate "
                        "its header states; the sound comes out as it was recorded")
    p.add_argument("--recipe", help="re-run a recipe (JSON); spec and delivery come from it")
    p.add_argument("--write-recipe", help="save the recipe of this conversion (JSON)")
    p.add_argument("--sheet", help="write a design sheet (self-contained HTML)")
    p.add_argument("--title", default=None, help="design sheet title")
    p.add_argument("--author", default=None, help="design sheet author")
    p.add_argument("--note", default=None, help="design sheet note")
    add_replace_option(p, "replace the output file if it exists (default: refuse)")
    p.add_argument("--json", action="store_true",
                   help="print the report as JSON (schema: webapp/schemas/"
                        "convert-report.schema.json)")


def build_parser():
    ap = OneLineParser(prog="rateferry",
                       description="Sample-rate conversion with a verified filter.")
    ap.add_argument("--version", action="version", version=f"rateferry {__version__}")
    sub = ap.add_subparsers(dest="command", required=True)
    common = [common_options()]

    p = sub.add_parser("design", parents=common, help="design and measure the filter for a route")
    add_rate_options(p)
    add_spec_options(p)
    p.add_argument("--json", action="store_true")
    p.set_defaults(func=cmd_design)

    p = sub.add_parser("plans", parents=common,
                       help="multistage plans against the single stage, and which one is used")
    add_rate_options(p)
    add_spec_options(p)
    p.add_argument("--json", action="store_true")
    p.set_defaults(func=cmd_plans)

    p = sub.add_parser("convert", parents=common, help="convert a file", epilog=CONVERT_EPILOG,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    _convert_options(p)
    p.set_defaults(func=cmd_convert)

    add_batch_parser(sub, common)

    add_drift_parser(sub, common)

    p = sub.add_parser("audit", parents=common,
                       help="measure the converter on standard test signals")
    add_rate_options(p)
    add_spec_options(p)
    p.add_argument("--dither", choices=list(DITHERS), default="none")
    p.add_argument("--seed", type=whole_arg("--seed", low=0, high=2**63 - 1), default=0)
    p.add_argument("--json", action="store_true")
    p.set_defaults(func=cmd_audit)

    p = sub.add_parser("serve", parents=common, help="run the local web app")
    p.add_argument("--host", default="127.0.0.1")
    p.add_argument("--port", type=whole_arg("--port", low=1, high=65535), default=8765)
    p.add_argument("--no-browser", action="store_true")
    p.add_argument("--debug", action="store_true", help="Flask's development server")
    p.add_argument("--instance", default=None, help="instance folder (data, database)")
    p.set_defaults(func=cmd_serve)

    p = sub.add_parser("clean", parents=common,
                       help="remove old uploads and outputs from the instance folder")
    p.add_argument("--instance", default=None)
    p.add_argument("--days", type=number_arg("--days", low=0.0, high=36500.0, unit="days"),
                   default=7.0)
    p.set_defaults(func=cmd_clean)
    return ap


CONVERT_EPILOG = """exit status: 0 done (and the delivery met its loudness target within tolerance
and its true-peak ceiling, when set); 2 bad input (nothing written); 3 a --recipe re-run did
not reproduce its recipe (the output is kept); 5 the delivery did not meet its target or its
ceiling (the output is kept; the reasons are printed).
An existing output is refused unless --replace is given."""

def main(argv=None):
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:   # a bad option (one line already written), --help, --version
        return exc.code
    from . import partials
    partials.sweep_remembered()   # partial files a crashed (kill -9) run left behind
    try:
        return args.func(args)
    except RateferryError as exc:
        sys.stderr.write(f"rateferry: error: {exc.message}\n")
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        sys.stderr.write("rateferry: cancelled; no output was written\n")
        return 130


if __name__ == "__main__":
    sys.exit(main())
