"""How many BLAS threads the in-memory path uses.

The design build, the cheap back-ends and the diagnostics run many small products (cross-products
of cache-sized blocks, k × k solves) and a few n × k factorizations. Their BLAS threads cost more
in hand-over than they save: at n = 10⁶, k = 7 numpy's lstsq is 0.116 s on two threads and 0.126 s
on one, while on a machine whose other core is busy the two-thread small products ran 10–20× slower
(measured, validation/README.md "User path in memory"). So that path runs on one BLAS thread.
"""
from __future__ import annotations

from contextlib import AbstractContextManager, nullcontext
from typing import Any

_CONTROLLER: list[Any] = []  # one threadpoolctl controller: finding the loaded BLAS libraries costs ~10 ms


def one_blas_thread() -> AbstractContextManager[Any]:
    """A context in which BLAS uses one thread (a no-op without threadpoolctl: only the speed changes)."""
    if not _CONTROLLER:
        try:
            from threadpoolctl import ThreadpoolController  # noqa: PLC0415  (optional; only the speed changes)
        except ImportError:  # pragma: no cover
            return nullcontext()
        _CONTROLLER.append(ThreadpoolController())
    return _CONTROLLER[0].limit(limits=1, user_api="blas")
