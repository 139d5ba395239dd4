"""Two lanes of work: independent computations on two threads at once.

numpy's array operations and BLAS release the GIL, so two independent passes over large arrays
run on two cores at once (measured in validation/README.md, "User path in memory"). On small data
a thread's start-up is a noticeable share of the work, so below :data:`SECOND_LANE_ROWS` rows, or
on one core, the work runs at once in the caller's thread; the results are the same either way.

Two numpy calls were found to keep the GIL (numpy 2.4, measured by running two copies of a loop on
two threads: no speed-up at all). ``A.T @ B`` on blocks of rows (cross-products, HC meats): the
kernels call ``np.dot(A.T, B)``, the same BLAS product, which lets go. ``np.take(column, rows,
out=...)`` of one strided column: the kernels gather all columns with one
``np.take(X.T, rows, axis=1, mode="clip", out=...)`` into a C-ordered k × m array whose transpose is
the Fortran-ordered block they need (the rows are valid, so "clip" changes nothing). Where a
C-ordered block will do (the binning check), whole rows are gathered with ``np.take(X, rows,
axis=0)``: about three times faster on 16,384 × 7 blocks, and it lets go as well. One-dimensional
gathers, ``np.bincount`` and ``ufunc.at`` keep the GIL; they are short, and kept to one call per block.

Very short calls still pay one GIL hand-over each between the lanes, so the kernels keep their calls
few and long (blocks of thousands of rows, a row of products per call).

Row-wise work on one n × k array (cross-products, Qᵀy, residuals, leverages, HC meats) is split into
two halves of rows by :func:`map_rows`; work started inside a lane runs in that lane. A new n × k
array (Q = XR⁻¹, when asked for; see :mod:`robustmod.thin_qr`) is written by one thread: two threads
writing the fresh pages of one new array were several times slower than one on a virtual machine
(page faults contend).

BLAS thread limits (:mod:`robustmod.blas_threads`) are process-wide: the caller sets the limit around
the whole call, so a limit the work enters and leaves again only repeats it and the two
lanes cannot restore each other's.
"""
from __future__ import annotations

import os
import queue
import threading
from collections.abc import Callable, Sequence
from functools import partial
from typing import Any, TypeVar

T = TypeVar("T")

#: Rows from which work goes to a second thread (specification grids run many small designs).
SECOND_LANE_ROWS = 100_000
#: The halves of :func:`row_halves` split at a multiple of this many rows (the blocks of the kernels).
SPLIT_ALIGN = 1 << 16

_LANE = threading.local()  # set while a thread runs parts: work they start runs in it, not on another thread


def cores() -> int:
    """Cores this process may run on."""
    affinity = getattr(os, "sched_getaffinity", None)
    return len(affinity(0)) if affinity is not None else os.cpu_count() or 1


def run_parts(parts: Sequence[tuple[str, Callable[[], Any]]], rows: int) -> dict[str, Any]:
    """``{name: work()}`` for independent pieces of work, on two threads from :data:`SECOND_LANE_ROWS`
    rows on (this one and one helper thread; each takes the next piece in the given order when it is
    free, so list the long ones first), else one after the other in this thread. The first error, in
    the given order, is raised once every piece has stopped; an interrupt (KeyboardInterrupt) stops
    both lanes from starting further pieces and is raised before any error."""
    if rows < SECOND_LANE_ROWS or cores() < 2 or len(parts) < 2 or getattr(_LANE, "inside", False):
        return {name: work() for name, work in parts}
    results: dict[int, Any] = {}
    errors: dict[int, BaseException] = {}
    stop: list[BaseException] = []  # an interrupt (not an Exception): no further part starts
    claim = threading.Lock()
    following = iter(range(len(parts)))

    def drain() -> None:
        while True:
            with claim:
                i = None if stop else next(following, None)
            if i is None:
                return
            try:
                results[i] = parts[i][1]()
            except Exception as exc:  # noqa: BLE001  (handed to the caller below, in order)
                errors[i] = exc
            except BaseException as exc:  # KeyboardInterrupt, SystemExit: stop both lanes, raise it first
                stop.append(exc)

    done = threading.Event()

    def helped() -> None:
        drain()
        done.set()

    _helper().put(helped)
    _LANE.inside = True
    try:
        drain()
    finally:
        _LANE.inside = False
        done.wait()
    if stop:
        raise stop[0]
    if errors:
        raise errors[min(errors)]
    return {name: results[i] for i, (name, _) in enumerate(parts)}


_HELPER: list[queue.SimpleQueue[Callable[[], Any]]] = []  # the helper thread's queue, once started


def _helper() -> queue.SimpleQueue[Callable[[], Any]]:
    """The queue of the one helper thread (a daemon: it never holds up the end of the process)."""
    with _START:
        if not _HELPER:
            jobs: queue.SimpleQueue[Callable[[], Any]] = queue.SimpleQueue()

            def serve() -> None:
                _LANE.inside = True
                while True:
                    jobs.get()()

            threading.Thread(target=serve, name="robustmod-lane", daemon=True).start()
            _HELPER.append(jobs)
        return _HELPER[0]


_START = threading.Lock()
# A forked child has no helper thread: it starts its own when it needs one.
os.register_at_fork(after_in_child=_HELPER.clear)


def row_halves(n: int) -> list[slice]:
    """The rows 0 … n − 1 in one piece below :data:`SECOND_LANE_ROWS`, else in two halves split at a
    multiple of :data:`SPLIT_ALIGN`. The pieces depend on n alone, never on the cores, so sums over
    them round the same on every machine."""
    if n < SECOND_LANE_ROWS:
        return [slice(0, n)]
    cut = max(SPLIT_ALIGN, (n // 2) // SPLIT_ALIGN * SPLIT_ALIGN)
    return [slice(0, cut), slice(cut, n)]


def map_rows(work: Callable[[slice], T], n: int) -> list[T]:
    """``[work(piece) for piece in row_halves(n)]``, the halves on two threads (:func:`run_parts`)."""
    pieces = row_halves(n)
    got = run_parts([(str(i), partial(work, piece)) for i, piece in enumerate(pieces)], n)
    return [got[str(i)] for i in range(len(pieces))]
