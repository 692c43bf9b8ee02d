"""The one JSON convention of every command and of the files they write."""

from __future__ import annotations

import json


def strict(obj):
    """``obj`` with every non-finite float as ``None`` and NumPy scalars as Python ones:
    strict JSON (RFC 8259) has no NaN or Infinity, and strict parsers reject them."""
    import math

    import numpy as np

    if isinstance(obj, dict):
        return {str(k): strict(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [strict(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return strict(obj.tolist())
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if obj is None or isinstance(obj, (bool, int, float, str)):
        return obj
    return str(obj)


def json_text(obj) -> str:
    """The one JSON convention of every command: strict JSON, indented, one document."""
    return json.dumps(strict(obj), indent=2, allow_nan=False)


__all__ = ["json_text", "strict"]
