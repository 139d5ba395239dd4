"""Memory sizes as the user writes them ("2GB", "512MB", bytes), read without any heavy import."""
from __future__ import annotations

import re
from numbers import Integral
from typing import Any

from .errors import InputError

#: Smallest memory budget accepted (bytes): below it the process itself does not fit.
MIN_BYTES = 64 * 2**20
_UNITS = {"": 1, "b": 1, "k": 2**10, "kb": 2**10, "kib": 2**10, "m": 2**20, "mb": 2**20, "mib": 2**20,
          "g": 2**30, "gb": 2**30, "gib": 2**30, "t": 2**40, "tb": 2**40, "tib": 2**40}
_SIZE = re.compile(r"^\s*(\d+(?:\.\d*)?|\.\d+)\s*([a-zA-Z]*)\s*$")


def parse_memory(value: Any, option: str = "memory") -> int:
    """Bytes of a memory size: a whole number of bytes, or text such as "2GB", "512MB", "1.5GiB"
    (K, M, G, T with or without B or iB, all powers of 1024), at least 64MB. Anything else is a
    one-line InputError naming ``option`` and the fix."""
    name = option if option.startswith("--") else f"The {option!r} option"
    fix = (f"{name} must be a memory size such as 2GB, 512MB or a whole number of bytes (at least 64MB); "
           f"got {value!r}.")
    if isinstance(value, bool):
        raise InputError(fix)
    if isinstance(value, Integral):
        size = int(value)
    elif isinstance(value, float) and value.is_integer():
        size = int(value)
    elif isinstance(value, str) and (m := _SIZE.match(value)) and m.group(2).lower() in _UNITS:
        size = int(float(m.group(1)) * _UNITS[m.group(2).lower()])
    else:
        raise InputError(fix)
    if size < MIN_BYTES:
        raise InputError(fix)
    return size
