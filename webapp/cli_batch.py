"""`rateferry batch`: many files, on this machine or a Dask cluster (see webapp/batch)."""

import argparse
import sys
from .cli_shared import (add_delivery_options, add_replace_option, add_spec_options,
                         delivery_from_args, fs_out_of, say, spec_from_args)
from .cli_args import rate_arg, whole_arg


def cmd_batch(args):
    from . import batch
    from .batch.cluster import scheduler_address
    from .batch.inputs import check_pattern
    from .batch.prepare import Settings
    recipe = None
    if args.recipe:
        from .recipe import load_recipe
        recipe = load_recipe(args.recipe)
    settings = Settings(out_dir=args.out, fs_out=fs_out_of(args), spec=spec_from_args(args),
                        delivery=delivery_from_args(args), block_frames=args.block_frames,
                        format=f".{args.format}" if args.format else None,
                        name_pattern=check_pattern(args.names), recipe=recipe,
                        filter_same_rate=args.filter_same_rate)
    options = batch.BatchOptions(
        inputs=tuple(args.inputs), settings=settings,
        scheduler=scheduler_address(args.scheduler), workers=args.workers,
        replace=args.replace, progress_line=not (args.quiet or args.silent or args.json),
        json_events=args.json, sheet=not args.no_sheet)
    try:
        outcome = batch.run_batch(options)
    except KeyboardInterrupt:
        sys.stderr.write("\nrateferry: batch interrupted; finished files are kept and recorded "
                         "in the ledger: run the same command again to go on\n")
        from .batch.run import EXIT_INTERRUPTED
        return EXIT_INTERRUPTED
    if not args.json:
        c = outcome.counts
        say(args, f"batch: {c['done']} converted, {c['skipped']} already done, {c['failed']} "
              f"failed ({outcome.cluster or 'no conversion needed'}); report "
              f"{outcome.reports['csv']}" + (f", sheet {outcome.reports['sheet']}"
                                             if "sheet" in outcome.reports else ""))
    return outcome.exit_code


BATCH_EPILOG = """exit status: 0 every file done (now or in an earlier run); 2 bad input found
before any work (nothing converted); 4 some files failed (the others are done; see the report);
130 interrupted (run the same command again to go on).
name pattern parts: {stem} {parent} {rate} (16k, 44k1) {hz} (16000) {bits} (16bit, 24bit,
32float, 64float) {format} (wav, flac); default: {stem}_{rate}_{bits}.<source format>."""


def add_batch_parser(sub, common):
    from .media import OUTPUT_FORMATS
    p = sub.add_parser("batch", help="convert many files (Dask: this machine or a cluster)",
                       epilog=BATCH_EPILOG, parents=common,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("inputs", nargs="+", metavar="INPUT",
                   help="audio files, folders (searched recursively) or manifests (.csv, .jsonl)")
    p.add_argument("--out", required=True, help="output folder (holds the ledger and reports)")
    p.add_argument("--to", dest="fs_out", type=rate_arg("--to"), help="target rate, Hz")
    add_spec_options(p)
    add_delivery_options(p)
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
    add_replace_option(p, "replace outputs that this batch did not make")
    p.add_argument("--no-sheet", action="store_true", help="skip the batch sheet (HTML)")
    p.add_argument("--json", action="store_true", help="JSON-lines events on stdout")
    p.set_defaults(func=cmd_batch)
