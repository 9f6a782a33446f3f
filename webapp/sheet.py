"""Design sheets (one self-contained HTML file) and recipes (versioned JSON) of a conversion.

A recipe holds everything needed to run a conversion again and get the same bytes: the spec,
the route, the design that ran, the delivery options, the block size, the software version and
the SHA-256 of the source and of the output. A design sheet is the record a producer sends to a
colleague: what was done to a recording, why it is safe, with the plots and the recipe inside.

Conventions
-----------
* The recipe format is described by ``webapp/schemas/recipe.schema.json`` (JSON Schema draft
  2020-12). :func:`load_recipe` validates against that very file with a small validator of the
  keywords the schema uses, so the documented schema and the reader can't drift apart and the
  runtime needs no extra package.
* Versions: ``version`` is a whole number, currently :data:`RECIPE_VERSION` (1, the first).
  Newer versions are refused with a message naming the version; older ones are upgraded step by
  step through ``_UPGRADES`` before validation (none exist yet). A JSON object without
  ``"schema": "rateferry-recipe"`` or without ``version`` (a draft from before version 1) is
  refused: there is no released format to upgrade it from, and guessing could re-run a
  different filter.
* File names in recipes and sheets are base names only: a recipe travels, and the folders of
  the machine that wrote it mean nothing elsewhere (and are nobody else's business).
* The sheet makes no external request: plotly.js comes inlined from the installed plotly
  package, the data sits in ``<script type="application/json">`` elements, a short inline
  script draws the plots, and a Content-Security-Policy (``default-src 'none'``) makes the
  browser refuse any fetch, image or font from elsewhere. All user text goes through
  ``html.escape``; JSON in the page has ``<``, ``>`` and ``&`` written as ``\\u003c`` etc.
* Plotted curves are bounded (about 1500 points each; the impulse 3000): responses keep the
  peak of each band (the worst case against the mask shows) plus the exact band edges; long
  curves keep the min and max of each bucket. The sheet stays near 5.1 MB, of which plotly.js
  is 4.8 MB (budget :data:`SHEET_BUDGET_BYTES`). Spectra come from the middle
  ``SPECTRUM_EXCERPT_S`` seconds of source and output.
* Files are written atomically: a temporary file in the target's folder, then ``os.replace``.
"""

from dataclasses import dataclass, field
import copy
import datetime as _dt
import functools
import html
import json
import math
import os
import re

import numpy as np

from . import __version__
from . import media, partials
from . import pipeline
from .delivery import Delivery
from .jsontools import jsonable, loads_checked
from .oserrors import os_error_text
from .dsp.errors import ParameterError, RateferryError
from .dsp.rates import route as make_route
from .dsp.spec import Spec, spec_from_dict
from .dsp.spectrum import db, decimate_for_plot, dense_response, response_at, welch_spectrum

__all__ = ["RECIPE_SCHEMA", "RECIPE_VERSION", "SCHEMA_PATH", "SHEET_BUDGET_BYTES",
           "RECIPE_MAX_BYTES", "Recipe", "recipe_from_result", "write_recipe", "load_recipe",
           "validate_recipe", "sheet_html", "write_sheet"]

RECIPE_SCHEMA = "rateferry-recipe"
RECIPE_VERSION = 1
SCHEMA_PATH = os.path.join(os.path.dirname(os.path.abspath(__file__)), "schemas",
                           "recipe.schema.json")
#: The sheet must stay under this size (plotly.js alone is about 4.8 MB).
SHEET_BUDGET_BYTES = 6 * 1000 * 1000
#: A recipe is a few kilobytes; anything far larger is not one (and is not read into memory).
RECIPE_MAX_BYTES = 1 << 20
#: Longest stretch of audio the sheet's spectra are computed from (centred in the file).
SPECTRUM_EXCERPT_S = 20.0
_TEXT_LIMITS = {"title": 200, "author": 200, "note": 10000}
_CURVE_POINTS = 1500
_IMPULSE_POINTS = 3000
_IMPULSE_FLOOR = 1e-6          # the impulse plot spans taps above -120 dB of the peak
_FREQ_DIGITS = 7               # significant digits kept in plotted curves (size budget)
_LEVEL_DIGITS = 6


# ============================================================================================
# the schema and its validator

# The keywords the validator implements; a schema using any other keyword is refused when it is
# loaded, so a schema edit can't silently go unchecked.
_KEYWORDS = frozenset({
    "$schema", "$id", "$defs", "$ref", "$comment", "title", "description", "type", "properties",
    "required", "additionalProperties", "enum", "const", "minimum", "maximum",
    "exclusiveMinimum", "pattern", "items", "minLength", "maxLength",
})


@functools.lru_cache(maxsize=1)
def _schema():
    with open(SCHEMA_PATH, encoding="utf-8") as f:
        schema = json.load(f)
    _check_keywords(schema, "#")
    return schema


def _check_keywords(node, where):
    if not isinstance(node, dict):
        return
    unknown = set(node) - _KEYWORDS
    if unknown:
        raise RuntimeError(f"recipe schema uses unsupported keyword {sorted(unknown)[0]!r} at "
                           f"{where}")
    for name, sub in node.get("properties", {}).items():
        _check_keywords(sub, f"{where}/properties/{name}")
    for name, sub in node.get("$defs", {}).items():
        _check_keywords(sub, f"{where}/$defs/{name}")
    for key in ("items", "additionalProperties"):
        if isinstance(node.get(key), dict):
            _check_keywords(node[key], f"{where}/{key}")


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


def _json_equal(a, b):
    # JSON Schema: true is not 1, 1.0 is 1
    if isinstance(a, bool) or isinstance(b, bool):
        return isinstance(a, bool) and isinstance(b, bool) and a == b
    return a == b


def _describe(value):
    text = json.dumps(value, allow_nan=True) if _json_type(value) in (
        "null", "boolean", "integer", "number", "string") else _json_type(value)
    return text if len(text) <= 80 else text[:77] + "..."


def _fail(where, rule, value):
    name = where or "recipe"
    raise ParameterError(f"recipe field {name} {rule}, got {_describe(value)}", name)


def _validate(value, schema, where, root):
    if "$ref" in schema:
        ref = schema["$ref"]
        if not ref.startswith("#/$defs/"):
            raise RuntimeError(f"recipe schema: unsupported $ref {ref!r}")
        _validate(value, root["$defs"][ref[len("#/$defs/"):]], where, root)
    kind = _json_type(value)
    if "type" in schema:
        allowed = schema["type"] if isinstance(schema["type"], list) else [schema["type"]]
        ok = kind in allowed or (kind == "integer" and "number" in allowed)
        if not ok:
            _fail(where, f"must be of type {' or '.join(allowed)}", value)
    if "const" in schema and not _json_equal(value, schema["const"]):
        _fail(where, f"must be {json.dumps(schema['const'])}", value)
    if "enum" in schema and not any(_json_equal(value, e) for e in schema["enum"]):
        _fail(where, f"must be one of {', '.join(json.dumps(e) for e in schema['enum'])}", value)
    if kind in ("integer", "number"):
        if "minimum" in schema and value < schema["minimum"]:
            _fail(where, f"must be at least {schema['minimum']:g}", value)
        if "maximum" in schema and value > schema["maximum"]:
            _fail(where, f"must be at most {schema['maximum']:g}", value)
        if "exclusiveMinimum" in schema and value <= schema["exclusiveMinimum"]:
            _fail(where, f"must be more than {schema['exclusiveMinimum']:g}", value)
    if kind == "string":
        if "minLength" in schema and len(value) < schema["minLength"]:
            _fail(where, f"must have at least {schema['minLength']} characters", value)
        if "maxLength" in schema and len(value) > schema["maxLength"]:
            _fail(where, f"must have at most {schema['maxLength']} characters", value)
        if "pattern" in schema and re.search(schema["pattern"], value) is None:
            _fail(where, f"must match {schema['pattern']}", value)
    if kind == "object":
        props = schema.get("properties", {})
        for name in schema.get("required", ()):
            if name not in value:
                label = f"{where}.{name}" if where else name
                raise ParameterError(f"recipe field {label} is missing (it is required)", label)
        extra = schema.get("additionalProperties", True)
        for name, sub in value.items():
            label = f"{where}.{name}" if where else name
            if name in props:
                _validate(sub, props[name], label, root)
            elif extra is False:
                raise ParameterError(f"recipe field {label} is not part of recipe version "
                                     f"{RECIPE_VERSION}", label)
            elif isinstance(extra, dict):
                _validate(sub, extra, label, root)
    if kind == "array" and "items" in schema:
        for i, item in enumerate(value):
            _validate(item, schema["items"], f"{where}[{i}]", root)


def validate_recipe(data):
    """Check ``data`` (a recipe as a dict) against the current schema.

    Only the schema is checked; :func:`load_recipe` also checks the version, upgrades older
    ones and checks that the parts agree (route, rates, spec values).

    Raises
    ------
    ParameterError
        Naming the field (dotted path, e.g. ``spec.ripple_db``), the rule and the value.
    """
    schema = _schema()
    _validate(data, schema, "", schema)
    return data


# ============================================================================================
# recipes

# version -> function turning a recipe of that version into one of version + 1
_UPGRADES = {}


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
    design = result.design
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
            "channels": int(result.channels),
            "frames": int(result.frames_out),
        },
        "route": {"fs_in": int(design.fs_in), "fs_out": int(design.fs_out),
                  "up": int(design.up), "down": int(design.down)},
        "spec": jsonable(result.spec.to_dict()),
        "design": jsonable(_without_timings(design.figures())),
        "delivery": jsonable(result.delivery.to_dict()),
        "gain_db": float(result.gain_db),
        "gain_reason": result.gain_reason,
        "block_frames": _block_frames_of(result, block_frames),
        "passes": int(result.passes),
    }
    validate_recipe(data)
    return data


def _dump_json(obj, *, indent=None):
    if indent is None:
        return json.dumps(obj, allow_nan=False, separators=(",", ":"), ensure_ascii=False)
    return json.dumps(obj, allow_nan=False, indent=indent, ensure_ascii=False)


def _write_atomic(path, text, what):
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
    _write_atomic(path, _dump_json(data, indent=2) + "\n", "recipe")
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
    try:
        expected = make_route(rt["fs_in"], rt["fs_out"])
    except ParameterError as exc:
        raise ParameterError(f"recipe route: {exc.message}", f"route.{exc.field}") from None
    if (_as_int(rt["up"]), _as_int(rt["down"])) != (expected.up, expected.down):
        raise ParameterError(
            f"recipe route up/down must be {expected.up}/{expected.down} for "
            f"{expected.fs_in} -> {expected.fs_out} Hz, got {rt['up']}/{rt['down']}", "route")
    checks = [("source.rate_hz", data["source"]["rate_hz"], rt["fs_in"]),
              ("output.rate_hz", data["output"]["rate_hz"], rt["fs_out"]),
              ("output.channels", data["output"]["channels"], data["source"]["channels"]),
              ("design.fs_in", data["design"]["fs_in"], rt["fs_in"]),
              ("design.fs_out", data["design"]["fs_out"], rt["fs_out"])]
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
    return Recipe(spec=spec, fs_in=int(rt["fs_in"]), fs_out=int(rt["fs_out"]),
                  delivery=delivery, block_frames=int(data["block_frames"]),
                  source_name=data["source"]["name"], source_sha256=data["source"]["sha256"],
                  output_sha256=data["output"]["sha256"], version=written, data=data)


# ============================================================================================
# the sheet: data

def _sig(values, digits):
    """Round to ``digits`` significant digits for the page (keeps the file small)."""
    out = []
    for v in np.asarray(values, dtype=np.float64).ravel():
        out.append(float(f"{v:.{digits}g}") if math.isfinite(v) else None)
    return out


def _envelope_index(y, max_points):
    """Indices that keep the shape of a long curve: the min and the max of each bucket."""
    y = np.asarray(y, dtype=np.float64)
    if y.size <= max_points:
        return np.arange(y.size)
    y = np.where(np.isfinite(y), y, np.nan)
    edges = np.linspace(0, y.size, max_points // 2 + 1).astype(np.int64)
    idx = []
    for a, b in zip(edges[:-1], edges[1:]):
        seg = y[a:b]
        if np.isnan(seg).all():
            idx.append(a)
            continue
        i, j = a + int(np.nanargmin(seg)), a + int(np.nanargmax(seg))
        idx.extend((i, j) if i < j else (j, i) if j < i else (i,))
    return np.asarray(idx)


def _envelope(x, y, max_points):
    """The min and the max of each bucket of a long curve, where they fall."""
    idx = _envelope_index(y, max_points)
    return np.asarray(x)[idx], np.asarray(y)[idx]


def _decimate(x, y, max_points, *, log_axis=False):
    """decimate_for_plot (the peak of each bucket), keeping both end points of the curve."""
    x = np.asarray(x)
    y = np.asarray(y)
    if x.size <= max_points:
        return x, y
    dx, dy = decimate_for_plot(x, y, max_points=max_points, log_axis=log_axis)
    inner = (dx > x[0]) & (dx < x[-1])
    return (np.concatenate([x[:1], dx[inner], x[-1:]]),
            np.concatenate([y[:1], dy[inner], y[-1:]]))


def _response(design):
    """|H| (gain normalised) on a uniform grid 0 .. filter rate / 2, and that rate."""
    stages = getattr(design, "stages", None)
    if stages is not None:
        # the cascade is one up L -> H_eq -> down M converter; H_eq is what the plan verifies
        from .dsp.stages import cascade_response
        rate = float(design.fs_in * design.up)
        freqs, mag = cascade_response(stages, rate)
        return freqs, mag, rate
    freqs, H = dense_response(design.taps, design.filter_rate_hz)
    return freqs, np.abs(H) / design.phases, float(design.filter_rate_hz)


def _response_at_edges(design):
    """Exact |H| at the passband and stopband edges (a plan: the product over its stages)."""
    mask = design.mask
    edges = [mask.passband_hz, mask.stopband_hz]
    parts = getattr(design, "stages", None) or [design]
    mag = np.ones(2)
    for d in parts:
        mag *= np.abs(response_at(d.taps, d.filter_rate_hz, edges)) / d.phases
    return np.asarray(edges), mag


def _line(x, y, name, color, *, dash=None, width=1.6):
    trace = {"type": "scatter", "mode": "lines", "x": x, "y": y, "name": name,
             "line": {"color": color, "width": width}, "hoverinfo": "x+y+name"}
    if dash:
        trace["line"]["dash"] = dash
    return trace


def _vline(x, label, color, dash="dot"):
    return {"type": "line", "xref": "x", "yref": "paper", "x0": x, "x1": x, "y0": 0, "y1": 1,
            "line": {"color": color, "width": 1.2, "dash": dash}, "label_text": label}


# Our own palette: ink, a deep sea green for the filter, rust for the mask, slate for limits.
_INK = "#1f2a30"
_FILTER = "#16697a"
_MASK = "#b4532a"
_LIMIT = "#5b6770"
_SOURCE = "#4b5f8a"
_OUTPUT = "#2c8c5a"
_PRERING = "rgba(180, 83, 42, 0.16)"


def _layout(xtitle, ytitle, *, xlog=False, xrange=None, yrange=None, shapes=(), notes=()):
    lay = {
        "margin": {"l": 64, "r": 18, "t": 12, "b": 52},
        "font": {"family": "system-ui, 'Segoe UI', Helvetica, Arial, sans-serif", "size": 12,
                 "color": _INK},
        "paper_bgcolor": "#ffffff", "plot_bgcolor": "#fbfaf7",
        "xaxis": {"title": {"text": xtitle}, "gridcolor": "#e4e1da", "zeroline": False},
        "yaxis": {"title": {"text": ytitle}, "gridcolor": "#e4e1da", "zeroline": False},
        "legend": {"orientation": "h", "y": -0.2, "x": 0},
        "showlegend": True,
        "shapes": [],
        "annotations": [],
    }
    if xlog:
        lay["xaxis"]["type"] = "log"
    if xrange is not None:
        lay["xaxis"]["range"] = list(xrange)
    if yrange is not None:
        lay["yaxis"]["range"] = list(yrange)
    for s in shapes:
        s = dict(s)
        text = s.pop("label_text", None)
        lay["shapes"].append(s)
        if text:
            lay["annotations"].append({"x": s["x0"], "y": 1, "xref": "x", "yref": "paper",
                                       "text": text, "showarrow": False, "xanchor": "left",
                                       "yanchor": "top", "font": {"size": 10, "color": _LIMIT},
                                       "textangle": -90})
    lay["annotations"].extend(notes)
    if xlog:
        # annotations on a log axis take log10 positions
        for a in lay["annotations"]:
            if a.get("xref") == "x" and a["x"] > 0:
                a["x"] = math.log10(a["x"])
    return lay


def _nyquist_shapes(result):
    a, b = result.fs_in / 2.0, result.fs_out / 2.0
    if a == b:
        return [_vline(a, f"Nyquist {a:g} Hz", _LIMIT)]
    return [_vline(a, f"source Nyquist {a:g} Hz", _SOURCE),
            _vline(b, f"target Nyquist {b:g} Hz", _OUTPUT)]


def _response_plots(result):
    design = result.design
    mask = design.mask
    freqs, mag, rate = _response(design)
    # the grid plus the exact edges, so the plot shows what the verdict measured there
    edge_f, edge_mag = _response_at_edges(design)
    order = np.argsort(np.concatenate([freqs, edge_f]), kind="stable")
    freqs = np.concatenate([freqs, edge_f])[order]
    level = db(np.concatenate([mag, edge_mag]))[order]
    top = rate / 2.0
    low = max(freqs[1], 1.0)
    # decimate each band on its own, so no bucket straddles an edge of the mask
    pieces = []
    bands = ((freqs > 0) & (freqs <= mask.passband_hz),
             (freqs > mask.passband_hz) & (freqs < mask.stopband_hz),
             freqs >= mask.stopband_hz)
    for sel, share in zip(bands, (0.4, 0.1, 0.5)):
        if sel.any():
            pieces.append(_decimate(freqs[sel], level[sel], int(_CURVE_POINTS * share),
                                    log_axis=True))
    f_full = np.concatenate([p[0] for p in pieces])
    v_full = np.concatenate([p[1] for p in pieces])
    floor = -mask.attenuation_db - 40.0
    full = {
        "traces": [
            _line(_sig(f_full, _FREQ_DIGITS), _sig(np.maximum(v_full, floor - 20), _LEVEL_DIGITS),
                  "filter response (peak of each band)", _FILTER),
            _line([low, mask.passband_hz], [-mask.ripple_db, -mask.ripple_db],
                  "mask: passband", _MASK, dash="dash", width=2),
            _line([mask.stopband_hz, top], [-mask.attenuation_db, -mask.attenuation_db],
                  "mask: stopband", _MASK, width=2),
        ],
        "layout": _layout("frequency (Hz)", "gain (dB)", xlog=True,
                          xrange=[math.log10(low), math.log10(top)],
                          yrange=[floor, 10], shapes=_nyquist_shapes(result)),
    }
    # passband close-up: to a quarter of the way into the transition band
    edge = mask.passband_hz + 0.25 * (mask.stopband_hz - mask.passband_hz)
    band = freqs <= edge
    f_pb, v_pb = _envelope(freqs[band], level[band], _CURVE_POINTS)
    r = mask.ripple_db
    close = {
        "traces": [
            _line(_sig(f_pb, _FREQ_DIGITS), _sig(v_pb, _LEVEL_DIGITS), "filter response",
                  _FILTER),
            _line([0, mask.passband_hz], [r, r], "mask: +ripple", _MASK, dash="dash", width=2),
            _line([0, mask.passband_hz], [-r, -r], "mask: -ripple", _MASK, dash="dash",
                  width=2),
        ],
        "layout": _layout("frequency (Hz)", "gain (dB)", xrange=[0, edge],
                          yrange=[-3 * r, 3 * r],
                          shapes=[_vline(mask.passband_hz,
                                         f"passband edge {mask.passband_hz:g} Hz", _MASK)]),
    }
    return {"response": full, "passband": close}


def _impulse_trace(taps, rate, phases, name, color):
    h = np.asarray(taps, dtype=np.float64) / phases
    peak = int(np.argmax(np.abs(h)))
    keep = np.nonzero(np.abs(h) >= np.abs(h[peak]) * _IMPULSE_FLOOR)[0]
    a, b = int(keep[0]), int(keep[-1]) + 1
    t_ms = (np.arange(a, b) - peak) / rate * 1000.0
    t, v = _envelope(t_ms, h[a:b], _IMPULSE_POINTS)
    return _line(_sig(t, _FREQ_DIGITS), _sig(v, _LEVEL_DIGITS), name, color, width=1.2)


def _impulse_plot(result):
    design = result.design
    stages = getattr(design, "stages", None)
    parts = list(stages) if stages is not None else [design]
    colours = [_FILTER, _SOURCE, _OUTPUT, _INK]
    traces, shapes, notes = [], [], []
    for i, d in enumerate(parts):
        name = "impulse response" if stages is None else f"stage {i + 1} ({d.up}/{d.down})"
        traces.append(_impulse_trace(d.taps, d.filter_rate_hz, d.phases, name,
                                     colours[i % len(colours)]))
        if d.prering_ms > 0:
            shapes.append({"type": "rect", "xref": "x", "yref": "paper", "x0": -d.prering_ms,
                           "x1": 0, "y0": 0, "y1": 1, "fillcolor": _PRERING, "line":
                           {"width": 0}, "layer": "below"})
            notes.append({"x": -d.prering_ms, "y": 0.98 - 0.08 * i, "xref": "x", "yref": "paper",
                          "text": f"pre-ringing {d.prering_ms:.3g} ms" +
                          ("" if stages is None else f" (stage {i + 1})"),
                          "showarrow": False, "xanchor": "left",
                          "font": {"size": 10, "color": _MASK}})
    return {"traces": traces,
            "layout": _layout("time from the peak (ms)", "amplitude", shapes=shapes,
                              notes=notes)}


def _spectra_plot(result):
    """Welch spectra of the same stretch of source and output, or None and the reason."""
    probe = result.source_probe
    length = min(SPECTRUM_EXCERPT_S, probe.duration_s)
    start = max(0.0, (probe.duration_s - length) / 2.0)
    try:
        src = media.read_excerpt(result.source_path, start_s=start, length_s=length)
        out = media.read_excerpt(result.output_path, start_s=start, length_s=length)
    except (RateferryError, OSError) as exc:
        return None, getattr(exc, "message", str(exc))
    f_in, p_in = welch_spectrum(src, result.fs_in)
    f_out, p_out = welch_spectrum(out, result.fs_out)
    f_in, p_in = _decimate(f_in, p_in, _CURVE_POINTS)
    f_out, p_out = _decimate(f_out, p_out, _CURVE_POINTS)
    mask = result.design.mask
    top = max(result.fs_in, result.fs_out) / 2.0
    shapes = _nyquist_shapes(result) + [
        _vline(mask.passband_hz, f"passband edge {mask.passband_hz:g} Hz", _MASK, dash="dash")]
    plot = {
        "traces": [
            _line(_sig(f_in, _FREQ_DIGITS), _sig(p_in, _LEVEL_DIGITS),
                  f"source ({result.fs_in} Hz)", _SOURCE, width=1.3),
            _line(_sig(f_out, _FREQ_DIGITS), _sig(p_out, _LEVEL_DIGITS),
                  f"output ({result.fs_out} Hz)", _OUTPUT, width=1.3),
        ],
        "layout": _layout("frequency (Hz)", "power density (dB FS/Hz)", xrange=[0, top],
                          shapes=shapes),
        "excerpt": {"start_s": start, "length_s": length,
                    "nyquist_hz": [result.fs_in / 2.0, result.fs_out / 2.0]},
    }
    return plot, ""


def _audit_figures(design, audit):
    """(figures dict or None, note)."""
    if audit is None:
        return None, "not run for this sheet"
    if audit == "auto":
        try:
            from .dsp.audit import audit as run_audit
        except ImportError:
            return None, "the audit module is not available in this installation"
        try:
            audit = run_audit(design)
        except RateferryError as exc:
            return None, f"the audit could not run: {exc.message}"
    if hasattr(audit, "figures"):
        audit = audit.figures()
    if not isinstance(audit, dict):
        raise ParameterError(f"audit must be an audit result, its figures (a dict), \"auto\" or "
                             f"None, got {type(audit).__name__}", "audit")
    return jsonable(audit), ""


def _without_curves(audit_figs):
    """The audit's figures for the page: everything but the raw curves, which can hold tens of
    thousands of points; the plots carry them, reduced (see :func:`_audit_plots`)."""
    if audit_figs is None:
        return None
    return {k: v for k, v in audit_figs.items() if k != "curves"}


_AUDIT_CAPTIONS = {
    "deviation": "Passband deviation measured on the converter's output, beside the prediction "
                 "from the taps, with the ripple limits.",
    "alias": "Alias (downsampling) or image (upsampling) level against the input tone's "
             "frequency, relative to that tone, beside the prediction, with the stopband limit.",
    "impulse": "Impulse response measured at the converter's output (level relative to its "
               "peak).",
}


_LABELS = {"thd_n": "THD+N", "thd_n_limit": "THD+N limit", "prering": "pre-ringing",
           "prering_predicted": "pre-ringing predicted", "alignment_error_us":
           "alignment error (µs)", "audit_ms": "audit time (ms)", "freq": "frequency",
           "input": "input tone frequency"}


def _axis_label(key):
    """"worst_alias_input_hz" -> "worst alias input (Hz)"; a few figures keep trade names."""
    if key in _LABELS:
        return _LABELS[key]
    for suffix, unit in (("_hz", "Hz"), ("_ms", "ms"), ("_dbfs", "dBFS"), ("_db", "dB")):
        if key.endswith(suffix):
            stem = key[:-len(suffix)]
            return f"{_LABELS.get(stem, stem.replace('_', ' '))} ({unit})"
    return key.replace("_", " ")


def _as_floats(values):
    """A JSON list of numbers (None for a missing value) as a float array (nan)."""
    return np.array([np.nan if v is None else v for v in values], dtype=np.float64)


def _audit_plots(figures, mask):
    """Plots of the audit's curves: per curve, the first *_hz / *_ms list against every
    *_db list of the same length (other lists, e.g. flags, are left out)."""
    plots = {}
    curves = figures.get("curves") if isinstance(figures, dict) else None
    if not isinstance(curves, dict):
        return plots
    colours = [_FILTER, _LIMIT, _SOURCE, _OUTPUT, _INK]
    for name, curve in curves.items():
        if not isinstance(curve, dict):
            continue
        lists = {k: v for k, v in curve.items() if isinstance(v, list) and len(v) > 0}
        xs = [k for k in lists if k.endswith(("_hz", "_ms"))]
        if not xs:
            continue
        xk = xs[0]
        ys = [k for k in lists if k.endswith("_db") and len(lists[k]) == len(lists[xk])]
        if not ys:
            continue
        # long curves (the measured impulse) keep their shape at a bounded size
        keep = _envelope_index(_as_floats(lists[ys[0]]), _CURVE_POINTS)
        x = _sig(_as_floats(lists[xk])[keep], _FREQ_DIGITS)
        traces = [dict(_line(x, _sig(_as_floats(lists[k])[keep], _LEVEL_DIGITS),
                             k.replace("_db", "").replace("_", " "),
                             colours[j % len(colours)], width=1.4),
                       mode="lines+markers" if len(x) <= 400 else "lines",
                       marker={"size": 3})
                  for j, k in enumerate(ys)]
        finite = [v for v in x if v is not None]
        if name == "alias" and finite:
            traces.append(_line([min(finite), max(finite)], [-mask.attenuation_db] * 2,
                                "mask: stopband", _MASK, width=2))
        if name == "deviation" and finite:
            for sign, label in ((1, "+ripple"), (-1, "-ripple")):
                traces.append(_line([min(finite), max(finite)], [sign * mask.ripple_db] * 2,
                                    f"mask: {label}", _MASK, dash="dash", width=2))
        caption = _AUDIT_CAPTIONS.get(name, f"Audit curve: {name.replace('_', ' ')}.")
        yrange = [-(mask.attenuation_db + 80.0), 5.0] if name == "impulse" else None
        plots[f"audit-{name}"] = {"title": caption, "traces": traces,
                                  "layout": _layout(_axis_label(xk), "level (dB)",
                                                    yrange=yrange)}
    return plots


def _blind_figures(blind):
    if blind is None:
        return None
    if not isinstance(blind, dict):
        raise ParameterError(f"blind must be a dict of blind-trial results or None, got "
                             f"{type(blind).__name__}", "blind")
    out = jsonable(dict(blind))
    trials, correct = out.get("trials"), out.get("correct")
    if out.get("p_value") is None and isinstance(trials, int) and isinstance(correct, int) \
            and 0 <= correct <= trials > 0:
        # one-sided binomial tail: P(at least `correct` of `trials` right by guessing, p = 1/2)
        out["p_value"] = math.fsum(math.comb(trials, k) for k in range(correct, trials + 1)) \
            / 2.0 ** trials
    return out


# ============================================================================================
# the sheet: markup

_esc = functools.partial(html.escape, quote=True)


def _fmt(value, unit="", digits=4):
    if value is None:
        return "n/a"
    if unit == "Hz":
        digits = max(digits, 7)
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        text = f"{int(value)}"
    elif isinstance(value, (float, np.floating)):
        v = float(value)
        if not math.isfinite(v):
            return "n/a"
        text = f"{v:.{digits}g}" if abs(v) < 1e6 else f"{v:.{digits + 3}g}"
    else:
        text = str(value)
    return _esc(text + (f" {unit}" if unit else ""))


def _cell(key, value, text=None, unit="", digits=4):
    shown = text if text is not None else _fmt(value, unit, digits)
    if key is None:
        return f"<td>{shown}</td>"
    raw = _esc(_dump_json(jsonable(value)))
    cls = ' class="hash"' if key.endswith("sha256") else ""
    return f'<td{cls} data-key="{_esc(key)}" data-value="{raw}">{shown}</td>'


def _table(rows, cls="facts"):
    """rows: (label, key, value[, unit[, text]])."""
    out = [f'<table class="{cls}"><tbody>']
    for row in rows:
        label, key, value = row[:3]
        unit = row[3] if len(row) > 3 else ""
        text = row[4] if len(row) > 4 else None
        out.append(f"<tr><th scope=\"row\">{_esc(label)}</th>{_cell(key, value, text, unit)}"
                   "</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def _verdict_table(rows, *, rules=False):
    """rows: (label, key, measured, unit, limit text, passes[, rule])."""
    head = ["figure", "measured", "limit", "result"] + (["where the limit comes from"]
                                                        if rules else [])
    out = ['<table class="verdict"><thead><tr>'
           + "".join(f'<th scope="col">{_esc(h)}</th>' for h in head) + "</tr></thead><tbody>"]
    for row in rows:
        label, key, measured, unit, limit_text, passes = row[:6]
        out.append(f'<tr class="{"meets" if passes else "fails"}"><th scope="row">'
                   f"{_esc(label)}</th>{_cell(key, measured, unit=unit, digits=5)}"
                   f'<td>{_esc(limit_text)}</td><td class="result">'
                   f"{'meets' if passes else 'FAILS'}</td>")
        if rules:
            out.append(f'<td class="rule">{_esc(row[6] if len(row) > 6 else "")}</td>')
        out.append("</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def _duration_text(seconds):
    m, s = divmod(float(seconds), 60.0)
    h, m = divmod(int(m), 60)
    clock = f"{h}:{m:02d}:{s:06.3f}" if h else f"{m}:{s:06.3f}"
    return f"{seconds:.3f} s ({clock})"


def _plot_div(plot_id, caption):
    return (f'<figure class="plot-figure"><div class="plot" id="plot-{_esc(plot_id)}" '
            f'data-plot="{_esc(plot_id)}"></div><figcaption>{caption}</figcaption></figure>')


def _json_script(element_id, obj):
    text = _dump_json(obj).replace("<", "\\u003c").replace(">", "\\u003e") \
        .replace("&", "\\u0026").replace("\u2028", "\\u2028").replace("\u2029", "\\u2029")
    return f'<script type="application/json" id="{element_id}">{text}</script>'


@functools.lru_cache(maxsize=1)
def _plotly_js():
    import plotly
    path = os.path.join(os.path.dirname(plotly.__file__), "package_data", "plotly.min.js")
    try:
        with open(path, encoding="utf-8") as f:
            js = f.read()
    except OSError as exc:
        raise ParameterError(f"the design sheet needs plotly.js from the plotly package "
                             f"({path}): {exc.strerror}", "sheet") from None
    if re.search(r"</script|<!--", js, re.IGNORECASE):
        # an inline <script> ends at the first "</script"; this bundle can't be inlined as is
        raise ParameterError(f"{path} holds '</script' or '<!--' and can't be inlined",
                             "sheet")
    return js


def _check_text(name, value):
    if value is None:
        return ""
    if not isinstance(value, str):
        raise ParameterError(f"{name} must be text, got {type(value).__name__}", name)
    limit = _TEXT_LIMITS[name]
    if len(value) > limit:
        raise ParameterError(f"{name} must be at most {limit} characters, got {len(value)}",
                             name)
    return value


_CSS = """
:root { --ink: #1f2a30; --muted: #5b6770; --rule: #d9d5cc; --paper: #ffffff;
        --band: #f3f1ec; --filter: #16697a; --mask: #b4532a; --ok: #2c7a4b; --bad: #b02a2a; }
* { box-sizing: border-box; }
body { margin: 0; background: var(--band); color: var(--ink);
       font: 15px/1.45 system-ui, "Segoe UI", Helvetica, Arial, sans-serif; }
main { max-width: 1040px; margin: 0 auto; padding: 24px 20px 48px; }
header.sheet-head { background: var(--paper); border-top: 6px solid var(--filter);
       padding: 20px 24px; margin-bottom: 18px; }
header.sheet-head h1 { margin: 0 0 6px; font-size: 26px; font-weight: 650; }
.byline { color: var(--muted); margin: 0; }
.note { white-space: pre-wrap; margin: 12px 0 0; padding: 10px 12px; background: var(--band);
        border-left: 3px solid var(--mask); }
.verdict-badge { display: inline-block; margin-top: 12px; padding: 4px 10px; font-weight: 600;
        color: #fff; border-radius: 3px; }
.verdict-badge.meets { background: var(--ok); } .verdict-badge.fails { background: var(--bad); }
section.sheet-section { background: var(--paper); padding: 16px 24px 20px; margin: 0 0 18px; }
section.sheet-section h2 { font-size: 19px; margin: 0 0 10px; padding-bottom: 6px;
        border-bottom: 1px solid var(--rule); }
h3 { font-size: 15px; margin: 16px 0 6px; }
.columns { display: grid; grid-template-columns: repeat(auto-fit, minmax(300px, 1fr));
        gap: 6px 28px; }
table { border-collapse: collapse; width: 100%; margin: 4px 0 10px; font-size: 14px; }
th, td { text-align: left; padding: 4px 8px 4px 0; border-bottom: 1px solid #ece9e2;
        vertical-align: top; }
table.facts th { font-weight: 500; color: var(--muted); width: 45%; }
td { font-variant-numeric: tabular-nums; }
td.hash { overflow-wrap: anywhere; font-family: ui-monospace, Menlo, Consolas, monospace;
        font-size: 12px; }
table.verdict thead th, table.stages thead th { color: var(--muted); font-weight: 600; }
tr.fails td.result { color: var(--bad); font-weight: 700; }
tr.meets td.result { color: var(--ok); font-weight: 600; }
table.verdict td.rule { color: var(--muted); font-size: 12px; font-weight: 400; }
.reason { color: var(--muted); font-size: 13px; margin: 2px 0 8px; }
figure.plot-figure { margin: 10px 0 16px; }
.plot { width: 100%; height: 360px; }
figcaption { color: var(--muted); font-size: 13px; margin-top: 2px; }
pre.recipe { background: var(--band); padding: 10px 12px; font-size: 12px; overflow-x: auto;
        max-height: 420px; }
code { font-size: 13px; }
.toolbar { margin: 8px 0 0; } .toolbar button { font: inherit; padding: 4px 12px;
        margin-right: 8px; border: 1px solid var(--filter); background: #fff;
        color: var(--filter); cursor: pointer; }
footer { color: var(--muted); font-size: 13px; text-align: center; }
@media print {
  @page { size: A4; margin: 14mm; }
  body { background: #fff; font-size: 10pt; }
  main { max-width: none; padding: 0; }
  .no-print, button { display: none !important; }
  header.sheet-head, section.sheet-section { padding: 0; margin: 0 0 6mm; }
  section.sheet-section { break-before: page; page-break-before: always; }
  section.sheet-section.first { break-before: auto; page-break-before: auto; }
  figure.plot-figure { break-inside: avoid; page-break-inside: avoid; }
  .plot { width: 180mm !important; height: 88mm !important; }
  pre.recipe { max-height: none; overflow: visible; white-space: pre-wrap;
        word-break: break-all; font-size: 7pt; }
  table { font-size: 9pt; }
}
"""

# Draws the plots from the JSON elements; buttons print and save the recipe. No network use.
_SCRIPT = """
(function () {
  "use strict";
  function data(id) {
    var el = document.getElementById(id);
    return el ? JSON.parse(el.textContent) : null;
  }
  var plots = data("rf-plots") || {};
  var config = {displaylogo: false, responsive: true, showLink: false,
                modeBarButtonsToRemove: ["lasso2d", "select2d", "sendDataToCloud"]};
  var divs = document.querySelectorAll("div.plot[data-plot]");
  Array.prototype.forEach.call(divs, function (div) {
    var p = plots[div.getAttribute("data-plot")];
    if (p && window.Plotly) { window.Plotly.newPlot(div, p.traces, p.layout, config); }
  });
  // A4 at 96 px per inch: 180 mm x 88 mm
  function sizeFor(print) {
    Array.prototype.forEach.call(divs, function (div) {
      if (!div.classList.contains("js-plotly-plot")) { return; }
      if (print) { window.Plotly.relayout(div, {width: 680, height: 332}); }
      else { window.Plotly.relayout(div, {width: null, height: null, autosize: true}); }
    });
  }
  window.addEventListener("beforeprint", function () { sizeFor(true); });
  window.addEventListener("afterprint", function () { sizeFor(false); });
  var printButton = document.getElementById("rf-print");
  if (printButton) { printButton.addEventListener("click", function () { window.print(); }); }
  var saveButton = document.getElementById("rf-save-recipe");
  if (saveButton) {
    saveButton.addEventListener("click", function () {
      var text = JSON.stringify(data("rf-recipe"), null, 2) + "\\n";
      var url = URL.createObjectURL(new Blob([text], {type: "application/json"}));
      var a = document.createElement("a");
      a.href = url;
      a.download = saveButton.getAttribute("data-name");
      document.body.appendChild(a);
      a.click();
      document.body.removeChild(a);
      setTimeout(function () { URL.revokeObjectURL(url); }, 0);
    });
  }
})();
"""

_CSP = ("default-src 'none'; script-src 'unsafe-inline'; style-src 'unsafe-inline'; "
        "img-src data: blob:; font-src data:; connect-src 'none'; form-action 'none'; "
        "base-uri 'none'")


def _design_rows(figs, design):
    rows = [("path", "path", figs.get("path")),
            ("method", "method", figs.get("method")),
            ("phase", "phase", figs.get("phase", design.spec.phase)),
            ("arithmetic", "arithmetic", figs.get("arithmetic", design.spec.arithmetic)),
            ("taps (prototype)", "numtaps", figs.get("numtaps"))]
    if "filter_rate_hz" in figs:
        rows.append(("filter rate", "filter_rate_hz", figs["filter_rate_hz"], "Hz"))
        rows.append(("phases", "phases", figs["phases"]))
        rows.append(("taps per phase", "taps_per_phase", figs["taps_per_phase"]))
        rows.append(("length estimate", "numtaps_estimate", figs["numtaps_estimate"]))
    rows += [("multiply-adds per output sample", "macs_per_output_sample",
              figs.get("macs_per_output_sample")),
             ("MMAC/s per channel", "mmac_per_second", figs.get("mmac_per_second")),
             ("latency", "latency_ms", figs.get("latency_ms"), "ms")]
    if "prering_ms" in figs:
        rows.append(("pre-ringing (above -60 dB)", "prering_ms", figs["prering_ms"], "ms"))
    return rows


def _verdict_rows(figs, mask):
    m = figs["measured"]
    rows = [("passband ripple", "measured.passband_ripple_db", m["passband_ripple_db"], "dB",
             f"at most {mask.ripple_db:g} dB", m["passband_ripple_db"] <= mask.ripple_db),
            ("stopband attenuation", "measured.stopband_attenuation_db",
             m["stopband_attenuation_db"], "dB", f"at least {mask.attenuation_db:g} dB",
             m["stopband_attenuation_db"] >= mask.attenuation_db)]
    if m.get("interpolation_error_db") is not None:
        rows.append(("phase interpolation error", "measured.interpolation_error_db",
                     m["interpolation_error_db"], "dB", f"at most {-mask.attenuation_db:g} dB",
                     m["interpolation_error_db"] <= -mask.attenuation_db))
    return rows


def _stage_table(design):
    out = ['<table class="stages"><thead><tr><th scope="col">stage</th><th scope="col">rates (Hz)'
           '</th><th scope="col">up/down</th><th scope="col">method</th><th scope="col">taps</th>'
           '<th scope="col">taps per phase</th><th scope="col">stopband edge</th>'
           '<th scope="col">ripple</th><th scope="col">attenuation</th></tr></thead><tbody>']
    for i, s in enumerate(design.stages):
        k = f"stages.{i}"
        m = s.measured
        stop_cell = _cell(k + ".measured.stopband_attenuation_db", m.stopband_attenuation_db,
                          unit="dB")
        out.append(
            f"<tr><th scope=\"row\">{i + 1}</th><td>{s.fs_in} &rarr; {s.fs_out}</td>"
            f"<td>{s.up}/{s.down}</td>{_cell(k + '.method', s.method)}"
            f"{_cell(k + '.numtaps', s.numtaps)}{_cell(k + '.taps_per_phase', s.taps_per_phase)}"
            f"{_cell(k + '.mask.stopband_hz', s.mask.stopband_hz, unit='Hz')}"
            f"{_cell(k + '.measured.passband_ripple_db', m.passband_ripple_db, unit='dB')}"
            f"{stop_cell}"
            "</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def _meters_rows(prefix, meters):
    return [("integrated loudness", f"{prefix}.integrated_lufs", meters.get("integrated_lufs"),
             "LUFS"),
            ("loudness range", f"{prefix}.loudness_range_lu", meters.get("loudness_range_lu"),
             "LU"),
            ("true peak", f"{prefix}.true_peak_dbtp", meters.get("true_peak_dbtp"), "dBTP"),
            ("sample peak", f"{prefix}.sample_peak_dbfs", meters.get("sample_peak_dbfs"),
             "dBFS")]


def _audit_section(audit_figs, audit_note, audit_plots):
    parts = ['<section class="sheet-section" id="audit"><h2>Artefact audit</h2>']
    if audit_figs is None:
        parts.append(f'<p class="reason">Audit: {_esc(audit_note)}.</p></section>')
        return "".join(parts)
    parts.append('<p class="reason">The converter itself was run on standard test signals; '
                 "the figures below are measured on its output, not predicted from the taps."
                 "</p>")
    verdict = audit_figs.get("verdict")
    if isinstance(verdict, list) and verdict:
        rows = []
        for i, row in enumerate(verdict):
            unit = row.get("unit") or ""
            limit = row.get("limit")
            rows.append((str(row.get("figure", "")), f"audit.verdict.{i}.measured",
                         row.get("measured"), unit,
                         "n/a" if limit is None else f"{limit:.5g} {unit}".strip(),
                         bool(row.get("passes")), str(row.get("rule") or "")))
        parts.append(_verdict_table(rows, rules=True))
    # the route facts are shown above already
    scalars = [(k, v) for k, v in audit_figs.items()
               if k not in ("verdict", "fs_in", "fs_out", "up", "down", "phase", "arithmetic")
               and (v is None or isinstance(v, (int, float, str, bool)))]
    if scalars:
        half = (len(scalars) + 1) // 2
        rows = [(_axis_label(k), f"audit.{k}", v) for k, v in scalars]
        parts.append('<h3>Measured figures</h3><div class="columns"><div>'
                     f"{_table(rows[:half])}</div><div>{_table(rows[half:])}</div></div>")
    for plot_id, p in audit_plots.items():
        parts.append(_plot_div(plot_id, _esc(p["title"])))
    parts.append("</section>")
    return "".join(parts)


def _blind_section(blind):
    if blind is None:
        return ""
    first = [k for k in ("trials", "correct", "p_value") if k in blind]
    rest = [k for k in blind if k not in first]
    rows = [(k.replace("_", " "), f"blind.{k}", blind[k]) for k in first + rest
            if blind[k] is None or isinstance(blind[k], (int, float, str, bool))]
    text = ""
    p = blind.get("p_value")
    if isinstance(p, (int, float)) and not isinstance(p, bool):
        text = (f"<p class=\"reason\">p is the chance of at least this many right answers by "
                f"guessing alone (one-sided binomial, p = 1/2 per trial): {_fmt(p)}.</p>")
    return ('<section class="sheet-section" id="blind"><h2>Blind listening trials</h2>'
            f"{_table(rows)}{text}</section>")


def _head_html(result, *, title, author, note, created_text, source_name, output_name):
    meets = bool(result.design.meets_mask)
    by = [f"Made {_esc(created_text)}"]
    if author:
        by.append(f'by <span class="author">{_esc(author)}</span>')
    h = [f'<header class="sheet-head"><h1>{_esc(title)}</h1>'
         f'<p class="byline">{" ".join(by)} with Rateferry {_esc(result.version)}</p>']
    if note:
        h.append(f'<p class="note">{_esc(note)}</p>')
    h.append(f'<p><span class="verdict-badge {"meets" if meets else "fails"}">'
             f'{"The filter meets its mask" if meets else "The filter does NOT meet its mask"}'
             f"</span> &nbsp;{_esc(source_name)}: {result.fs_in} Hz &rarr; {result.fs_out} Hz"
             "</p>")
    h.append('<p class="toolbar no-print"><button type="button" id="rf-print">Print or save as '
             f'PDF</button><button type="button" id="rf-save-recipe" data-name="'
             f'{_esc(_recipe_name(output_name))}">Save the recipe</button></p></header>')
    return "".join(h)


def _source_html(result, source_name):
    probe = result.source_probe
    facts = _table([
        ("file", None, source_name),
        ("format", None, f"{probe.format} {probe.subtype}"),
        ("sample rate", "fs_in", result.fs_in, "Hz"),
        ("channels", "channels", result.channels),
        ("duration", None, probe.duration_s, "", _esc(_duration_text(probe.duration_s))),
        ("frames", "frames_in", result.frames_in),
    ])
    meters = _table(_meters_rows("source", result.source_meters)
                    + [("sha256", "source_sha256", result.source_sha256)])
    return ('<section class="sheet-section first" id="source"><h2>Source</h2>'
            f'<div class="columns"><div>{facts}</div><div>{meters}</div></div></section>')


def _route_html(result, figs):
    design, mask, spec = result.design, result.design.mask, result.spec
    edge_key = "mask.{}" if "mask" in figs else None   # a plan's figures carry no mask
    rows = [("route", None, f"{result.fs_in} Hz to {result.fs_out} Hz"),
            ("factors up/down (L/M)", None, f"{design.up}/{design.down}"),
            ("lower Nyquist frequency", None, min(result.fs_in, result.fs_out) / 2.0, "Hz"),
            ("passband edge", edge_key and edge_key.format("passband_hz"), mask.passband_hz,
             "Hz"),
            ("stopband edge", edge_key and edge_key.format("stopband_hz"), mask.stopband_hz,
             "Hz"),
            ("passband ripple limit", None, mask.ripple_db, "dB",
             f"&plusmn; {_fmt(mask.ripple_db, 'dB')}"),
            ("stopband attenuation limit", None, mask.attenuation_db, "dB"),
            ("aliases allowed in the transition band", None, spec.allow_transition_aliasing),
            ("phase asked for", None, spec.phase),
            ("method asked for", None, spec.method),
            ("stages asked for", None, spec.stages)]
    return ('<section class="sheet-section" id="route"><h2>Route and mask</h2>'
            f"{_table(rows)}</section>")


def _design_html(result, figs):
    design = result.design
    h = ['<section class="sheet-section" id="design"><h2>Filter design and verdict</h2>']
    for reason in (figs.get("path_reason"), figs.get("method_reason")):
        if reason:
            h.append(f'<p class="reason">{_esc(reason)}.</p>')
    h.append(f'<div class="columns"><div>{_table(_design_rows(figs, design))}</div>'
             "<div><h3>Measured against the mask</h3>")
    h.append(_verdict_table(_verdict_rows(figs, design.mask)))
    h.append(_table([("worst stopband frequency", "measured.worst_stopband_hz",
                      figs["measured"].get("worst_stopband_hz"), "Hz"),
                     ("meets the mask", "meets_mask", bool(design.meets_mask))]))
    h.append("</div></div>")
    h.append(_plot_div("response", "Response against the mask over the whole prototype range "
                       "(each point is the highest level of its band, so the worst case "
                       "shows), with both Nyquist limits."))
    h.append(_plot_div("passband", "Passband close-up with the ripple limits (each point pair "
                       "is the lowest and highest level of its band)."))
    h.append(_plot_div("impulse", "Impulse response; the shaded part before the peak is the "
                       "pre-ringing (taps above -60 dB of the peak)."))
    if getattr(design, "stages", None) is not None:
        rates = " → ".join(str(r) for r in design.rates)
        h.append(f"<h3>Multistage plan: {_esc(design.label)}</h3>"
                 f'<p class="reason">Rates {_esc(rates)} Hz; the cascade as a whole is '
                 "measured against the mask above.</p>")
        h.append(_stage_table(design))
    h.append("</section>")
    return "".join(h)


def _spectra_html(spectra, note):
    h = ['<section class="sheet-section" id="spectra"><h2>Source and output spectra</h2>']
    if spectra is not None:
        ex = spectra["excerpt"]
        h.append(_plot_div("spectra", f"Welch spectra (Hann window, 50 % overlap) of the same "
                           f"{ex['length_s']:.3g} s of source and output from "
                           f"{ex['start_s']:.3g} s, with both Nyquist limits."))
    else:
        h.append(f'<p class="reason">Spectra not available: {_esc(note)}.</p>')
    h.append("</section>")
    return "".join(h)


def _delivery_html(result, output_name):
    delivery = result.delivery
    dith = delivery.dither if result.bits in ("16", "24") else "none (float or lossy output)"
    chain = _table([
        ("file", None, output_name),
        ("format", None, f"{result.output_format} {result.output_subtype}"),
        ("word length", "bits", result.bits, "", _esc(_word_text(result.bits))),
        ("dither", "delivery.dither", delivery.dither, "", _esc(dith)),
        ("dither seed", "delivery.dither_seed", delivery.dither_seed),
        ("true-peak ceiling", "delivery.ceiling_dbtp", delivery.ceiling_dbtp, "dBTP"),
        ("loudness target", "delivery.loudness_lufs", delivery.loudness_lufs, "LUFS"),
        ("gain applied", "gain_db", result.gain_db, "dB"),
        ("why", "gain_reason", result.gain_reason),
        ("passes", "passes", result.passes),
    ])
    measured = _table([("sample rate", "fs_out", result.fs_out, "Hz"),
                       ("frames", "frames_out", result.frames_out)]
                      + _meters_rows("output", result.output_meters)
                      + [("clipped samples", "clipped_samples", result.clipped_samples),
                         ("sha256", "output_sha256", result.output_sha256)])
    return ('<section class="sheet-section" id="delivery"><h2>Delivery</h2>'
            f'<div class="columns"><div>{chain}</div><div>{measured}</div></div></section>')


def _recipe_html(recipe, source_name, output_name):
    command = " ".join(_shell_word(w) for w in (source_name, output_name))
    return ('<section class="sheet-section" id="recipe"><h2>Recipe</h2>'
            '<p class="reason">Everything needed to reproduce the output bit for bit on the '
            "same machine and software version: save it as JSON and run "
            f"<code>rateferry convert {_esc(command)} --recipe "
            f"{_esc(_shell_word(_recipe_name(output_name)))}</code>.</p>"
            f'<pre class="recipe">{_esc(_dump_json(recipe, indent=2))}</pre></section>')


def sheet_html(result, *, title=None, author=None, note=None, blind=None, audit="auto",
               block_frames=None, created=None, source_name=None, output_name=None):
    """The design sheet of ``result`` as one self-contained HTML document (str).

    Parameters
    ----------
    result : pipeline.ConversionResult
    title, author, note : str, optional
        Free text from the user, shown escaped (at most 200, 200 and 10000 characters).
    blind : dict, optional
        Blind-trial results (``trials``, ``correct``, ``p_value``, ...); None leaves the
        section out. A missing ``p_value`` is computed (one-sided binomial tail).
    audit : "auto", AuditResult, dict or None, optional
        "auto" (the default) runs :func:`webapp.dsp.audit.audit` on the design when that module
        is installed; an AuditResult or its figures are shown as given; None skips the audit.
    block_frames, created, source_name, output_name : optional
        As :func:`recipe_from_result`, for the embedded recipe (the names show on the sheet
        too).

    Returns
    -------
    str

    Raises
    ------
    ParameterError
        For text that is not a string or too long, or a bad ``blind``/``audit`` value.
    """
    title = _check_text("title", title)
    author = _check_text("author", author)
    note = _check_text("note", note)
    blind_figs = _blind_figures(blind)
    recipe = recipe_from_result(result, block_frames=block_frames, created=created,
                                source_name=source_name, output_name=output_name)
    figs = jsonable(result.figures())
    source_name = recipe["source"]["name"]
    output_name = recipe["output"]["name"]
    title = title or f"Design sheet: {source_name}"
    created_text = recipe["created"].replace("T", " ").replace("Z", " UTC")

    plots = _response_plots(result)
    plots["impulse"] = _impulse_plot(result)
    spectra, spectra_note = _spectra_plot(result)
    if spectra is not None:
        plots["spectra"] = spectra
    audit_figs, audit_note = _audit_figures(result.design, audit)
    audit_plots = {} if audit_figs is None else _audit_plots(audit_figs, result.design.mask)
    plots.update(audit_plots)

    return "".join([
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">',
        f'<meta http-equiv="Content-Security-Policy" content="{_CSP}">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f'<meta name="generator" content="Rateferry {_esc(result.version)}">',
        f"<title>{_esc(title)}</title><style>{_CSS}</style></head><body><main>",
        _head_html(result, title=title, author=author, note=note, created_text=created_text,
                   source_name=source_name, output_name=output_name),
        _source_html(result, source_name),
        _route_html(result, figs),
        _design_html(result, figs),
        _spectra_html(spectra, spectra_note),
        _delivery_html(result, output_name),
        _audit_section(audit_figs, audit_note, audit_plots),
        _blind_section(blind_figs),
        _recipe_html(recipe, source_name, output_name),
        f"<footer><p>Rateferry {_esc(result.version)} &middot; sheet made "
        f"{_esc(created_text)}</p></footer></main>",
        _json_script("rf-recipe", recipe),
        _json_script("rf-figures", figs),
        _json_script("rf-audit", _without_curves(audit_figs)),
        _json_script("rf-blind", blind_figs),
        _json_script("rf-plots", plots),
        f'<script id="rf-plotly">{_plotly_js()}</script>',
        f"<script>{_SCRIPT}</script></body></html>\n",
    ])


def _recipe_name(output_name):
    return os.path.splitext(output_name)[0] + ".recipe.json"


def _word_text(bits):
    return {"16": "16-bit integer", "24": "24-bit integer", "32f": "32-bit float",
            "64f": "64-bit float", None: "none (lossy codec)"}.get(bits, str(bits))


def _shell_word(text):
    """Quote a file name for a POSIX shell when it holds anything but plain characters."""
    if re.fullmatch(r"[A-Za-z0-9._+-]+", text):
        return text
    return "'" + text.replace("'", "'\\''") + "'"


def write_sheet(result, path, *, title=None, author=None, note=None, blind=None, audit="auto",
                block_frames=None, created=None, source_name=None, output_name=None):
    """Write the design sheet of ``result`` to ``path`` (atomically); return the path.

    See :func:`sheet_html` for the options.

    Raises
    ------
    ParameterError
        As :func:`sheet_html`, or when the file can't be written; the sheet is then not
        created and an existing file at ``path`` is left as it was.
    """
    text = sheet_html(result, title=title, author=author, note=note, blind=blind, audit=audit,
                      block_frames=block_frames, created=created, source_name=source_name,
                      output_name=output_name)
    return _write_atomic(path, text, "sheet")
