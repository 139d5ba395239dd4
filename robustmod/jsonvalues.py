"""Plain JSON values for the results contract: finite floats or None, lists, str keys.

NaN and infinity never reach a results file (docs/results.md); a quantity that does not exist is None.
"""
from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np


def num(x: Any) -> float | None:
    """A plain JSON float, or None for NaN/inf/None."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def jsonable(obj: Any) -> Any:  # noqa: PLR0911 - one return per kind of value, read top to bottom
    """Plain JSON values all the way down: floats finite or None, arrays to lists, keys to str."""
    if isinstance(obj, Mapping):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [jsonable(v) for v in obj.tolist()]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return num(obj)
    if obj is None or isinstance(obj, str):
        return obj
    return str(obj)
