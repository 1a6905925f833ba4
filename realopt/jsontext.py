"""The JSON text of a result: one serializer for ``realopt appraise --json``, sweep points and
results.json, so that the same appraisal always gives the same bytes.

Strict JSON (``allow_nan=False``): numpy scalars and arrays become Python numbers and lists, sets
sorted lists, and non-finite numbers (which JSON cannot hold) ``null``. Floats are written with
Python's shortest round-trip repr, so reading the text back gives the same float64 values.
"""
from __future__ import annotations

import json
import math


def _plain(obj):
    """JSON default: numpy scalars and arrays to Python numbers and lists."""
    if hasattr(obj, "tolist"):
        return obj.tolist()
    if isinstance(obj, (set, frozenset)):
        return sorted(obj)
    raise TypeError(f"{type(obj).__name__} is not JSON serialisable")


def _finite(obj):
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if isinstance(obj, dict):
        return {k: _finite(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_finite(v) for v in obj]
    return obj


def to_json(data) -> str:
    """Strict JSON text, indented by 2 (non-finite numbers become null); no final newline."""
    try:
        return json.dumps(data, indent=2, default=_plain, allow_nan=False)
    except ValueError:
        return json.dumps(_finite(json.loads(json.dumps(data, default=_plain))), indent=2,
                          allow_nan=False)
