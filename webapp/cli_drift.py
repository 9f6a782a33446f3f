"""`rateferry drift`: measure (and correct) clock drift between recordings of one event."""

import os
from .cli_shared import (Progress, add_delivery_options, add_spec_options, delivery_from_args,
                         print_json, spec_from_args)


def cmd_drift(args):
    from . import drift_files, jobs
    from .dsp.errors import ParameterError
    if args.out is not None and not os.path.isdir(args.out):
        raise ParameterError(f"--out must be an existing folder, got {args.out!r}", "out")
    spec, delivery = spec_from_args(args), delivery_from_args(args)
    reports = []
    for track in args.tracks:
        m = drift_files.measure_files(args.reference, track)
        report = drift_files.drift_report(m, reference_name=os.path.basename(args.reference),
                                          track_name=os.path.basename(track))
        if args.out is not None:
            job = _drift_job(args, track, m, spec, delivery)
            bar = Progress(os.path.basename(track),
                           enabled=not (args.quiet or args.silent or args.json))
            result = jobs.run(job, progress=bar)
            from .recipe import write_recipe
            recipe_path = _recipe_beside(job)
            write_recipe(result, recipe_path)
            report["corrected"] = dict(path=job.target, recipe=recipe_path,
                                       frames=result.frames_out, rate_hz=result.fs_out,
                                       time_base=job.time_base.to_dict(),
                                       output_sha256=result.output_sha256)
            report["verification"] = _compact(drift_files.verification(args.reference,
                                                                      job.target))
        reports.append(report)
        if not (args.json or args.silent):
            _print_drift(report, args.points)
    if args.json:
        print_json(dict(reference=os.path.basename(args.reference), tracks=reports))
    return 0


def _drift_job(args, track, measurement, spec, delivery):
    from . import drift_files
    from .dsp.errors import ParameterError
    ext = os.path.splitext(track)[1] if args.format is None else "." + args.format.lstrip(".")
    job = drift_files.correction_job(track, os.path.join(args.out, "corrected" + ext),
                                     measurement, spec=spec, delivery=delivery,
                                     block_frames=args.block_frames)
    job = drift_files.named_in(job, args.out)
    for path in (job.target, _recipe_beside(job)):
        if os.path.lexists(path) and not args.replace:
            raise ParameterError(f"'{path}' exists; a corrected track and its recipe never "
                                 "replace a file unless --replace is given", "out")
    return job


def _recipe_beside(job):
    from .recipe import recipe_file_name
    return os.path.join(os.path.dirname(job.target), recipe_file_name(job.target))


def _compact(report):
    """A report without its per-window points (the verification's summary)."""
    return {k: v for k, v in report.items() if k != "points"}


def _print_drift(r, points):
    print(f"{r['track']} against {r['reference']}: drift {r['drift_ppm']:+.3f} ppm "
          f"({r['confidence']:.0%} interval {r['drift_ppm_low']:+.3f} to "
          f"{r['drift_ppm_high']:+.3f}), offset {r['offset_ms']:+.3f} ms at the start, "
          f"{r['offset_end_ms']:+.3f} ms at the end")
    print(f"  residual {r['residual_rms_ms']:.4f} ms rms, {r['residual_worst_ms']:.4f} ms worst; "
          f"{r['windows_used']} of {r['windows_total']} windows used "
          f"({r['used_share']:.0%})")
    if points:
        pts = r["points"]
        for t, o, used in zip(pts["times_s"], pts["offsets_ms"], pts["used"]):
            print(f"    {t:10.2f} s {o:+12.4f} ms{'' if used else '  (not used)'}")
    if "corrected" in r:
        v = r["verification"]
        print(f"  wrote {r['corrected']['path']} ({r['corrected']['frames']} frames at "
              f"{r['corrected']['rate_hz']} Hz) and its recipe")
        print(f"  verification: drift {v['drift_ppm']:+.3f} ppm, offset {v['offset_ms']:+.4f} ms "
              f"at the start and {v['offset_end_ms']:+.4f} ms at the end")



def add_drift_parser(sub, common):
    p = sub.add_parser(
        "drift", parents=common, help="measure (and correct) clock drift between recordings of one event",
        description="Measure each TRACK against REFERENCE (recordings of the same event on "
                    "different recorders): the start offset and the clock drift. Sign "
                    "conventions: drift_ppm is positive when the track runs fast (its clock "
                    "takes more samples per second than the reference's, so its sounds come "
                    "later and later); offset_ms is positive when the track starts late (its "
                    "content sits later in its file than in the reference). With --out DIR "
                    "each track is also corrected (converted by the measured ratio, shifted by "
                    "the offset, delivered at the reference's rate and length with a recipe "
                    "beside it) and measured again as the verification. Recordings that share "
                    "too little to measure are refused (exit 2).")
    p.add_argument("reference", help="the recording whose clock the others are put on")
    p.add_argument("tracks", nargs="+", metavar="TRACK", help="recordings to measure")
    p.add_argument("--out", default=None, metavar="DIR",
                   help="write the corrected tracks to this folder (never replacing a file "
                        "unless --replace)")
    p.add_argument("--replace", action="store_true", help="let --out replace existing files")
    p.add_argument("--format", default=None,
                   help="output format of corrected tracks by extension (default: the track's)")
    p.add_argument("--points", action="store_true", help="print the per-window offsets")
    add_spec_options(p)
    add_delivery_options(p)
    p.add_argument("--json", action="store_true",
                   help="one JSON object: reference and, per track, drift_ppm, offset_ms, the "
                        "interval, residuals, share of windows used and the points")
    p.set_defaults(func=cmd_drift)
