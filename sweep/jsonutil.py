"""JSON conventions of the command line: inf -> "inf", NaN -> null, complex -> [re, im]."""
from __future__ import annotations

import json
import math
from typing import Any

import numpy as np


def to_jsonable(value: Any) -> Any:
    """Convert numbers, numpy arrays, tuples and dicts to plain JSON-ready values.

    Infinite floats become the strings ``"inf"`` / ``"-inf"``, NaN becomes
    ``None`` and complex numbers become ``[re, im]``.
    """
    if isinstance(value, dict):
        return {str(k): to_jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [to_jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return [to_jsonable(v) for v in value.tolist()]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (complex, np.complexfloating)):
        return [to_jsonable(float(value.real)), to_jsonable(float(value.imag))]
    if isinstance(value, (float, np.floating)):
        f = float(value)
        if math.isnan(f):
            return None
        if math.isinf(f):
            return "inf" if f > 0 else "-inf"
        return f
    return value


def dumps(value: Any) -> str:
    """Serialise with `to_jsonable`, indented, strict JSON (no NaN/Infinity tokens)."""
    return json.dumps(to_jsonable(value), indent=2, allow_nan=False)
