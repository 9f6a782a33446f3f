"""Recipes: the versioned JSON record of a conversion, enough to run it again bit for bit.

A recipe holds the spec, the route, the design that ran (with its measured figures), the
delivery options, the block size, the software version and the SHA-256 of the source and of the
output. :func:`webapp.jobs.rerun` re-runs one and compares every recorded field.

Conventions
-----------
* The format is described by ``webapp/schemas/recipe.schema.json`` (JSON Schema draft 2020-12)
  and validated with the ``jsonschema`` library against that very file, so the documented schema
  and the reader can't drift apart. Errors name the field (dotted path) and the rule.
* Versions: ``version`` is a whole number, currently :data:`RECIPE_VERSION` (2: every
  delivery field, ``filter_applied`` and ``write_passes``). Newer versions are refused with a
  message naming the version; older ones are upgraded step by step through ``_UPGRADES``
  before validation (1 -> 2 fills the defaults version 1 applied, so its re-runs stay
  bit-exact). A JSON object without
  ``"schema": "rateferry-recipe"`` or without ``version`` (a draft from before version 1) is
  refused: there is no released format to upgrade it from, and guessing could re-run a
  different filter.
* A drift correction records its time base (``time_base``: the measured ratio as drift_ppm, the
  offset and the length) and a speed change its factor (``speed``); both are optional fields of
  version 1 (a recipe without them is an ordinary conversion), and a re-run uses them.
* File names in recipes are base names only: a recipe travels, and the folders of the machine
  that wrote it mean nothing elsewhere (and are nobody else's business).
* Files are written atomically: a temporary file in the target's folder, then ``os.replace``.
"""

from dataclasses import dataclass, field
import copy
import datetime as _dt
import functools
import json
import math
import os

import jsonschema
import numpy as np

from . import __version__, media, partials
from . import pipeline
from .delivery import Delivery
from .jsontools import jsonable, loads_checked
from .oserrors import os_error_text
from .dsp.channels import output_channels
from .dsp.errors import ParameterError
from .dsp.rates import SpeedChange, speed_change
from .dsp.rates import route as make_route
from .dsp.spec import Spec, spec_from_dict
from .dsp.timebase import TimeBase

__all__ = ["RECIPE_SCHEMA", "RECIPE_VERSION", "SCHEMA_PATH", "RECIPE_MAX_BYTES", "Recipe",
           "recipe_from_result", "write_recipe", "write_json_atomic", "load_recipe",
           "validate_recipe", "recipe_file_name"]

RECIPE_SCHEMA = "rateferry-recipe"
RECIPE_VERSION = 2
# The Delivery fields recipe version 1 recorded; version 2 records every Delivery field (the
# limiter, loudness tolerance, channel layout and MP3 fields are applied since), whether the
# filter ran (a same-rate job runs none unless asked) and the write passes.
RECIPE_V1_DELIVERY = ("bits", "dither", "dither_seed", "ceiling_dbtp", "loudness_lufs")


def recipe_delivery(delivery):
    """The part of ``delivery.to_dict()`` this recipe version records: all of it."""
    return delivery.to_dict()


def _upgrade_1_to_2(data):
    """Version 1 -> 2: the delivery fields version 1 did not record take their defaults (which
    is what version 1 applied: no limiter, the source's channels, no MP3), the filter ran
    (version 1 filtered same-rate jobs too) and one write pass wrote the file."""
    out = copy.deepcopy(data)
    defaults = Delivery().to_dict()
    if isinstance(out.get("delivery"), dict):
        out["delivery"] = {**{k: v for k, v in defaults.items() if k not in RECIPE_V1_DELIVERY},
                           **out["delivery"]}
    out["version"] = 2
    out.setdefault("filter_applied", True)
    out.setdefault("write_passes", 1)
    return out
SCHEMA_PATH = os.path.join(os.path.dirname(os.path.abspath(__file__)), "schemas",
                           "recipe.schema.json")
#: A recipe is a few kilobytes; anything far larger is not one (and is not read into memory).
RECIPE_MAX_BYTES = 1 << 20


def recipe_file_name(output_name):
    """The recipe's file name beside an output: ``episode_48k_16bit.recipe.json``. The command
    line, the page's download and the sheet all use this one name."""
    return os.path.splitext(os.path.basename(output_name))[0] + ".recipe.json"


@functools.lru_cache(maxsize=1)
def _schema():
    with open(SCHEMA_PATH, encoding="utf-8") as f:
        schema = json.load(f)
    jsonschema.Draft202012Validator.check_schema(schema)
    return jsonschema.Draft202012Validator(schema)


def _json_type(value):
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "boolean"
    if isinstance(value, int):
        return "integer"
    if isinstance(value, float):
        return "integer" if math.isfinite(value) and value.is_integer() else "number"
    if isinstance(value, str):
        return "string"
    if isinstance(value, list):
        return "array"
    if isinstance(value, dict):
        return "object"
    return type(value).__name__


def _describe(value):
    text = json.dumps(value, allow_nan=True) if _json_type(value) in (
        "null", "boolean", "integer", "number", "string") else _json_type(value)
    return text if len(text) <= 80 else text[:77] + "..."


def validate_recipe(data):
    """Check ``data`` (a recipe as a dict) against the current schema.

    Only the schema is checked; :func:`load_recipe` also checks the version, upgrades older
    ones and checks that the parts agree (route, rates, spec values).

    Raises
    ------
    ParameterError
        Naming the field (dotted path, e.g. ``spec.ripple_db``), the rule and the value.
    """
    errors = list(_schema().iter_errors(data))
    if errors:
        error = min(errors, key=lambda e: (-len(e.absolute_path), str(e.absolute_path)))
        raise _schema_error(error)
    return data


def _dotted(path):
    out = ""
    for part in path:
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else str(part))
    return out


_RULES = {
    "type": lambda v: f"must be of type {' or '.join(v) if isinstance(v, list) else v}",
    "const": lambda v: f"must be {json.dumps(v)}",
    "enum": lambda v: f"must be one of {', '.join(json.dumps(e) for e in v)}",
    "minimum": lambda v: f"must be at least {v:g}",
    "maximum": lambda v: f"must be at most {v:g}",
    "exclusiveMinimum": lambda v: f"must be more than {v:g}",
    "exclusiveMaximum": lambda v: f"must be less than {v:g}",
    "minLength": lambda v: f"must have at least {v} characters",
    "maxLength": lambda v: f"must have at most {v} characters",
    "pattern": lambda v: f"must match {v}",
}


def _schema_error(error):
    """A ParameterError naming the field (dotted path) and the rule of a jsonschema error."""
    where = _dotted(error.absolute_path)
    if error.validator == "required":
        missing = [n for n in error.validator_value if n not in error.instance][0]
        name = f"{where}.{missing}" if where else missing
        return ParameterError(f"recipe field {name} is missing (it is required)", name)
    if error.validator == "additionalProperties":
        known = set(error.schema.get("properties", {}))
        extra = sorted(set(error.instance) - known)[0]
        name = f"{where}.{extra}" if where else extra
        return ParameterError(f"recipe field {name} is not part of recipe version "
                              f"{RECIPE_VERSION}", name)
    name = where or "recipe"
    rule = _RULES.get(error.validator, lambda v: f"breaks the schema rule {error.validator}")(
        error.validator_value)
    return ParameterError(f"recipe field {name} {rule}, got {_describe(error.instance)}", name)


# ---------------------------------------------------------------------------------------------
# recipes

# version -> function turning a recipe of that version into one of version + 1
_UPGRADES = {1: _upgrade_1_to_2}


@dataclass(frozen=True)
class Recipe:
    """A loaded, validated recipe: what a re-run needs, and the record it came with.

    Attributes
    ----------
    spec : Spec
    fs_in, fs_out : int
    delivery : pipeline.Delivery
    block_frames : int
        The block size the original conversion read with.
    source_name, source_sha256, output_sha256 : str
    version : int
        The version the file was written in (before any upgrade).
    time_base : TimeBase or None
        The drift correction the conversion applied.
    speed : SpeedChange or None
        The speed change the conversion applied.
    data : dict
        The whole recipe (current version), as plain JSON types.
    """

    spec: Spec
    fs_in: int
    fs_out: int
    delivery: Delivery
    block_frames: int
    source_name: str
    source_sha256: str
    output_sha256: str
    version: int
    data: dict = field(repr=False)
    time_base: TimeBase | None = None
    speed: SpeedChange | None = None
    filter_applied: bool = True

    def to_dict(self):
        """A deep copy of the recipe as plain JSON types."""
        return copy.deepcopy(self.data)

    def check_source(self, source):
        """Raise ParameterError unless ``source`` is the recipe's source file.

        Parameters
        ----------
        source : ConversionResult or path
            A result (its ``source_sha256`` is compared) or a file, which is hashed; checking
            the file before converting means nothing is written for a wrong source.
        """
        if hasattr(source, "source_sha256"):
            got = source.source_sha256
            name = os.path.basename(source.source_path)
        else:
            try:
                got = media.sha256_file(source)
            except OSError as exc:
                raise ParameterError(f"cannot read the source '{os.path.basename(source)}' to "
                                     f"check it against the recipe: {exc.strerror}",
                                     "source") from None
            name = os.path.basename(os.fspath(source))
        if got != self.source_sha256:
            raise ParameterError(
                f"the recipe was made from '{self.source_name}' (sha256 "
                f"{self.source_sha256[:16]}...); '{name}' has sha256 {got[:16]}..., a different "
                "file, so the recipe can't reproduce its output", "source")
        return True

    def reproduces(self, result):
        """True when ``result`` wrote exactly the recipe's output (same SHA-256 of the bytes)."""
        return result.output_sha256 == self.output_sha256


def _created_text(created):
    if created is None:
        created = _dt.datetime.now(_dt.timezone.utc)
    if isinstance(created, str):
        return created
    if created.tzinfo is None:
        raise ParameterError("created must carry a time zone (UTC is written)", "created")
    return created.astimezone(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def _without_timings(figures):
    out = {k: v for k, v in figures.items() if k != "design_ms"}
    if isinstance(out.get("stages"), list):
        out["stages"] = [_without_timings(s) for s in out["stages"]]
    return out


def _block_frames_of(result, block_frames):
    if block_frames is None:
        block_frames = getattr(result, "block_frames", None) or getattr(result, "blocksize", None)
    if block_frames is None:
        block_frames = pipeline.BLOCK_FRAMES
    if isinstance(block_frames, bool) or not isinstance(block_frames, (int, np.integer)) \
            or block_frames < 1:
        raise ParameterError(f"block_frames must be a whole number of at least 1, got "
                             f"{block_frames!r}", "block_frames")
    return int(block_frames)


def _base_name(name, path, field_name):
    if name is None:
        return os.path.basename(os.fspath(path))
    if not isinstance(name, str):
        raise ParameterError(f"{field_name} must be text, got {type(name).__name__}", field_name)
    base = os.path.basename(name.replace("\\", "/"))
    if not base:
        raise ParameterError(f"{field_name} must be a file name, got {name!r}", field_name)
    return base


def recipe_from_result(result, *, block_frames=None, created=None, source_name=None,
                       output_name=None):
    """The recipe of a conversion, as a dict of plain JSON types (validated).

    Parameters
    ----------
    result : pipeline.ConversionResult
    block_frames : int, optional
        The blocksize the conversion used. Default: ``result.block_frames`` if the result
        carries one, else :data:`webapp.pipeline.BLOCK_FRAMES`.
    created : datetime (aware) or str, optional
        Default: now, UTC.
    source_name, output_name : str, optional
        The names to record (the web app stores uploads under ids and passes the user's own
        names here). Default: the base names of ``result.source_path`` / ``output_path``. Only
        the base name of what is given is kept.

    Returns
    -------
    dict
    """
    probe = result.source_probe
    design = result.plan
    speed = getattr(result, "speed", None)
    time_base = getattr(result, "time_base", None)
    up, down = (speed.up, speed.down) if speed is not None else (design.up, design.down)
    data = {
        "schema": RECIPE_SCHEMA,
        "version": RECIPE_VERSION,
        "created": _created_text(created),
        "software": {"name": "rateferry", "version": result.version},
        "source": {
            "name": _base_name(source_name, result.source_path, "source_name"),
            "sha256": result.source_sha256,
            "format": probe.format,
            "subtype": probe.subtype,
            "rate_hz": int(result.fs_in),
            "channels": int(result.channels),
            "frames": int(result.frames_in),
            "duration_s": float(probe.duration_s),
        },
        "output": {
            "name": _base_name(output_name, result.output_path, "output_name"),
            "sha256": result.output_sha256,
            "format": result.output_format,
            "subtype": result.output_subtype,
            "bits": result.bits,
            "rate_hz": int(result.fs_out),
            "channels": int(result.channels_out or result.channels),
            "frames": int(result.frames_out),
        },
        "route": {"fs_in": int(result.fs_in), "fs_out": int(result.fs_out),
                  "up": int(up), "down": int(down)},
        "spec": jsonable(result.spec.to_dict()),
        "design": jsonable(_without_timings(design.figures())),
        "delivery": jsonable(recipe_delivery(result.delivery)),
        "gain_db": float(result.gain_db),
        "gain_reason": result.gain_reason,
        "block_frames": _block_frames_of(result, block_frames),
        "passes": int(result.passes),
        "write_passes": int((result.delivery_report or {}).get("write_passes", 1)),
        "filter_applied": bool(result.filter_applied),
    }
    if time_base is not None:
        data["time_base"] = jsonable(time_base.to_dict())
    if speed is not None:
        data["speed"] = jsonable(speed.to_dict())
    validate_recipe(data)
    return data


def _dump_json(obj, *, indent=None):
    if indent is None:
        return json.dumps(obj, allow_nan=False, separators=(",", ":"), ensure_ascii=False)
    return json.dumps(obj, allow_nan=False, indent=indent, ensure_ascii=False)


def write_json_atomic(path, text, what):
    """Write ``text`` to ``path`` atomically (a partial file, then a rename onto ``path``)."""
    path = os.fspath(path)
    name = os.path.basename(path) or path
    folder = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(folder):
        raise ParameterError(f"cannot write the {what} '{name}': the folder '{folder}' does not "
                             "exist", what)
    if os.path.isdir(path):
        raise ParameterError(f"cannot write the {what} '{name}': a folder of that name exists",
                             what)
    partial = None
    try:   # a partial file in .rateferry-partial/ (webapp.partials): a crash leaves no lookalike
        partial = partials.create(path)
        with os.fdopen(partial.fd, "w", encoding="utf-8", newline="\n") as f:
            partial.fd = None
            f.write(text)
            f.flush()
            os.fsync(f.fileno())
        partial.finish()
    except OSError as exc:
        if partial is not None:
            partial.discard()
        raise ParameterError(f"cannot write the {what} '{name}': {os_error_text(exc, path)}",
                             what) from None
    except BaseException:
        if partial is not None:
            partial.discard()
        raise
    return path


def write_recipe(result, path, *, block_frames=None, created=None, source_name=None,
                 output_name=None):
    """Write the recipe of ``result`` to ``path`` (JSON, atomically); return the dict.

    See :func:`recipe_from_result` for the options.
    """
    data = recipe_from_result(result, block_frames=block_frames, created=created,
                              source_name=source_name, output_name=output_name)
    write_json_atomic(path, _dump_json(data, indent=2) + "\n", "recipe")
    return data


def _read_source(source):
    """Recipe text or dict from a dict, a path, bytes or a binary/text file object."""
    if isinstance(source, dict):
        return copy.deepcopy(source)
    if isinstance(source, (bytes, bytearray)):
        raw, name = bytes(source), "recipe"
    elif isinstance(source, str) and source.lstrip().startswith("{"):
        raw, name = source, "recipe"      # JSON text, not a file name
    elif hasattr(source, "read"):
        raw, name = source.read(RECIPE_MAX_BYTES + 1), "recipe"
    elif isinstance(source, (str, os.PathLike)):
        name = os.path.basename(os.fspath(source))
        try:
            if os.path.getsize(source) > RECIPE_MAX_BYTES:
                raise ParameterError(f"recipe '{name}' is larger than {RECIPE_MAX_BYTES} bytes; "
                                     "a recipe is a few kilobytes of JSON", "recipe")
            with open(source, "rb") as f:
                raw = f.read()
        except FileNotFoundError:
            raise ParameterError(f"cannot read the recipe '{name}': no such file",
                                 "recipe") from None
        except IsADirectoryError:
            raise ParameterError(f"cannot read the recipe '{name}': it is a folder",
                                 "recipe") from None
        except OSError as exc:
            raise ParameterError(f"cannot read the recipe '{name}': {exc.strerror}",
                                 "recipe") from None
    else:
        raise ParameterError(f"a recipe must be a path, JSON text or a dict, got "
                             f"{type(source).__name__}", "recipe")
    if len(raw) > RECIPE_MAX_BYTES:
        raise ParameterError(f"{name} is larger than {RECIPE_MAX_BYTES} bytes; a recipe is a "
                             "few kilobytes of JSON", "recipe")
    try:   # depth-limited: a recipe nested 100000 levels deep is refused, not recursed
        return loads_checked(raw, name=name)
    except ParameterError as exc:
        raise ParameterError(exc.message, "recipe") from None


def _check_version(data):
    if not isinstance(data, dict):
        raise ParameterError(f"a recipe must be a JSON object, got {_json_type(data)}", "recipe")
    if data.get("schema") != RECIPE_SCHEMA:
        if "schema" not in data:
            raise ParameterError(
                f"this JSON is not a Rateferry recipe: it has no \"schema\": \"{RECIPE_SCHEMA}\" "
                "field", "schema")
        raise ParameterError(f"this JSON is not a Rateferry recipe: schema must be "
                             f"\"{RECIPE_SCHEMA}\", got {_describe(data['schema'])}", "schema")
    if "version" not in data:
        raise ParameterError(
            "the recipe has no version: it is a draft from before recipe version 1, which this "
            "Rateferry does not read; convert again with --write-recipe to get a version 1 "
            "recipe", "version")
    version = data["version"]
    if _json_type(version) != "integer":
        raise ParameterError(f"recipe version must be a whole number, got {_describe(version)}",
                             "version")
    version = int(version)
    if version > RECIPE_VERSION:
        raise ParameterError(
            f"recipe version {version} is newer than this Rateferry {__version__} reads "
            f"(versions 1 to {RECIPE_VERSION}); update Rateferry to re-run it", "version")
    if version < 1:
        raise ParameterError(
            f"recipe version {version} is not a released recipe format (the first is 1); "
            "convert again with --write-recipe to get a version 1 recipe", "version")
    return version


def _as_int(value):
    return int(value) if _json_type(value) == "integer" else value


def load_recipe(source):
    """Read, upgrade and validate a recipe.

    Parameters
    ----------
    source : path, bytes, str, file object or dict
        A JSON file (at most :data:`RECIPE_MAX_BYTES`), its bytes, JSON text (a str starting
        with "{"), a binary file object (an upload), or the parsed dict (e.g. the recipe
        embedded in a design sheet).

    Returns
    -------
    Recipe

    Raises
    ------
    ParameterError
        Unreadable or non-JSON input; not a recipe; no version (a draft before version 1), a
        version below 1 or newer than :data:`RECIPE_VERSION` (the message names it); a field
        breaking the schema (named by its dotted path); parts that disagree (route factors,
        rates, channels); spec or delivery values breaking their own rules.
    """
    data = _read_source(source)
    written = _check_version(data)
    version = written
    while version < RECIPE_VERSION:
        data = _UPGRADES[version](data)
        version += 1
    validate_recipe(data)

    rt = data["route"]
    time_base, speed = _time_base_of(data), _speed_of(data)
    try:
        expected = make_route(rt["fs_in"], rt["fs_out"])
    except ParameterError as exc:
        raise ParameterError(f"recipe route: {exc.message}", f"route.{exc.field}") from None
    design_rates = (rt["fs_in"], rt["fs_out"])
    if speed is not None:       # a speed change runs its own exact factor, designed on its rates
        expected = speed
        design_rates = speed.design_rates()
    if (_as_int(rt["up"]), _as_int(rt["down"])) != (expected.up, expected.down):
        raise ParameterError(
            f"recipe route up/down must be {expected.up}/{expected.down} for "
            f"{expected.fs_in} -> {expected.fs_out} Hz, got {rt['up']}/{rt['down']}", "route")
    checks = [("source.rate_hz", data["source"]["rate_hz"], rt["fs_in"]),
              ("output.rate_hz", data["output"]["rate_hz"], rt["fs_out"]),
              ("design.fs_in", data["design"]["fs_in"], design_rates[0]),
              ("design.fs_out", data["design"]["fs_out"], design_rates[1])]
    for what, part in (("time_base", time_base), ("speed", speed)):
        if part is not None:
            checks += [(f"{what}.fs_in", part.fs_in, rt["fs_in"]),
                       (f"{what}.fs_out", part.fs_out, rt["fs_out"])]
    for name, got, want in checks:
        if got != want:
            raise ParameterError(f"recipe field {name} must equal {want} (the route), got {got}",
                                 name)
    try:
        spec = spec_from_dict(data["spec"], base=Spec())
    except ParameterError as exc:
        raise ParameterError(f"recipe spec: {exc.message}", f"spec.{exc.field}") from None
    d = {k: _as_int(v) if k == "dither_seed" else v for k, v in data["delivery"].items()}
    try:
        delivery = Delivery.from_dict(d)
    except ParameterError as exc:
        raise ParameterError(f"recipe delivery: {exc.message}", f"delivery.{exc.field}") from None
    try:
        channels = output_channels(data["source"]["channels"], delivery.channel_layout,
                                   pick=delivery.pick_channel)
    except ParameterError as exc:
        raise ParameterError(f"recipe delivery: {exc.message}", f"delivery.{exc.field}") from None
    if data["output"]["channels"] != channels:
        raise ParameterError(f"recipe field output.channels must equal {channels} (the source's "
                             f"{data['source']['channels']} in the {delivery.channel_layout!r} "
                             f"layout), got {data['output']['channels']}", "output.channels")
    return Recipe(filter_applied=bool(data["filter_applied"]),
                  spec=spec, fs_in=int(rt["fs_in"]), fs_out=int(rt["fs_out"]),
                  delivery=delivery, block_frames=int(data["block_frames"]),
                  source_name=data["source"]["name"], source_sha256=data["source"]["sha256"],
                  output_sha256=data["output"]["sha256"], version=written, data=data,
                  time_base=time_base, speed=speed)


def _time_base_of(data):
    if "time_base" not in data:
        return None
    tb = data["time_base"]
    try:
        return TimeBase.from_dict({k: _as_int(v) if k in ("fs_in", "fs_out", "frames_out") else v
                                   for k, v in tb.items()})
    except ParameterError as exc:
        raise ParameterError(f"recipe time_base: {exc.message}",
                             f"time_base.{exc.field}") from None


def _speed_of(data):
    if "speed" not in data:
        return None
    sp = data["speed"]
    try:
        change = speed_change(sp["fs_in"], sp["fs_out"], (_as_int(sp["speed_num"]),
                                                          _as_int(sp["speed_den"])))
    except ParameterError as exc:
        raise ParameterError(f"recipe speed: {exc.message}", f"speed.{exc.field}") from None
    if (_as_int(sp["up"]), _as_int(sp["down"])) != (change.up, change.down):
        raise ParameterError(f"recipe speed up/down must be {change.up}/{change.down} for the "
                             f"factor {change.speed_num}/{change.speed_den}, got "
                             f"{sp['up']}/{sp['down']}", "speed")
    return change
