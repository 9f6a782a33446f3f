"""The `rateferry` command: design, convert, batch, audit, plans, serve, clean.

Bad input ends with one line, ``rateferry: error: <rule and value>``, exit code 2, nothing written.
"""

import argparse
import json
import math
import os
import sys
import time

from . import __version__
from .dsp.dither import DITHERS, WORD_LENGTHS
from .dsp.errors import RateferryError
from .dsp.spec import PRESETS, DEFAULT_PRESET, preset, spec_from_dict
from .cli_args import OneLineParser, number_arg, rate_arg, whole_arg
from .jsontools import jsonable

EXIT_BAD_INPUT = 2

SPEC_OPTIONS = [
    # flag, spec field, type, help
    ("--passband", "passband_hz", number_arg("--passband", unit="Hz"),
     "passband edge in Hz (default: a fraction of the lower Nyquist)"),
    ("--passband-fraction", "passband_fraction", number_arg("--passband-fraction"),
     "passband edge as a fraction of the lower Nyquist"),
    ("--stopband", "stopband_hz", number_arg("--stopband", unit="Hz"),
     "stopband edge in Hz (default: the lower Nyquist)"),
    ("--ripple", "ripple_db", number_arg("--ripple", unit="dB"), "largest passband deviation, +- dB"),
    ("--attenuation", "attenuation_db", number_arg("--attenuation", unit="dB"),
     "smallest stopband rejection, dB"),
    ("--phase", "phase", str, "linear | minimum"),
    ("--method", "method", str, "auto | kaiser | equiripple | least-squares"),
    ("--arithmetic", "arithmetic", str, "float32 | float64"),
    ("--stages", "stages", str, "single | auto (multistage when it saves work)"),
]


def _add_spec_options(p):
    p.add_argument("--preset", default=None, choices=sorted(PRESETS),
                   help=f"starting spec (default: the profile's, else {DEFAULT_PRESET})")
    for flag, field, typ, text in SPEC_OPTIONS:
        p.add_argument(flag, dest=field, type=typ, default=None, help=text)
    p.add_argument("--transition-aliasing", dest="allow_transition_aliasing",
                   action="store_true", default=None,
                   help="let aliases fall into the transition band (stopband = lower rate - passband)")


def spec_from_args(args):
    data = {field: getattr(args, field) for _, field, _, _ in SPEC_OPTIONS}
    data["allow_transition_aliasing"] = args.allow_transition_aliasing
    data = {k: v for k, v in data.items() if v is not None}
    chosen = _profile_of(args)
    name = args.preset or (chosen.preset if chosen else DEFAULT_PRESET)
    return spec_from_dict(data, base=preset(name))


def _print_json(obj):
    json.dump(jsonable(obj), sys.stdout, indent=2, allow_nan=False)
    sys.stdout.write("\n")


class ProgressBar:
    """A one-line bar on stderr, redrawn at most ten times a second."""

    def __init__(self, enabled, label):
        self.enabled = enabled
        self.label = label
        self._last = 0.0
        self._t0 = time.perf_counter()

    def __call__(self, fraction, done, total):
        if not self.enabled:
            return
        now = time.perf_counter()
        if fraction < 1.0 and now - self._last < 0.1:
            return
        self._last = now
        width = 30
        fill = int(round(width * fraction))
        elapsed = now - self._t0
        eta = elapsed * (1 - fraction) / fraction if fraction > 0 else float("nan")
        eta_text = f"{eta:5.1f} s left" if math.isfinite(eta) else "        "
        sys.stderr.write(f"\r{self.label} [{'#' * fill}{'.' * (width - fill)}] "
                         f"{100 * fraction:5.1f} % {eta_text}")
        if fraction >= 1.0:
            sys.stderr.write("\n")
        sys.stderr.flush()


# ---------------------------------------------------------------- commands

def cmd_design(args):
    from .dsp.stages import choose_plan
    spec = spec_from_args(args)
    d = choose_plan(spec, args.fs_in, args.fs_out)   # the single stage unless stages is auto
    figs = d.figures()
    if args.json:
        _print_json(figs)
    else:
        m = d.measured
        print(f"{d.fs_in} -> {d.fs_out} Hz: {d.up}/{d.down}, {d.path}, {d.method}")
        print(f"  numtaps {d.numtaps}, MACs per output sample {d.macs_per_output_sample:g}, "
              f"{d.mmac_per_second:.2f} MMAC/s per channel, latency {d.latency_ms:.3f} ms")
        print(f"  measured ripple {m.passband_ripple_db:.3g} dB (limit {d.mask.ripple_db:g}), "
              f"attenuation {m.stopband_attenuation_db:.1f} dB (needs {d.mask.attenuation_db:g})")
        print(f"  meets the mask: {'yes' if d.meets_mask else 'NO'}")
    return 0 if d.meets_mask else EXIT_BAD_INPUT


def cmd_plans(args):
    from .dsp.stages import plan_options
    spec = spec_from_args(args)
    single, plans = plan_options(spec, args.fs_in, args.fs_out)
    if args.json:
        _print_json({"single": single.figures(), "plans": [p.figures() for p in plans]})
        return 0
    print(f"single stage: {single.macs_per_output_sample:g} MACs/output, {single.numtaps} taps")
    for p in plans:
        print(f"{p.label:>28}: {p.macs_per_output_sample:8.1f} MACs/output, {p.numtaps:6d} taps, "
              f"rates {' -> '.join(map(str, p.rates))}, meets mask: {p.meets_mask}")
    return 0


def _add_delivery_options(p):
    from .delivery import CHANNEL_LAYOUTS, MONO_LAWS, MP3_MODES
    from .profiles import profile_names
    p.add_argument("--profile", choices=list(profile_names()), default=None,
                   help="a destination's delivery (rate, channels, word length or MP3 bit rate, "
                        "loudness, ceiling, limiter, filter preset); every other option given "
                        "overrides its field")
    p.add_argument("--bits", choices=list(WORD_LENGTHS), default=None,
                   help="output word length (default: like the source)")
    p.add_argument("--dither", choices=list(DITHERS), default=None,
                   help="dither for 16/24-bit outputs (default tpdf)")
    p.add_argument("--seed", type=whole_arg("--seed", low=0, high=2**63 - 1), default=None,
                   help="dither seed (default 0)")
    p.add_argument("--ceiling", type=number_arg("--ceiling", low=-60.0, high=0.0, unit="dBTP"),
                   default=None,
                   help="true-peak ceiling in dBTP (gain applied, or the limiter, to stay under it)")
    p.add_argument("--loudness", type=number_arg("--loudness", low=-70.0, high=0.0, unit="LUFS"),
                   default=None,
                   help="integrated loudness target in LUFS")
    p.add_argument("--tolerance", type=number_arg("--tolerance", low=0.0, high=10.0, unit="LU"),
                   default=None, help="how far the loudness may land from the target (default 0.5 LU)")
    p.add_argument("--limiter", action=argparse.BooleanOptionalAction, default=None,
                   help="let the true-peak limiter hold the ceiling so the loudness target is met")
    p.add_argument("--max-limiting", type=number_arg("--max-limiting", low=0.0, high=40.0, unit="dB"),
                   default=None, help="the most gain reduction the limiter may apply (default 6 dB)")
    p.add_argument("--channels", choices=list(CHANNEL_LAYOUTS), default=None,
                   help="channel layout: keep, mono (fold-down), pick (one channel), stereo "
                        "(from mono)")
    p.add_argument("--mono-law", choices=list(MONO_LAWS), default=None,
                   help="how mono sums the channels: half (1/N, default), equal_power (1/sqrt N), sum")
    p.add_argument("--pick", type=whole_arg("--pick", low=1, high=64), default=None,
                   help="the channel --channels pick delivers (1 = first)")
    p.add_argument("--mp3-kbps", type=whole_arg("--mp3-kbps", low=32, high=320), default=None,
                   help="MP3 bit rate, kbit/s (default 128)")
    p.add_argument("--mp3-mode", choices=list(MP3_MODES), default=None,
                   help="MP3 bit-rate mode (default constant)")
    p.add_argument("--filter-same-rate", action="store_true",
                   help="run the filter even when the rate does not change (default: the "
                        "samples pass through; only the delivery chain runs)")
    p.add_argument("--block-frames", type=whole_arg("--block-frames", low=1, high=2**24),
                   default=65536, help="frames per block read")


def _add_replace_option(p, text):
    p.add_argument("--replace", action="store_true", help=text)


# option dest -> Delivery field
_DELIVERY_OPTIONS = {"bits": "bits", "dither": "dither", "seed": "dither_seed",
                     "ceiling": "ceiling_dbtp", "loudness": "loudness_lufs",
                     "tolerance": "loudness_tolerance_lu", "limiter": "limiter",
                     "max_limiting": "max_limiting_db", "channels": "channel_layout",
                     "mono_law": "mono_law", "pick": "pick_channel", "mp3_kbps": "mp3_kbps",
                     "mp3_mode": "mp3_mode"}


def _profile_of(args):
    from .profiles import PROFILES
    return PROFILES[args.profile] if getattr(args, "profile", None) else None


def _delivery_from_args(args):
    """The Delivery: the profile's (or the defaults), each option given overriding its field."""
    from .delivery import Delivery
    chosen = _profile_of(args)
    data = chosen.delivery().to_dict() if chosen else {}
    data.update({field: getattr(args, dest) for dest, field in _DELIVERY_OPTIONS.items()
                 if getattr(args, dest) is not None})
    if data.get("ceiling_dbtp") is None and data.get("limiter") and args.limiter:
        from .dsp.errors import ParameterError
        raise ParameterError("--limiter needs a ceiling to hold (--ceiling DBTP)", "--limiter")
    return Delivery.from_dict(data)


def _fs_out_of(args):
    """--to, else the profile's rate (None: the source's rate for a profile that keeps it)."""
    if args.fs_out is not None:
        return args.fs_out
    chosen = _profile_of(args)
    return chosen.rate_hz if chosen else None


def cmd_convert(args):
    from . import jobs, partials
    if args.recipe:
        from .recipe import load_recipe
        recipe = load_recipe(args.recipe)
        # the source is checked before any work: nothing is written for a wrong source
        job = jobs.prepare_rerun(recipe, args.input, args.output)
    else:
        fs_out = _fs_out_of(args)
        if fs_out is None and args.profile:
            from .media import probe
            fs_out = probe(args.input).rate_hz      # the profile keeps the source's rate
        if fs_out is None:
            from .dsp.errors import ParameterError
            raise ParameterError("convert needs --to HZ (or --profile NAME, or --recipe FILE)",
                                 "fs_out")
        job = jobs.prepare(args.input, args.output, fs_out=fs_out, spec=spec_from_args(args),
                           delivery=_delivery_from_args(args), block_frames=args.block_frames,
                           filter_same_rate=args.filter_same_rate)
    jobs.refuse_existing(args.output, replace_existing=args.replace)
    partials.sweep(os.path.dirname(os.path.abspath(args.output)))   # a crashed run's leftovers
    bar = ProgressBar(not args.quiet and not args.json, os.path.basename(args.input))
    if args.recipe:
        check = jobs.rerun(recipe, args.input, args.output, progress=bar, job=job)
        result = check.result
    else:
        result = jobs.run(job, progress=bar)
    if args.write_recipe:
        from .recipe import write_recipe
        write_recipe(result, args.write_recipe)
    if args.sheet:
        from . import sheet
        sheet.write_sheet(result, args.sheet, title=args.title, author=args.author,
                          note=args.note, profile=None if args.recipe else _profile_of(args))
    for warning in result.warnings:
        sys.stderr.write(f"rateferry: warning: {warning}\n")
    figs = result.figures()
    if args.recipe:
        figs["reproduces_recipe"] = check.reproduces
        figs["recipe_differences"] = check.figures()["differences"]
    if args.json:
        _print_json(figs)
    elif not args.quiet:
        print(f"wrote {args.output}: {result.frames_out} frames at {result.fs_out} Hz, "
              f"{result.output_subtype}, gain {result.gain_db:+.2f} dB ({result.gain_reason}), "
              f"true peak {figs['output']['true_peak_dbtp']} dBTP, "
              f"clipped samples {result.clipped_samples}, {result.seconds:.2f} s")
        print(_delivery_line(result))
        if args.recipe and check.reproduces:
            print("output is byte-identical to the recipe's (same sha256), and every recorded "
                  "figure was reproduced")
    if args.recipe and not check.reproduces:
        err = jobs.RecipeMismatch(check.differences)
        sys.stderr.write(f"rateferry: error: {err.message}; the output was kept for inspection\n")
        return jobs.EXIT_RECIPE_MISMATCH
    if result.delivery_met is False:
        notes = "; ".join(result.delivery_report.get("notes") or ()) or "see the report"
        sys.stderr.write(f"rateferry: delivery target NOT met: {notes}; the file was kept\n")
        return jobs.EXIT_DELIVERY_NOT_MET
    return 0


def _delivery_line(result):
    """The delivery's verification in one line: loudness, true peak, limiter, passes."""
    r = result.delivery_report or {}
    parts = []
    decoded = r.get("decoded")
    meters = decoded or result.output_meters
    if meters.get("integrated_lufs") is not None:
        parts.append(f"loudness {meters['integrated_lufs']:.2f} LUFS")
    if meters.get("true_peak_dbtp") is not None:
        parts.append(f"true peak {meters['true_peak_dbtp']:.2f} dBTP")
    lim = r.get("limiter")
    if lim:
        parts.append(f"limiter: largest reduction {lim['max_gain_reduction_db']:.2f} dB, "
                     f"limiting {lim['limited_s']:.2f} s")
    parts.append(f"{r.get('write_passes', 1)} write pass(es), verified on "
                 f"{r.get('verified_on', 'the written samples')}")
    if not r.get("filter_applied", True):
        parts.append("same rate: no filter")
    verdict = {True: "delivery met", False: "delivery NOT met", None: "nothing promised"}[
        r.get("met")]
    return f"  {verdict}: " + ", ".join(parts)


def cmd_batch(args):
    from . import batch
    from .batch.cluster import scheduler_address
    from .batch.inputs import check_pattern
    from .batch.prepare import Settings
    recipe = None
    if args.recipe:
        from .recipe import load_recipe
        recipe = load_recipe(args.recipe)
    settings = Settings(out_dir=args.out, fs_out=_fs_out_of(args), spec=spec_from_args(args),
                        delivery=_delivery_from_args(args), block_frames=args.block_frames,
                        format=f".{args.format}" if args.format else None,
                        name_pattern=check_pattern(args.names), recipe=recipe,
                        filter_same_rate=args.filter_same_rate)
    options = batch.BatchOptions(
        inputs=tuple(args.inputs), settings=settings,
        scheduler=scheduler_address(args.scheduler), workers=args.workers,
        replace=args.replace, progress_line=not args.quiet and not args.json,
        json_events=args.json, sheet=not args.no_sheet)
    try:
        outcome = batch.run_batch(options)
    except KeyboardInterrupt:
        sys.stderr.write("\nrateferry: batch interrupted; finished files are kept and recorded "
                         "in the ledger: run the same command again to go on\n")
        from .batch.run import EXIT_INTERRUPTED
        return EXIT_INTERRUPTED
    if not args.json and not args.quiet:
        c = outcome.counts
        print(f"batch: {c['done']} converted, {c['skipped']} already done, {c['failed']} "
              f"failed ({outcome.cluster or 'no conversion needed'}); report "
              f"{outcome.reports['csv']}" + (f", sheet {outcome.reports['sheet']}"
                                             if "sheet" in outcome.reports else ""))
    return outcome.exit_code


def cmd_audit(args):
    from .dsp.audit import audit
    from .dsp.stages import choose_plan
    spec = spec_from_args(args)
    d = choose_plan(spec, args.fs_in, args.fs_out)
    result = audit(d, dither=args.dither, seed=args.seed)
    figs = result.figures()
    if args.json:
        _print_json(figs)
    else:
        print(f"{d.fs_in} -> {d.fs_out} Hz, measured on the converter's output:")
        for row in figs["verdict"]:
            mark = "ok  " if row["passes"] else "FAIL"
            unit = row.get("unit") or ""
            print(f"  {mark} {row['figure']:>22}: {_num(row['measured'])} {unit} "
                  f"(limit {_num(row['limit'])} {unit})")
        print(f"  THD+N {_num(figs['thd_n_db'])} dB, noise floor "
              f"{_num(figs['noise_floor_dbfs'])} dBFS, group delay "
              f"{_num(figs['group_delay_ms'])} ms")
    return 0 if figs.get("passes", True) else EXIT_BAD_INPUT


def _num(v):
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:.4g}"
    return str(v)


def cmd_serve(args):
    from .server.run import serve
    return serve(host=args.host, port=args.port, open_browser=not args.no_browser,
                 debug=args.debug, instance_path=args.instance)


def cmd_clean(args):
    from .store import clear_old
    removed = clear_old(args.instance, older_than_days=args.days)
    print(f"removed {removed} old files")
    return 0


def build_parser():
    ap = OneLineParser(prog="rateferry",
                       description="Sample-rate conversion with a verified filter.")
    ap.add_argument("--version", action="version", version=f"rateferry {__version__}")
    sub = ap.add_subparsers(dest="command", required=True)

    p = sub.add_parser("design", help="design and measure the filter for a route")
    p.add_argument("--from", dest="fs_in", type=rate_arg("--from"), required=True,
                   help="source rate, Hz")
    p.add_argument("--to", dest="fs_out", type=rate_arg("--to"), required=True,
                   help="target rate, Hz")
    _add_spec_options(p)
    p.add_argument("--json", action="store_true")
    p.set_defaults(func=cmd_design)

    p = sub.add_parser("plans", help="multistage plans against the single stage")
    p.add_argument("--from", dest="fs_in", type=rate_arg("--from"), required=True)
    p.add_argument("--to", dest="fs_out", type=rate_arg("--to"), required=True)
    _add_spec_options(p)
    p.add_argument("--json", action="store_true")
    p.set_defaults(func=cmd_plans)

    p = sub.add_parser("convert", help="convert a file", epilog=CONVERT_EPILOG,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("input")
    p.add_argument("output")
    p.add_argument("--to", dest="fs_out", type=rate_arg("--to"), help="target rate, Hz")
    _add_spec_options(p)
    _add_delivery_options(p)
    p.add_argument("--recipe", help="re-run a recipe (JSON); spec and delivery come from it")
    p.add_argument("--write-recipe", help="save the recipe of this conversion (JSON)")
    p.add_argument("--sheet", help="write a design sheet (self-contained HTML)")
    p.add_argument("--title", default=None, help="design sheet title")
    p.add_argument("--author", default=None, help="design sheet author")
    p.add_argument("--note", default=None, help="design sheet note")
    _add_replace_option(p, "replace the output file if it exists (default: refuse)")
    p.add_argument("--json", action="store_true")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=cmd_convert)

    _add_batch_parser(sub)

    p = sub.add_parser("audit", help="measure the converter on standard test signals")
    p.add_argument("--from", dest="fs_in", type=rate_arg("--from"), required=True)
    p.add_argument("--to", dest="fs_out", type=rate_arg("--to"), required=True)
    _add_spec_options(p)
    p.add_argument("--dither", choices=list(DITHERS), default="none")
    p.add_argument("--seed", type=whole_arg("--seed", low=0, high=2**63 - 1), default=0)
    p.add_argument("--json", action="store_true")
    p.set_defaults(func=cmd_audit)

    p = sub.add_parser("serve", help="run the local web app")
    p.add_argument("--host", default="127.0.0.1")
    p.add_argument("--port", type=whole_arg("--port", low=1, high=65535), default=8765)
    p.add_argument("--no-browser", action="store_true")
    p.add_argument("--debug", action="store_true", help="Flask's development server")
    p.add_argument("--instance", default=None, help="instance folder (data, database)")
    p.set_defaults(func=cmd_serve)

    p = sub.add_parser("clean", help="remove old uploads and outputs from the instance folder")
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

BATCH_EPILOG = """exit status: 0 every file done (now or in an earlier run); 2 bad input found
before any work (nothing converted); 4 some files failed (the others are done; see the report);
130 interrupted (run the same command again to go on).
name pattern parts: {stem} {parent} {rate} (16k, 44k1) {hz} (16000) {bits} (16bit, 24bit,
32float, 64float) {format} (wav, flac); default: {stem}_{rate}_{bits}.<source format>."""


def _add_batch_parser(sub):
    from .media import OUTPUT_FORMATS
    p = sub.add_parser("batch", help="convert many files (Dask: this machine or a cluster)",
                       epilog=BATCH_EPILOG,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("inputs", nargs="+", metavar="INPUT",
                   help="audio files, folders (searched recursively) or manifests (.csv, .jsonl)")
    p.add_argument("--out", required=True, help="output folder (holds the ledger and reports)")
    p.add_argument("--to", dest="fs_out", type=rate_arg("--to"), help="target rate, Hz")
    _add_spec_options(p)
    _add_delivery_options(p)
    p.add_argument("--recipe", help="apply a recipe (JSON) to every file: a template, or an "
                   "exact re-run for its own source")
    p.add_argument("--format", choices=sorted(e.lstrip(".") for e in OUTPUT_FORMATS),
                   help="output format (default: the source's)")
    p.add_argument("--names", metavar="PATTERN", default=None,
                   help="output file-name pattern, e.g. '{stem}_{rate}.{format}'")
    p.add_argument("--scheduler", metavar="ADDRESS", default=None,
                   help="run on this Dask scheduler (default: $RATEFERRY_SCHEDULER, else a "
                        "local cluster)")
    p.add_argument("--workers", type=whole_arg("--workers", low=1, high=4096), default=None,
                   help="worker processes of the local cluster (default: one per core)")
    _add_replace_option(p, "replace outputs that this batch did not make")
    p.add_argument("--no-sheet", action="store_true", help="skip the batch sheet (HTML)")
    p.add_argument("--json", action="store_true", help="JSON-lines events on stdout")
    p.add_argument("--quiet", action="store_true", help="no progress line")
    p.set_defaults(func=cmd_batch)


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
