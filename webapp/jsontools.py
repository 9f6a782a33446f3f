"""JSON for reports: plain types only; non-finite floats become null."""

import math

import numpy as np

__all__ = ["jsonable"]


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
