"""What a batch converts: files, folders (recursive, by extension) and manifests.

A manifest is a CSV file (a header row; ``.csv``) or JSON lines (one object a line; ``.jsonl``
or ``.ndjson``). Each entry names a ``source`` (relative paths are relative to the manifest's
folder), optionally an ``output`` file name, a target rate ``fs_out`` and per-file overrides:
any :class:`webapp.dsp.spec.Spec` or :class:`webapp.delivery.Delivery` field, by its field
name. In JSON lines the overrides may also be grouped as ``"spec": {...}`` and
``"delivery": {...}``. An empty CSV cell overrides nothing.

Output names come from a pattern (:data:`NAME_PARTS`); the default is
:func:`webapp.jobs.output_name` (the source's stem first, e.g. ``take1_16k_16bit.wav``). Two
inputs that would write the same output name are refused before any work, naming both.
"""

import csv
from dataclasses import dataclass, field, fields
import json
import os
import string

from ..delivery import Delivery
from ..dsp.errors import ParameterError
from ..dsp.spec import Spec
from ..jobs import output_name

__all__ = ["Item", "collect", "read_manifest", "apply_pattern", "check_names",
           "AUDIO_EXTENSIONS", "MANIFEST_EXTENSIONS", "NAME_PARTS"]

#: Files a folder contributes (what libsndfile reads), lower case.
AUDIO_EXTENSIONS = (".wav", ".wave", ".flac", ".aif", ".aiff", ".aifc", ".ogg", ".oga", ".opus",
                    ".w64", ".rf64", ".caf", ".au", ".snd", ".mp3")
MANIFEST_EXTENSIONS = (".csv", ".jsonl", ".ndjson")
#: Parts a file-name pattern may use.
NAME_PARTS = {
    "stem": "the source's file name without its extension",
    "parent": "the name of the source's folder",
    "rate": "the target rate in short form (16k, 44k1)",
    "hz": "the target rate in Hz (16000)",
    "bits": "the word length (16bit, 24bit, 32float, 64float; empty for lossy formats)",
    "format": "the output format's extension without the dot (wav, flac)",
}
_SPEC_FIELDS = {f.name: f for f in fields(Spec)}
_DELIVERY_FIELDS = {f.name: f for f in fields(Delivery)}
_ENTRY_KEYS = ("source", "output", "fs_out")
_TRUE, _FALSE = ("1", "true", "yes"), ("0", "false", "no")


@dataclass(frozen=True)
class Item:
    """One file to convert, as the user asked for it (nothing probed yet)."""

    source: str                      # absolute path
    given: str                       # as written by the user, for messages
    output: str | None = None        # an output file name from a manifest
    fs_out: int | None = None
    spec: dict = field(default_factory=dict)       # overrides, Spec field names
    delivery: dict = field(default_factory=dict)   # overrides, Delivery field names
    where: str = ""                  # "list.csv line 4" when it comes from a manifest


def collect(inputs):
    """Items for the command's INPUT arguments, in the order given (folders sorted).

    Raises
    ------
    ParameterError
        For an input that does not exist, an empty folder, or a bad manifest entry (naming
        the manifest and its line).
    """
    if not inputs:
        raise ParameterError("batch needs at least one input (a file, a folder or a manifest)",
                             "inputs")
    items = []
    for given in inputs:
        path = os.path.abspath(os.fspath(given))
        if os.path.isdir(path):
            found = _walk(path, given)
            if not found:
                raise ParameterError(f"the folder '{given}' holds no audio files (looked for "
                                     f"{', '.join(AUDIO_EXTENSIONS)})", "inputs")
            items.extend(found)
        elif not os.path.exists(path):
            raise ParameterError(f"input '{given}' does not exist", "inputs")
        elif os.path.splitext(path)[1].lower() in MANIFEST_EXTENSIONS:
            items.extend(read_manifest(path))
        else:
            items.append(Item(source=path, given=os.fspath(given)))
    return items


def _walk(folder, given):
    out = []
    for root, dirs, files in os.walk(folder):
        dirs[:] = sorted(d for d in dirs if not d.startswith("."))
        for name in sorted(files):
            if name.startswith(".") or os.path.splitext(name)[1].lower() not in AUDIO_EXTENSIONS:
                continue   # hidden files include our own partial outputs
            path = os.path.join(root, name)
            out.append(Item(source=path, given=os.path.join(os.fspath(given),
                                                            os.path.relpath(path, folder))))
    return out


def read_manifest(path):
    """Items of a CSV or JSON-lines manifest (see the module notes)."""
    name = os.path.basename(path)
    try:
        with open(path, encoding="utf-8-sig", newline="") as f:
            if path.lower().endswith(".csv"):
                rows = [(i + 2, row) for i, row in enumerate(csv.DictReader(f))]
            else:
                rows = []
                for i, line in enumerate(f, start=1):
                    if line.strip():
                        rows.append((i, _json_line(line, name, i)))
    except OSError as exc:
        raise ParameterError(f"cannot read the manifest '{name}': {exc.strerror}",
                             "inputs") from None
    except UnicodeDecodeError:
        raise ParameterError(f"the manifest '{name}' is not UTF-8 text", "inputs") from None
    except csv.Error as exc:
        raise ParameterError(f"the manifest '{name}' is not valid CSV: {exc}", "inputs") from None
    if not rows:
        raise ParameterError(f"the manifest '{name}' lists no files", "inputs")
    folder = os.path.dirname(path)
    return [_entry(row, folder, f"{name} line {line}") for line, row in rows]


def _json_line(line, name, number):
    try:
        value = json.loads(line)
    except ValueError as exc:
        raise ParameterError(f"{name} line {number}: not valid JSON ({exc.msg})",
                             "inputs") from None
    if not isinstance(value, dict):
        raise ParameterError(f"{name} line {number}: each line must be a JSON object",
                             "inputs")
    return value


def _entry(row, folder, where):
    row = {k.strip() if isinstance(k, str) else k: v for k, v in row.items()
           if not (v is None or (isinstance(v, str) and v.strip() == ""))}
    if None in row:
        raise ParameterError(f"{where}: more cells than the header has names", "inputs")
    source = row.get("source")
    if not isinstance(source, str) or not source.strip():
        raise ParameterError(f"{where}: 'source' (the file to convert) is required", "source")
    spec = dict(row.pop("spec", None) or {})
    delivery = dict(row.pop("delivery", None) or {})
    if not isinstance(spec, dict) or not isinstance(delivery, dict):
        raise ParameterError(f"{where}: 'spec' and 'delivery' must be JSON objects", "inputs")
    for key, value in row.items():
        if key in _ENTRY_KEYS:
            continue
        if key in _SPEC_FIELDS:
            spec[key] = _cell(key, value, _SPEC_FIELDS[key].type, where)
        elif key in _DELIVERY_FIELDS:
            delivery[key] = _cell(key, value, _DELIVERY_FIELDS[key].type, where)
        else:
            known = ", ".join(list(_ENTRY_KEYS) + sorted(_SPEC_FIELDS) + sorted(_DELIVERY_FIELDS))
            raise ParameterError(f"{where}: unknown column {key!r}; known: {known}", key)
    out = row.get("output")
    if out is not None:
        out = str(out).strip()
        if os.path.basename(out) != out or out in (".", ".."):
            raise ParameterError(f"{where}: output must be a file name without a folder, got "
                                 f"{out!r}", "output")
    fs_out = row.get("fs_out")
    if fs_out is not None:
        fs_out = _cell("fs_out", fs_out, "int", where)
    source = source.strip()
    return Item(source=os.path.abspath(os.path.join(folder, source)), given=source,
                output=out, fs_out=fs_out, spec=spec, delivery=delivery, where=where)


def _cell(key, value, kind, where):
    """A CSV cell (text) as the field's type; JSON values pass through for the field to check."""
    if not isinstance(value, str):
        return value
    text = value.strip()
    kind = str(kind)
    try:
        if "bool" in kind:
            if text.lower() in _TRUE:
                return True
            if text.lower() in _FALSE:
                return False
            raise ValueError
        if kind == "int":
            return int(text)
        if "float" in kind:
            return float(text)
    except ValueError:
        raise ParameterError(f"{where}: {key} must be {kind.replace(' | None', '')}, got "
                             f"{text!r}", key) from None
    return text


# --------------------------------------------------------------------------------------------
# output names

def apply_pattern(pattern, *, source, fs_out, bits, ext):
    """The output file name for one source.

    ``pattern`` None gives :func:`webapp.jobs.output_name` (``<stem>_16k_16bit.wav``); else the
    parts of :data:`NAME_PARTS` in braces, e.g. ``"{parent}_{stem}_{rate}.{format}"``.
    """
    stem = os.path.splitext(os.path.basename(source))[0]
    if pattern is None:
        return output_name(stem, fs_out, bits, ext)
    probe_name = output_name("", fs_out, bits, "")     # "_16k_16bit": the one spelling
    rate_text, _, bits_text = probe_name.lstrip("_").partition("_")
    values = dict(stem=stem, parent=os.path.basename(os.path.dirname(source)), rate=rate_text,
                  hz=str(fs_out), bits=bits_text, format=ext.lstrip("."))
    name = pattern.format(**values)
    if os.path.basename(name) != name or name in ("", ".", ".."):
        raise ParameterError(f"the name pattern must give a file name without a folder, got "
                             f"{name!r} for '{source}'", "name_pattern")
    return name


def check_pattern(pattern):
    """Refuse a pattern with unknown parts or bad braces before any file is looked at."""
    if pattern is None:
        return None
    try:
        parts = [p for _, p, _, _ in string.Formatter().parse(pattern) if p is not None]
    except ValueError as exc:
        raise ParameterError(f"the name pattern {pattern!r} is malformed: {exc}",
                             "name_pattern") from None
    for part in parts:
        if part not in NAME_PARTS:
            raise ParameterError(f"the name pattern may use {', '.join('{' + p + '}' for p in NAME_PARTS)}"
                                 f"; got {{{part}}} in {pattern!r}", "name_pattern")
    if "stem" not in parts:
        raise ParameterError(f"the name pattern must hold {{stem}} so outputs stay apart, got "
                             f"{pattern!r}", "name_pattern")
    return pattern


def check_names(named):
    """Refuse two inputs that would write the same output name, naming both.

    named : iterable of (output name, given source)
    """
    seen = {}
    for name, given in named:
        key = os.path.normcase(name)
        if key in seen:
            first = seen[key]
            if first == given:
                raise ParameterError(f"'{given}' is given twice (both would write '{name}')",
                                     "output")
            raise ParameterError(f"'{first}' and '{given}' would both write '{name}'; rename "
                                 "one or use a name pattern with {parent}", "output")
        seen[key] = given
