"""JSON in and out: plain types for reports (non-finite floats become null); guarded parsing.

:func:`loads_checked` is the one way JSON from outside (a request body, an uploaded recipe) is
read: nesting is limited to :data:`MAX_JSON_DEPTH` levels before the parser runs (Python's
parser recurses once per level and would end in RecursionError around a thousand), NaN and
Infinity are refused (they are not JSON), and every failure is a ParameterError naming the rule.
"""

import json
import math
import re

import numpy as np

from .dsp.errors import ParameterError

__all__ = ["jsonable", "loads_checked", "json_depth", "MAX_JSON_DEPTH"]

#: Deepest nesting of objects and arrays accepted; our bodies and recipes nest at most 6 deep.
MAX_JSON_DEPTH = 64
_STRING = re.compile(rb'"(?:[^"\\]|\\.)*"', re.DOTALL)


def jsonable(value):
    """``value`` with numpy scalars and arrays turned into plain JSON types; nan/inf -> None."""
    if isinstance(value, dict):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return jsonable(value.tolist())
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, (float, np.floating)):
        v = float(value)
        return v if math.isfinite(v) else None
    return value


def json_depth(raw):
    """The deepest nesting of ``[`` / ``{`` in JSON text (bytes or str), strings skipped."""
    if isinstance(raw, str):
        raw = raw.encode("utf-8", "surrogatepass")
    code = np.frombuffer(_STRING.sub(b'""', raw), dtype=np.uint8)
    if code.size == 0:
        return 0
    step = (np.isin(code, (ord("["), ord("{"))).astype(np.int64)
            - np.isin(code, (ord("]"), ord("}"))).astype(np.int64))
    return int(np.cumsum(step).max(initial=0))


def _refuse_constant(name):
    raise ValueError(f"{name} is not a JSON number (numbers must be finite)")


def loads_checked(raw, *, name="the JSON text", max_depth=MAX_JSON_DEPTH):
    """Parse JSON ``raw`` (bytes or str) from outside.

    Raises
    ------
    ParameterError
        (field "body") when the text nests deeper than ``max_depth``, holds NaN/Infinity, is not
        UTF-8 or is not valid JSON; the message names ``name`` and the rule.
    """
    depth = json_depth(raw)
    if depth > max_depth:
        raise ParameterError(f"{name} nests {depth} levels deep; JSON may nest at most "
                             f"{max_depth} levels", "body")
    if isinstance(raw, (bytes, bytearray)):
        try:
            raw = bytes(raw).decode("utf-8-sig")
        except UnicodeDecodeError as exc:
            raise ParameterError(f"{name} is not UTF-8 text (byte {exc.start})", "body") from None
    try:
        return json.loads(raw, parse_constant=_refuse_constant)
    except RecursionError:   # only if the limit above is raised past the parser's own
        raise ParameterError(f"{name} nests too deeply", "body") from None
    except ValueError as exc:
        where = f" at line {exc.lineno}, column {exc.colno}" if hasattr(exc, "lineno") else ""
        reason = exc.msg if hasattr(exc, "msg") else str(exc)
        raise ParameterError(f"{name} is not valid JSON{where}: {reason}", "body") from None
