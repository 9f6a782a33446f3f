"""The `rateferry` command: design, convert, batch, drift, audit, plans, serve, clean.

Bad input ends with one line, ``rateferry: error: <rule and value>``, exit code 2, nothing written.
Every command takes ``--quiet`` (no progress and no detail: only the line that states the
result, such as "wrote ...") and ``--silent`` (not even that; the exit status and ``--json``
still speak). ``convert --json`` prints the report of :func:`webapp.report.convert_report`,
documented by ``webapp/schemas/convert-report.schema.json``.
"""

import argparse
import json
import os
import sys
import time

from . import __version__
from .dsp.dither import DITHERS, WORD_LENGTHS
from .dsp.errors import RateferryError
from .dsp.spec import PRESETS, DEFAULT_PRESET, preset, preset_bits, spec_from_dict
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
    return spec_from_dict(data, base=preset(_preset_name(args)))


def _preset_name(args):
    chosen = _profile_of(args)
    return args.preset or (chosen.preset if chosen else DEFAULT_PRESET)


def _print_json(obj):
    json.dump(jsonable(obj), sys.stdout, indent=2, allow_nan=False)
    sys.stdout.write("\n")


def _say(args, text):
    """A line that states the result: printed unless --silent."""
    if not args.silent:
        print(text)


def _detail(args, text):
    """A line of detail: printed unless --quiet or --silent."""
    if not (args.quiet or args.silent):
        print(text)


def _grouped(n):
    """12 345 678 (thin groups, as the page writes them)."""
    return f"{int(n):,}".replace(",", " ")


def _db(value, unit="dB", digits=2):
    return "-" if value is None else f"{value:+.{digits}f} {unit}".replace("+-", "-")


def _level(value, unit):
    return "-" if value is None else f"{value:.1f} {unit}"


class Progress:
    """Progress of a conversion on stderr: a tqdm bar with rate and ETA on a terminal; when
    stderr is not a terminal (a log, a pipe), one summary line at the end instead."""

    def __init__(self, label, *, enabled, stream=None):
        self.label = label
        self.enabled = enabled
        self.stream = stream or sys.stderr
        self.terminal = enabled and hasattr(self.stream, "isatty") and self.stream.isatty()
        self.bar = None
        self.done = self.total = 0
        self._t0 = time.perf_counter()

    def __call__(self, fraction, done, total):
        if not self.enabled:
            return
        self.done, self.total = done, total
        if self.terminal:
            if self.bar is None:
                from tqdm import tqdm
                self.bar = tqdm(total=total, desc=self.label, unit="frame", unit_scale=True,
                                file=self.stream, dynamic_ncols=True, leave=False)
            self.bar.update(done - self.bar.n)

    def close(self, finished=True):
        if not self.enabled:
            return
        if self.bar is not None:
            self.bar.close()
            return
        if finished and self.total:
            elapsed = time.perf_counter() - self._t0
            rate = self.done / elapsed if elapsed > 0 else 0.0
            self.stream.write(f"{self.label}: {100.0 * self.done / self.total:.1f} % of "
                              f"{_grouped(self.total)} frames read in {elapsed:.2f} s "
                              f"({_grouped(rate)} frames/s)\n")
            self.stream.flush()


# ---------------------------------------------------------------- commands

def cmd_design(args):
    from .dsp.stages import choose_plan
    spec = spec_from_args(args)
    d = choose_plan(spec, args.fs_in, args.fs_out)   # the single stage unless stages is auto
    if args.json:
        _print_json(d.figures())
        return 0 if d.meets_mask else EXIT_BAD_INPUT
    m = d.measured
    _detail(args, f"{d.fs_in} -> {d.fs_out} Hz: {d.up}/{d.down}, {d.path}, {d.method}")
    _detail(args, f"  {_grouped(d.numtaps)} taps, {d.macs_per_output_sample:.1f} multiply-adds "
                  f"per output sample, {d.mmac_per_second:.2f} MMAC/s per channel, latency "
                  f"{d.latency_ms:.3f} ms")
    _detail(args, f"  measured ripple {m.passband_ripple_db:.3g} dB (limit "
                  f"{d.mask.ripple_db:g}), attenuation {m.stopband_attenuation_db:.1f} dB "
                  f"(needs {d.mask.attenuation_db:g})")
    _say(args, f"{d.fs_in} -> {d.fs_out} Hz meets the mask: {'yes' if d.meets_mask else 'NO'}")
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
        _print_json({"single": single.figures(), "plans": [p.figures() for p in plans],
                     "stages": spec.stages, "used": name(used), "auto_uses": name(auto)})
        return 0
    _detail(args, f"{'single stage':>28}: {single.macs_per_output_sample:8.1f} MACs/output, "
                  f"{single.numtaps:7d} taps, meets the mask: {_yes(single.meets_mask)}")
    for p in plans:
        _detail(args, f"{p.label:>28}: {p.macs_per_output_sample:8.1f} MACs/output, "
                      f"{p.numtaps:7d} taps, rates {' -> '.join(map(str, p.rates))}, "
                      f"meets the mask: {_yes(p.meets_mask)}")
    text = f"used with --stages {spec.stages}: {name(used)}"
    if spec.stages != "auto":
        text += f" (--stages auto would use {name(auto)})"
    _say(args, text)
    return 0


def _add_delivery_options(p):
    from .delivery import CHANNEL_LAYOUTS, MONO_LAWS, MP3_MODES
    from .profiles import profile_names
    p.add_argument("--profile", choices=list(profile_names()), default=None,
                   help="a destination's delivery (rate, channels, word length or MP3 bit rate, "
                        "loudness, ceiling, limiter, filter preset); every other option given "
                        "overrides its field")
    p.add_argument("--bits", choices=list(WORD_LENGTHS), default=None,
                   help="output word length (default: the profile's, else the preset's if it "
                        "states one, as spoken_word_delivery does (16), else like the source)")
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
    """The Delivery: the profile's (or the defaults), each option given overriding its field;
    without --bits and a profile, the preset's word length if it states one (spoken word: 16
    bit), else like the source."""
    from .delivery import Delivery
    chosen = _profile_of(args)
    data = chosen.delivery().to_dict() if chosen else {"bits": preset_bits(_preset_name(args))}
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


def _prepare_convert(args):
    from . import jobs
    if args.recipe:
        from .recipe import load_recipe
        recipe = load_recipe(args.recipe)
        # the source is checked before any work: nothing is written for a wrong source
        return recipe, jobs.prepare_rerun(recipe, args.input, args.output)
    fs_out = _fs_out_of(args)
    if fs_out is None and (args.speed or args.true_rate or args.profile):
        from .media import probe
        fs_out = probe(args.input).rate_hz     # a speed change (or such a profile) keeps the rate
    if fs_out is None:
        from .dsp.errors import ParameterError
        raise ParameterError("convert needs --to HZ (or --profile NAME, or --recipe FILE)",
                             "fs_out")
    return None, jobs.prepare(args.input, args.output, fs_out=fs_out,
                              spec=spec_from_args(args), delivery=_delivery_from_args(args),
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
                          note=args.note, profile=None if args.recipe else _profile_of(args))
    for warning in result.warnings:
        sys.stderr.write(f"rateferry: warning: {warning}\n")
    report = convert_report(result, rerun=check)
    if args.json:
        _print_json(report)
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
    _say(args, f"wrote {args.output}: {_grouped(out['frames'])} frames at {out['rate_hz']} Hz "
               f"({out['duration_s']:.2f} s), {out['subtype']}, gain {_db(dl['gain_db'])} "
               f"({dl['gain_reason']}), true peak {_db(out['true_peak_dbtp'], 'dBTP', 1)}, "
               f"{_grouped(out['clipped_samples'])} clipped samples, in {t['seconds']:.2f} s")
    _detail(args, f"  source {_level(src['integrated_lufs'], 'LUFS')}, true peak "
                  f"{_db(src['true_peak_dbtp'], 'dBTP', 1)}; output "
                  f"{_level(out['integrated_lufs'], 'LUFS')}; design "
                  f"{_grouped(r['design']['numtaps'])} taps ({r['design']['method']})")
    _detail(args, _delivery_line(dl))
    if "recipe" in r and r["recipe"]["reproduces"]:
        _say(args, "output is byte-identical to the recipe's (same sha256), and every recorded "
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
        _say(args, f"batch: {c['done']} converted, {c['skipped']} already done, {c['failed']} "
              f"failed ({outcome.cluster or 'no conversion needed'}); report "
              f"{outcome.reports['csv']}" + (f", sheet {outcome.reports['sheet']}"
                                             if "sheet" in outcome.reports else ""))
    return outcome.exit_code


def cmd_drift(args):
    from . import drift_files, jobs
    from .dsp.errors import ParameterError
    if args.out is not None and not os.path.isdir(args.out):
        raise ParameterError(f"--out must be an existing folder, got {args.out!r}", "out")
    spec, delivery = spec_from_args(args), _delivery_from_args(args)
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
        _print_json(dict(reference=os.path.basename(args.reference), tracks=reports))
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


def cmd_audit(args):
    from .dsp.audit import audit
    from .dsp.stages import choose_plan
    spec = spec_from_args(args)
    d = choose_plan(spec, args.fs_in, args.fs_out)
    result = audit(d, dither=args.dither, seed=args.seed)
    figs = result.figures()
    passes = figs.get("passes", True)
    if args.json:
        _print_json(figs)
        return 0 if passes else EXIT_BAD_INPUT
    _detail(args, f"{d.fs_in} -> {d.fs_out} Hz, measured on the converter's output:")
    for row in figs["verdict"]:
        mark = "ok  " if row["passes"] else "FAIL"
        unit = row.get("unit") or ""
        _detail(args, f"  {mark} {row['figure']:>22}: {_num(row['measured'])} {unit} "
                      f"(limit {_num(row['limit'])} {unit})")
    _detail(args, f"  THD+N {_num(figs['thd_n_db'])} dB, noise floor "
                  f"{_num(figs['noise_floor_dbfs'])} dBFS, group delay "
                  f"{_num(figs['group_delay_ms'])} ms")
    _say(args, f"{d.fs_in} -> {d.fs_out} Hz: the converter "
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
    _say(args, f"removed {removed} old file{'' if removed == 1 else 's'}")
    return 0


def _common():
    """Options every command takes."""
    p = argparse.ArgumentParser(add_help=False)
    p.add_argument("--quiet", action="store_true",
                   help="no progress and no detail: only the line that states the result")
    p.add_argument("--silent", action="store_true",
                   help="print nothing but errors (and --json output); the exit status tells")
    return p


def _rates(p):
    p.add_argument("--from", dest="fs_in", type=rate_arg("--from"), required=True,
                   help="source rate, Hz")
    p.add_argument("--to", dest="fs_out", type=rate_arg("--to"), required=True,
                   help="target rate, Hz")


def _convert_options(p):
    p.add_argument("input")
    p.add_argument("output")
    p.add_argument("--to", dest="fs_out", type=rate_arg("--to"), help="target rate, Hz")
    _add_spec_options(p)
    _add_delivery_options(p)
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
    _add_replace_option(p, "replace the output file if it exists (default: refuse)")
    p.add_argument("--json", action="store_true",
                   help="print the report as JSON (schema: webapp/schemas/"
                        "convert-report.schema.json)")


def build_parser():
    ap = OneLineParser(prog="rateferry",
                       description="Sample-rate conversion with a verified filter.")
    ap.add_argument("--version", action="version", version=f"rateferry {__version__}")
    sub = ap.add_subparsers(dest="command", required=True)
    common = [_common()]

    p = sub.add_parser("design", parents=common, help="design and measure the filter for a route")
    _rates(p)
    _add_spec_options(p)
    p.add_argument("--json", action="store_true")
    p.set_defaults(func=cmd_design)

    p = sub.add_parser("plans", parents=common,
                       help="multistage plans against the single stage, and which one is used")
    _rates(p)
    _add_spec_options(p)
    p.add_argument("--json", action="store_true")
    p.set_defaults(func=cmd_plans)

    p = sub.add_parser("convert", parents=common, help="convert a file", epilog=CONVERT_EPILOG,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    _convert_options(p)
    p.set_defaults(func=cmd_convert)

    _add_batch_parser(sub, common)

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
    _add_spec_options(p)
    _add_delivery_options(p)
    p.add_argument("--json", action="store_true",
                   help="one JSON object: reference and, per track, drift_ppm, offset_ms, the "
                        "interval, residuals, share of windows used and the points")
    p.set_defaults(func=cmd_drift)

    p = sub.add_parser("audit", parents=common,
                       help="measure the converter on standard test signals")
    _rates(p)
    _add_spec_options(p)
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

BATCH_EPILOG = """exit status: 0 every file done (now or in an earlier run); 2 bad input found
before any work (nothing converted); 4 some files failed (the others are done; see the report);
130 interrupted (run the same command again to go on).
name pattern parts: {stem} {parent} {rate} (16k, 44k1) {hz} (16000) {bits} (16bit, 24bit,
32float, 64float) {format} (wav, flac); default: {stem}_{rate}_{bits}.<source format>."""


def _add_batch_parser(sub, common):
    from .media import OUTPUT_FORMATS
    p = sub.add_parser("batch", help="convert many files (Dask: this machine or a cluster)",
                       epilog=BATCH_EPILOG, parents=common,
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
