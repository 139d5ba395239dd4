"""Chunks of rows: the unit every streaming kernel consumes, and the size chosen from a memory budget.

A *chunk source* is a callable that starts a new pass over the rows each time it is called and
yields :class:`Chunk` objects in a fixed order. A kernel that needs two passes calls it twice, so
a source must give the same rows in the same order every time (files and in-memory arrays do).

Each pass of a kernel is a :func:`fold`: an accumulator from ``init()``, updated by ``step(acc, chunk)``
for every chunk. A source split into partitions (a file's row groups or byte blocks, with a
:class:`Plan`) is folded one task per partition on an engine, and the partial accumulators are
combined by their ``merge`` in file order (a tree reduction).
"""
from __future__ import annotations

from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, TypeVar

import numpy as np

from ..errors import option_error

#: Memory budget of one chunk when the caller names none (bytes).
DEFAULT_BUDGET = 256 * 2**20
#: Temporaries a kernel keeps per row, in units of the row's width (X, products, solves, scratch).
WORK_FACTOR = 4
#: Fewest rows a budget-derived chunk holds (tiny chunks cost Python overhead, not memory).
MIN_ROWS = 1024


@dataclass(frozen=True)
class Chunk:
    """Consecutive rows: X (m × k), y (m,), the 0-based position of each row in the user's data,
    and any further per-row columns a kernel needs (moderator, focal, variance regressors …)."""

    X: np.ndarray
    y: np.ndarray
    rows: np.ndarray
    columns: Mapping[str, np.ndarray] = field(default_factory=dict)

    @property
    def size(self) -> int:
        return int(self.y.shape[0])


ChunkSource = Callable[[], Iterator[Chunk]]
A = TypeVar("A")


def rows_per_chunk(budget_bytes: int, width: int, *, factor: int = WORK_FACTOR) -> int:
    """Rows per chunk so that ``factor`` float64 arrays of ``width`` columns fit in ``budget_bytes``.

    ``width`` is the widest per-row array the kernel builds (e.g. 1 + k + k(k+1)/2 columns for
    White's test); the result is at least :data:`MIN_ROWS`.
    """
    if isinstance(budget_bytes, bool) or not isinstance(budget_bytes, (int, np.integer)) or budget_bytes <= 0:
        raise option_error("memory_budget", "a positive whole number of bytes", budget_bytes)
    per_row = 8 * max(int(width), 1) * max(int(factor), 1)
    return max(MIN_ROWS, int(budget_bytes) // per_row)


def array_chunks(X: np.ndarray, y: np.ndarray, *, chunk_rows: int, rows: np.ndarray | None = None,
                 columns: Mapping[str, np.ndarray] | None = None) -> ChunkSource:
    """A chunk source over in-memory arrays (views, no copies), ``chunk_rows`` rows at a time;
    the last chunk holds what is left. ``rows`` default to 0 … n − 1."""
    if isinstance(chunk_rows, bool) or not isinstance(chunk_rows, (int, np.integer)) or chunk_rows < 1:
        raise option_error("chunk_rows", "a whole number ≥ 1", chunk_rows)
    n = int(y.shape[0])
    positions = None if rows is None else np.asarray(rows)  # default: each chunk's own range (no n-vector)
    extra = dict(columns or {})

    def passes() -> Iterator[Chunk]:
        for a in range(0, n, chunk_rows):
            b = min(n, a + chunk_rows)
            at = np.arange(a, b) if positions is None else positions[a:b]
            yield Chunk(X[a:b], y[a:b], at, {name: v[a:b] for name, v in extra.items()})

    return passes


def mapped(source: ChunkSource, fn: Callable[[Chunk], Chunk]) -> ChunkSource:
    """A chunk source whose chunks are ``fn`` of the chunks of ``source`` (e.g. rows weighted by √wᵢ);
    it keeps the partitions of ``source`` (see :func:`fold`)."""
    return Mapped(source, fn)


# ---- passes over partitions: one fold per partition, merged by a tree reduction ----------------------
@dataclass
class Plan:
    """How a source's passes are split: ``engine`` (an :class:`robustmod.engines.Engine` with
    ``map_reduce``) runs one task per item of ``partitions``; ``passes`` counts the passes made."""

    engine: Any
    partitions: Sequence[Any]
    passes: int = 0
    #: Counts and shows the passes (``tasks(partitions) -> on_done``, ``end_tasks()``), e.g. a
    #: :class:`robustmod.stream.PassLog`; None: not shown.
    log: Any = None


def fold(source: Callable[[], Iterator[Any]], init: Callable[[], A], step: Callable[[A, Any], None],
         merge: Callable[[A, A], A] | None = None) -> A:
    """One pass over ``source``: ``acc = init()``, then ``step(acc, item)`` for every item in order.

    A source with a :class:`Plan` (attribute ``plan``) and an ``on(partition)`` method is folded
    partition by partition on the plan's engine, each partition from a fresh ``init()``, and the
    partial accumulators are combined in file order by ``merge(a, b)`` (default ``a.merge(b)``,
    which must give the accumulator of a's rows followed by b's; only rounding may differ from the
    one sequential fold). ``init``, ``step`` and the source are shipped to the workers (cloudpickle).
    """
    plan: Plan | None = getattr(source, "plan", None)
    if plan is None or plan.engine is None or not plan.partitions:
        acc = init()
        for item in source():
            step(acc, item)
        return acc
    plan.passes += 1
    on_done = plan.log.tasks(plan.partitions) if plan.log is not None else None
    try:
        return plan.engine.map_reduce(fold_partition, plan.partitions, merge or merge_pair, state=(source, init, step),
                                      on_done=on_done)
    finally:
        if plan.log is not None:
            plan.log.end_tasks()


def fold_partition(state: tuple[Any, Callable[[], Any], Callable[[Any, Any], None]], partition: Any) -> Any:
    """The accumulator of one partition (a task of :func:`fold`)."""
    source, init, step = state
    acc = init()
    for item in source.on(partition)():
        step(acc, item)
    return acc


def merge_pair(a: Any, b: Any) -> Any:
    """``a.merge(b)``: the accumulator of a's rows followed by b's."""
    return a.merge(b)


class Partitioned:
    """Mixin of sources that may carry a :class:`Plan`; the plan (it holds the engine, which cannot
    travel) is left behind when the source is shipped to a worker."""

    plan: Plan | None = None

    def __getstate__(self) -> dict[str, Any]:
        state = dict(self.__dict__)
        state["plan"] = None
        return state

    def __setstate__(self, state: dict[str, Any]) -> None:
        self.__dict__.update(state)


class Mapped(Partitioned):
    """A chunk source whose chunks are ``fn`` of the chunks of ``source`` (partitions kept)."""

    def __init__(self, source: ChunkSource, fn: Callable[[Chunk], Chunk]) -> None:
        self.source, self.fn = source, fn
        self.plan = getattr(source, "plan", None)

    def __call__(self) -> Iterator[Chunk]:
        for chunk in self.source():
            yield self.fn(chunk)

    def on(self, partition: Any) -> Mapped:
        out = Mapped(self.source.on(partition), self.fn)  # type: ignore[attr-defined]
        out.plan = None
        return out


class ChunkColumn(Partitioned):
    """The values of one per-row column (``chunk.columns[name]``) of a chunk source, chunk by chunk."""

    def __init__(self, source: ChunkSource, name: str) -> None:
        self.source, self.name = source, name
        self.plan = getattr(source, "plan", None)

    def __call__(self) -> Iterator[np.ndarray]:
        for c in self.source():
            yield np.asarray(c.columns[self.name], dtype=float)

    def on(self, partition: Any) -> ChunkColumn:
        out = ChunkColumn(self.source.on(partition), self.name)  # type: ignore[attr-defined]
        out.plan = None
        return out


#: Rows per chunk at most when the rows are in memory already: the kernels' per-chunk n-vectors
#: (masks, bin numbers, residuals of a group) then stay near a megabyte, so they add nothing to
#: the peak beyond the design's own arrays, and the chunk count stays small (16 per 10⁶ rows).
IN_MEMORY_ROWS = 1 << 16


def in_memory_rows(budget_bytes: int, width: int) -> int:
    """Rows per chunk over in-memory arrays: :func:`rows_per_chunk`, at most :data:`IN_MEMORY_ROWS`."""
    return min(rows_per_chunk(budget_bytes, width), IN_MEMORY_ROWS)
