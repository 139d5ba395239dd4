"""Time and peak memory of one call, for the benchmarks (Linux /proc figures where available)."""
from __future__ import annotations

import time
import tracemalloc
from pathlib import Path
from typing import Any


def _status_kib(field: str) -> int | None:
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith(field + ":"):
                return int(line.split()[1])
    except OSError:
        return None
    return None


def measured(fn: Any) -> tuple[Any, float, int]:
    """(result, seconds, peak bytes above what was in use before the call).

    The peak is the larger of tracemalloc's (numpy buffers) and the rise of the resident set
    (LAPACK work space too), the kernel's high-water mark being reset first (Linux clear_refs).
    """
    try:
        Path("/proc/self/clear_refs").write_text("5")
        before = _status_kib("VmRSS")
    except OSError:
        before = None
    tracemalloc.start()
    t0 = time.perf_counter()
    out = fn()
    seconds = time.perf_counter() - t0
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    hwm = _status_kib("VmHWM")
    if before is not None and hwm is not None:
        peak = max(peak, (hwm - before) * 1024)
    return out, seconds, peak
