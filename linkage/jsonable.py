"""Plain JSON for command output and records: strict RFC 8259, so NaN and
±inf become null (never a silent NaN, never a token a strict parser refuses)."""

from __future__ import annotations

import math

import numpy as np

__all__ = ["jsonable"]


def jsonable(obj):
    """Plain JSON types; NaN and ±inf become None (never a silent NaN in JSON)."""
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        return v if math.isfinite(v) else None
    if isinstance(obj, np.ndarray):
        return jsonable(obj.tolist())
    return obj
