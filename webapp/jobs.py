"""The job model: every conversion is prepared and run here, and nowhere else.

The command line, the web app, recipe re-runs and batch runs all call :func:`prepare` (turn a
source, a spec, a target rate and a delivery into a checked :class:`Job`: the verified plan, the
output format, the number of passes, the output length and a download name) and :func:`run`
(stream it through :func:`webapp.pipeline.execute`). :func:`rerun` re-runs a recipe: it checks the
source before any work, uses the recipe's block size, recomputes every recorded figure and
compares each with the recipe's.

Conventions
-----------
* A decision is made once: the plan is :func:`webapp.dsp.stages.verified_plan` (a caller with a
  cache passes the plan it made with the same function); the output length is
  :func:`webapp.dsp.polyphase.output_length`; the output format is :func:`webapp.media.output_plan`.
* With a true-peak ceiling or a loudness target the source is read twice (``passes == 2``): the
  first pass measures the converted signal at unity gain, the second writes it.
* A job may carry a time base (a drift correction: a real ratio, a start and the reference's
  length; :class:`webapp.dsp.timebase.TimeBase`) or a speed change (an exact factor p/q, also
  the way to take a file at a stated true rate; :class:`webapp.dsp.rates.SpeedChange`). Its plan
  is then :func:`webapp.dsp.timebase.timebase_design` or :func:`webapp.dsp.speed.speed_design`
  and its length the time base's or the speed change's; :func:`_route_of` decides which.
"""

from dataclasses import dataclass, field, replace
import math
import os

from . import media, pipeline
from .delivery import Delivery
from .dsp.channels import output_channels
from .dsp.errors import ParameterError
from .dsp.polyphase import output_length
from .dsp.rates import SpeedChange, speed_change, true_rate_change, validate_rate
from .dsp.spec import Spec
from .dsp.speed import speed_design
from .dsp.stages import as_plan, verified_plan
from .dsp.timebase import TimeBase, timebase_design

__all__ = ["Job", "prepare", "run", "convert_file", "rerun", "Rerun", "RecipeMismatch",
           "output_name", "BLOCK_FRAMES", "EXIT_RECIPE_MISMATCH", "EXIT_DELIVERY_NOT_MET",
           "refuse_existing"]

BLOCK_FRAMES = pipeline.BLOCK_FRAMES
#: Exit status of ``rateferry convert --recipe`` when the re-run differs from its recipe.
EXIT_RECIPE_MISMATCH = 3
#: Exit status of ``rateferry convert`` when the delivery did not meet its loudness target
#: within tolerance or its ceiling (the file is kept; the reasons are printed).
EXIT_DELIVERY_NOT_MET = 5
# Relative tolerance for recorded floating-point figures (measured ripple, attenuation, loudness):
# the same design on another machine's BLAS may differ in the last digits; the output bytes
# themselves are compared exactly (sha256).
_FIGURE_RTOL = 1e-9
# Recipe fields that legitimately differ between the original run and a re-run.
_NOT_COMPARED = {"created", "source.name", "output.name", "software.version"}

_WORDS = {"16": "16bit", "24": "24bit", "32f": "32float", "64f": "64float"}


@dataclass(frozen=True)
class Job:
    """A conversion ready to run: everything decided, nothing written yet.

    Attributes
    ----------
    source, target : str
    probe : media.Probe
        The source as probed.
    spec : Spec
    fs_out : int
    delivery : Delivery
        As it will run (dither "none" for float and lossy outputs, which are not quantised).
    plan : Plan
        Verified against the mask.
    output : media.OutputPlan
        Format, subtype and word length of the file to write.
    frames_out : int
    passes : int
        Reading passes planned: 1, or 2 with a ceiling or loudness target (the first measures).
        A write pass that fails its verification is followed by another (see
        :func:`webapp.delivery.review`); the result reports them.
    block_frames : int
        Frames per block read; the output is bit-identical for a given block size and seed.
    channels_out : int
        Channels delivered, after the delivery's channel layout.
    filter_applied : bool
        False for a same-rate job that did not ask for the filter: the delivery chain alone
        (layout, gain, limiter, dither, format) runs, the samples pass through unfiltered.
    time_base : TimeBase or None
        A drift correction: the converter runs at its real ratio, start and length.
    speed : SpeedChange or None
        A speed change by an exact factor (the plan is designed for it).
    """

    source: str
    target: str
    probe: object = field(repr=False)
    spec: Spec
    fs_out: int
    delivery: Delivery
    plan: object = field(repr=False)
    output: object
    frames_out: int
    passes: int
    block_frames: int = BLOCK_FRAMES
    channels_out: int = 0
    filter_applied: bool = True
    time_base: TimeBase | None = None
    speed: SpeedChange | None = None

    @property
    def fs_in(self):
        return self.probe.rate_hz

    @property
    def frames_total(self):
        """Frames the job reads in all its passes (the unit of progress)."""
        return self.probe.frames * self.passes

    def download_name(self, stem):
        """The name a user gets the output under: ``<stem>_48k_16bit.flac``."""
        return output_name(stem, self.fs_out, self.output.bits,
                           os.path.splitext(self.target)[1])


def output_name(stem, fs_out, bits, ext):
    """A sensible download name: ``<stem>_48k_16bit.flac`` (``_44k1`` for 44100 Hz)."""
    k = fs_out / 1000
    rate = f"{int(k)}k" if fs_out % 1000 == 0 else f"{k:g}".replace(".", "k")
    word = _WORDS.get(bits or "", "")
    parts = [stem, rate] + ([word] if word else [])
    return "_".join(parts) + ext


def refuse_existing(target, *, replace_existing=False):
    """Raise ParameterError when ``target`` exists and replacing it was not asked for."""
    if os.path.lexists(os.fspath(target)) and not replace_existing:
        raise ParameterError(f"the output '{os.fspath(target)}' already exists; it is not "
                             f"replaced unless asked (--replace)", "output")


def _block_frames(value):
    if isinstance(value, bool) or not isinstance(value, int) or not 1 <= value <= 1 << 24:
        raise ParameterError(f"block_frames must be a whole number from 1 to {1 << 24}, got "
                             f"{value!r}", "block_frames")
    return value


def _route_of(spec, fs_in, fs_out, *, plan, time_base, speed, true_rate_hz):
    """(plan, frames_out function, time base, speed change): the one place that decides how a
    job converts: an ordinary route, a time base, or a speed change (a stated true rate is one).
    """
    asked = [n for n, v in (("time_base", time_base), ("speed", speed),
                            ("true_rate_hz", true_rate_hz)) if v is not None]
    if len(asked) > 1:
        raise ParameterError(f"a conversion takes one of time_base, speed and true_rate_hz, got "
                             f"{' and '.join(asked)}", asked[1])
    if time_base is not None:
        if not isinstance(time_base, TimeBase):
            time_base = TimeBase.from_dict(time_base)
        if (time_base.fs_in, time_base.fs_out) != (fs_in, fs_out):
            raise ParameterError(f"the time base converts {time_base.fs_in} -> "
                                 f"{time_base.fs_out} Hz but the source is {fs_in} Hz and the "
                                 f"target {fs_out} Hz", "time_base")
        plan = as_plan(plan if plan is not None else timebase_design(spec, time_base))
        if plan.multistage or plan.stages[0].path != "arbitrary":
            raise ParameterError("a time base needs a single-stage design on the arbitrary-ratio "
                                 "path (webapp.dsp.timebase.timebase_design)", "design")
        return plan.require_met(), time_base.output_length, time_base, None
    if true_rate_hz is not None:
        speed = true_rate_change(fs_in, true_rate_hz, fs_out)
    elif speed is not None and not isinstance(speed, SpeedChange):
        speed = speed_change(fs_in, fs_out, speed)
    if speed is not None:
        if (speed.fs_in, speed.fs_out) != (fs_in, fs_out):
            raise ParameterError(f"the speed change converts {speed.fs_in} -> {speed.fs_out} Hz "
                                 f"but the source is {fs_in} Hz and the target {fs_out} Hz",
                                 "speed")
        plan = as_plan(plan if plan is not None else speed_design(spec, speed)).require_met()
        if (plan.up, plan.down) != (speed.up, speed.down):
            raise ParameterError(f"the design converts by {plan.up}/{plan.down} but the speed "
                                 f"change needs {speed.up}/{speed.down}", "design")
        return plan, speed.output_length, None, speed
    plan = verified_plan(spec, fs_in, fs_out) if plan is None else as_plan(plan).require_met()
    if (plan.fs_in, plan.fs_out) != (fs_in, fs_out):
        raise ParameterError(f"the design converts {plan.fs_in} -> {plan.fs_out} Hz but the "
                             f"source is {fs_in} Hz and the target {fs_out} Hz", "design")
    return plan, (lambda frames: output_length(frames, plan.up, plan.down)), None, None


def prepare(source, target, *, fs_out, spec=None, delivery=None, plan=None,
            block_frames=BLOCK_FRAMES, probe=None, time_base=None, speed=None,
            true_rate_hz=None, filter_same_rate=False):
    """Check and decide everything about a conversion; write nothing.

    Parameters
    ----------
    source, target : path
    fs_out : int
    spec : Spec, optional (default ``Spec()``)
    delivery : Delivery, optional (default ``Delivery()``)
    plan : Plan or Design, optional
        A plan already made for this spec and route (the web app's cache); it must have been
        made by :func:`webapp.dsp.stages.verified_plan` or equal to it. Default: made here.
    block_frames : int
    probe : media.Probe, optional
        The source's probe, when the caller has it.
    time_base : TimeBase or dict, optional
        Correct a drifting clock: convert by the time base's real ratio, shift by its offset and
        deliver its length (``fs_out`` must be its ``fs_out``).
    speed : SpeedChange or "P/Q", optional
        Play the source p/q times as fast (pitch and pace), delivered at ``fs_out``.
    true_rate_hz : int, Fraction or "N/D", optional
        Take the source at this true rate instead of its header's (a speed change by
        true / header rate).
    filter_same_rate : bool, optional
        Run the filter even when the rate does not change. Default False: a same-rate job
        passes the samples through and runs only the delivery chain.

    Returns
    -------
    Job

    Raises
    ------
    ParameterError, AudioFileError
    """
    spec = spec or Spec()
    delivery = delivery or Delivery()
    source, target = os.fspath(source), os.fspath(target)
    src = probe if probe is not None else media.probe(source)
    fs_out = validate_rate(fs_out, field="fs_out")
    media.refuse_same_file(source, target)
    plan, length, time_base, speed = _route_of(spec, src.rate_hz, fs_out, plan=plan,
                                               time_base=time_base, speed=speed,
                                               true_rate_hz=true_rate_hz)
    frames_out = length(src.frames)
    if frames_out < 1:
        raise ParameterError(f"the conversion would deliver no frames (the time base starts "
                             f"after the end of the {src.frames}-frame source)", "time_base")
    if not isinstance(filter_same_rate, bool):
        raise ParameterError(f"filter_same_rate must be true or false, got {filter_same_rate!r}",
                             "filter_same_rate")
    # a time base or a speed change re-times the samples even at the same nominal rate
    filter_applied = (filter_same_rate or src.rate_hz != fs_out or time_base is not None
                      or speed is not None)
    channels_out = output_channels(src.channels, delivery.channel_layout,
                                   pick=delivery.pick_channel)
    out = media.output_plan(target, rate_hz=fs_out, channels=channels_out, bits=delivery.bits,
                            source_probe=src, frames_estimate=frames_out,
                            mp3_kbps=delivery.mp3_kbps, mp3_mode=delivery.mp3_mode)
    if out.bits not in ("16", "24"):
        delivery = replace(delivery, dither="none")   # float and lossy outputs aren't quantised
    passes = 2 if (delivery.ceiling_dbtp is not None or delivery.loudness_lufs is not None) else 1
    return Job(source=source, target=target, probe=src, spec=plan.spec, fs_out=fs_out,
               delivery=delivery, plan=plan, output=out, frames_out=frames_out, passes=passes,
               block_frames=_block_frames(block_frames), time_base=time_base, speed=speed,
               channels_out=channels_out, filter_applied=filter_applied)


def run(job, *, progress=None, cancel=None):
    """Run a prepared :class:`Job`; returns a :class:`webapp.pipeline.ConversionResult`."""
    return pipeline.execute(job, progress=progress, cancel=cancel)


def convert_file(source, target, *, fs_out, progress=None, cancel=None, **options):
    """:func:`prepare` then :func:`run` (the options are :func:`prepare`'s)."""
    return run(prepare(source, target, fs_out=fs_out, **options), progress=progress,
               cancel=cancel)


# ---------------------------------------------------------------------------------------------
# recipe re-runs

class RecipeMismatch(ParameterError):
    """A re-run differs from its recipe; ``differences`` lists (field, recipe's, re-run's)."""

    def __init__(self, differences):
        self.differences = list(differences)
        first = self.differences[0]
        more = len(self.differences) - 1
        text = (f"the re-run does not reproduce the recipe: {first[0]} is {_short(first[2])} "
                f"but the recipe records {_short(first[1])}")
        if more:
            names = ", ".join(d[0] for d in self.differences[1:6])
            text += f" (and {more} more: {names}{', ...' if more > 5 else ''})"
        versions = [d for d in self.differences if d[0] == "software.version"]
        if versions:
            text += (f"; the recipe was written by Rateferry {versions[0][1]} and this is "
                     f"{versions[0][2]}: re-run it with {versions[0][1]} to reproduce it bit for "
                     f"bit")
        super().__init__(text, first[0])


def _short(value):
    text = repr(value)
    return text if len(text) <= 80 else text[:77] + "..."


@dataclass(frozen=True)
class Rerun:
    """A recipe re-run: the result, and every recorded field that came out different."""

    result: object
    recipe: object
    differences: tuple = ()

    @property
    def reproduces(self):
        return not self.differences

    def figures(self):
        return dict(reproduces=self.reproduces,
                    differences=[dict(field=f, recipe=a, rerun=b) for f, a, b in self.differences])

    def require_reproduced(self):
        if self.differences:
            raise RecipeMismatch(self.differences)
        return self


def _flatten(value, prefix=""):
    if isinstance(value, dict):
        out = {}
        for k, v in value.items():
            out.update(_flatten(v, f"{prefix}.{k}" if prefix else str(k)))
        return out
    if isinstance(value, list):
        out = {}
        for i, v in enumerate(value):
            out.update(_flatten(v, f"{prefix}[{i}]"))
        if not value:
            out[prefix] = []
        return out
    return {prefix: value}


def _same(a, b):
    if isinstance(a, bool) or isinstance(b, bool):
        return a is b
    if isinstance(a, (int, float)) and isinstance(b, (int, float)):
        if a == b:
            return True
        return math.isclose(a, b, rel_tol=_FIGURE_RTOL, abs_tol=1e-12)
    return a == b


def compare_recipes(recorded, rerun):
    """Fields of two recipe dicts that differ: a list of (dotted field, recorded, re-run)."""
    a, b = _flatten(recorded), _flatten(rerun)
    diffs = []
    for key in sorted(set(a) | set(b)):
        if key in _NOT_COMPARED:
            continue
        if key not in a or key not in b or not _same(a[key], b[key]):
            diffs.append((key, a.get(key), b.get(key)))
    # the output bytes first: when they differ, that is what matters most
    diffs.sort(key=lambda d: d[0] != "output.sha256")
    version = "software.version"
    if diffs and a.get(version) != b.get(version):
        # not a difference on its own, but the likely reason for the others: another version
        # may sum in another order and round the last bit of a sample differently
        diffs.append((version, a.get(version), b.get(version)))
    return diffs


def prepare_rerun(recipe, source, target, *, probe=None, plan=None):
    """The Job a recipe re-run runs: the recipe's spec, rate, delivery and block size, with the
    source checked against the recipe's sha256 before any work (nothing is written for a wrong
    source)."""
    recipe.check_source(source)
    return prepare(source, target, fs_out=recipe.fs_out, spec=recipe.spec,
                   delivery=recipe.delivery, block_frames=recipe.block_frames, probe=probe,
                   plan=plan, time_base=recipe.time_base, speed=recipe.speed,
                   filter_same_rate=recipe.filter_applied)


def rerun(recipe, source, target, *, progress=None, cancel=None, job=None):
    """Re-run ``recipe`` (a :class:`webapp.recipe.Recipe`) on ``source``, writing ``target``.

    Every figure the recipe records is recomputed from the re-run and compared: the design, the
    measured figures, the gain, the frames, the output's sha256. Returns a :class:`Rerun`; its
    ``differences`` are empty when the re-run reproduces the recipe.
    """
    from .recipe import recipe_from_result
    job = job or prepare_rerun(recipe, source, target)
    result = run(job, progress=progress, cancel=cancel)
    now = recipe_from_result(result, source_name=recipe.source_name,
                             output_name=recipe.data["output"]["name"])
    check = Rerun(result=result, recipe=recipe,
                  differences=tuple(compare_recipes(recipe.to_dict(), now)))
    return replace(check, result=replace(result, recipe_check=check.figures()))
