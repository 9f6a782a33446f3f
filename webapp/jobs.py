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
"""

from dataclasses import dataclass, field, replace
import math
import os

from . import media, pipeline
from .delivery import Delivery
from .dsp.channels import output_channels
from .dsp.errors import ParameterError
from .dsp.polyphase import output_length
from .dsp.rates import validate_rate
from .dsp.spec import Spec
from .dsp.stages import as_plan, verified_plan

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


def prepare(source, target, *, fs_out, spec=None, delivery=None, plan=None,
            block_frames=BLOCK_FRAMES, probe=None, filter_same_rate=False):
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
    if plan is None:
        plan = verified_plan(spec, src.rate_hz, fs_out)
    plan = as_plan(plan).require_met()
    if (plan.fs_in, plan.fs_out) != (src.rate_hz, fs_out):
        raise ParameterError(f"the design converts {plan.fs_in} -> {plan.fs_out} Hz but the "
                             f"source is {src.rate_hz} Hz and the target {fs_out} Hz", "design")
    if not isinstance(filter_same_rate, bool):
        raise ParameterError(f"filter_same_rate must be true or false, got {filter_same_rate!r}",
                             "filter_same_rate")
    filter_applied = filter_same_rate or src.rate_hz != fs_out
    frames_out = output_length(src.frames, plan.up, plan.down)
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
               block_frames=_block_frames(block_frames), channels_out=channels_out,
               filter_applied=filter_applied)


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
    return diffs


def prepare_rerun(recipe, source, target, *, probe=None, plan=None):
    """The Job a recipe re-run runs: the recipe's spec, rate, delivery and block size, with the
    source checked against the recipe's sha256 before any work (nothing is written for a wrong
    source)."""
    recipe.check_source(source)
    return prepare(source, target, fs_out=recipe.fs_out, spec=recipe.spec,
                   delivery=recipe.delivery, block_frames=recipe.block_frames, probe=probe,
                   plan=plan, filter_same_rate=recipe.filter_applied)


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
