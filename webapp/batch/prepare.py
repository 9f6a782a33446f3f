"""Turn a batch's items into prepared jobs, with one verified design per route.

Every file goes through :func:`webapp.jobs.prepare` exactly as ``rateferry convert`` would, on
the batch's client, before any work: a file that ``convert`` would refuse (unreadable, a format
that can't carry the word length, ...) becomes a failed entry carrying ``convert``'s one-line
message, and the rest go on.

Designs: the plan for a (spec, source rate, target rate) is made once with
:func:`webapp.dsp.stages.verified_plan` and shared by every file on that route (the batch
scatters it to the workers once). A recipe applied to many files is a template (its spec, rate,
delivery and block size); only a file whose sha256 equals the recipe's source is an exact
re-run (:func:`webapp.jobs.prepare_rerun`, every recorded figure compared afterwards).
"""

from dataclasses import dataclass, field
import json
import os

from .. import jobs, media
from ..delivery import Delivery
from ..dsp.errors import ParameterError, RateferryError
from ..dsp.spec import Spec, spec_from_dict
from ..dsp.stages import verified_plan
from .inputs import apply_pattern, check_names
from .ledger import options_hash

__all__ = ["Settings", "Entry", "prepare_entries", "route_key", "USE_OPTIONS", "USE_TEMPLATE",
           "USE_EXACT"]

USE_OPTIONS = "options"
USE_TEMPLATE = "recipe as a template (spec, rate, delivery, block size; no source check)"
USE_EXACT = "exact re-run of the recipe (same source sha256)"
# prepare() needs a target to plan the output format; the name is known only afterwards
_NAME_PROBE = ".rateferry-name-probe"


@dataclass(frozen=True)
class Settings:
    """What applies to every file unless a manifest entry overrides it."""

    out_dir: str
    fs_out: int | None = None
    spec: Spec = field(default_factory=Spec)
    delivery: Delivery = field(default_factory=Delivery)
    block_frames: int = jobs.BLOCK_FRAMES
    format: str | None = None          # output extension with the dot; None: the source's
    name_pattern: str | None = None
    recipe: object = None              # webapp.recipe.Recipe
    filter_same_rate: bool = False     # run the filter on same-rate files too


@dataclass
class Entry:
    """One file of the batch, prepared (``job``) or refused (``error``)."""

    item: object
    name: str
    job: object = None
    route: tuple | None = None
    use: str = USE_OPTIONS
    options_hash: str | None = None
    error: str | None = None

    @property
    def duration_s(self):
        return self.job.probe.duration_s if self.job is not None else 0.0


def route_key(spec, fs_in, fs_out):
    """Hashable key of a design: the spec's fields and both rates."""
    return (json.dumps(spec.to_dict(), sort_keys=True), int(fs_in), int(fs_out))


def _file_settings(item, settings):
    """(spec, delivery, fs_out, block_frames) for one item; bad overrides name their line."""
    recipe = settings.recipe
    base_spec = recipe.spec if recipe else settings.spec
    base_delivery = recipe.delivery if recipe else settings.delivery
    try:
        spec = spec_from_dict(item.spec, base=base_spec) if item.spec else base_spec
        delivery = (Delivery.from_dict({**base_delivery.to_dict(), **item.delivery})
                    if item.delivery else base_delivery)
    except ParameterError as exc:
        raise ParameterError(f"{item.where}: {exc.message}" if item.where else exc.message,
                             exc.field) from None
    fs_out = item.fs_out or (recipe.fs_out if recipe else settings.fs_out)
    if fs_out is None:
        raise ParameterError("batch needs --to HZ (or --recipe FILE, or fs_out in the manifest"
                             f"{' at ' + item.where if item.where else ''})", "fs_out")
    block = recipe.block_frames if recipe else settings.block_frames
    return spec, delivery, fs_out, block


def prepare_entries(items, settings):
    """Entries for ``items`` and the designs they share.

    Returns
    -------
    entries : list of Entry
    plans : dict
        route_key -> Plan.

    Raises
    ------
    ParameterError
        For a bad manifest override, or two inputs that would write the same output name:
        the batch is refused before any work.
    """
    plans, design_errors, entries = {}, {}, []
    for item in items:
        spec, delivery, fs_out, block = _file_settings(item, settings)
        entries.append(_entry(item, settings, spec, delivery, fs_out, block, plans,
                              design_errors))
    check_names((e.name, e.item.given) for e in entries)
    return entries, plans


def _entry(item, settings, spec, delivery, fs_out, block, plans, design_errors):
    ext = settings.format or os.path.splitext(item.source)[1].lower()
    fallback = item.output or apply_pattern(settings.name_pattern, source=item.source,
                                            fs_out=fs_out, bits=None, ext=ext)
    try:
        probe = media.probe(item.source)
        key = route_key(spec, probe.rate_hz, fs_out)
        if key in design_errors:
            raise design_errors[key]
        if key not in plans:
            try:
                plans[key] = verified_plan(spec, probe.rate_hz, fs_out)
            except RateferryError as exc:
                design_errors[key] = exc
                raise
        options = dict(fs_out=fs_out, spec=spec, delivery=delivery, plan=plans[key],
                       block_frames=block, probe=probe,
                       filter_same_rate=settings.filter_same_rate)
        if item.output:
            name = item.output
        else:
            first = jobs.prepare(item.source, os.path.join(settings.out_dir, _NAME_PROBE + ext),
                                 **options)
            name = apply_pattern(settings.name_pattern, source=item.source, fs_out=fs_out,
                                 bits=first.output.bits, ext=ext)
        target = os.path.join(settings.out_dir, name)
        use = USE_OPTIONS
        recipe = settings.recipe
        if recipe is not None:
            use = USE_TEMPLATE
            if not item.spec and not item.delivery and not item.fs_out \
                    and media.sha256_file(item.source) == recipe.source_sha256:
                use = USE_EXACT
        if use == USE_EXACT:
            job = jobs.prepare_rerun(recipe, item.source, target, probe=probe)
        else:
            job = jobs.prepare(item.source, target, **options)
    except RateferryError as exc:
        return Entry(item=item, name=fallback, error=exc.message)
    except OSError as exc:
        return Entry(item=item, name=fallback,
                     error=f"cannot read '{os.path.basename(item.source)}': {exc.strerror}")
    return Entry(item=item, name=name, job=job, route=key, use=use,
                 options_hash=options_hash(job))
