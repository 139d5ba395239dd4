"""Chunks of rows: the unit every streaming kernel consumes, and the size chosen from a memory budget.

A *chunk source* is a callable that starts a new pass over the rows each time it is called and
yields :class:`Chunk` objects in a fixed order. A kernel that needs two passes calls it twice, so
a source must give the same rows in the same order every time (files and in-memory arrays do).
"""
from __future__ import annotations

from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field

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
    positions = np.arange(n) if rows is None else np.asarray(rows)
    extra = dict(columns or {})

    def passes() -> Iterator[Chunk]:
        for a in range(0, n, chunk_rows):
            b = min(n, a + chunk_rows)
            yield Chunk(X[a:b], y[a:b], positions[a:b], {name: v[a:b] for name, v in extra.items()})

    return passes


def mapped(source: ChunkSource, fn: Callable[[Chunk], Chunk]) -> ChunkSource:
    """A chunk source whose chunks are ``fn`` of the chunks of ``source`` (e.g. rows weighted by √wᵢ)."""
    def passes() -> Iterator[Chunk]:
        for chunk in source():
            yield fn(chunk)
    return passes


#: Rows per chunk at most when the rows are in memory already: the kernels' per-chunk n-vectors
#: (masks, bin numbers, residuals of a group) then stay near a megabyte, so they add nothing to
#: the peak beyond the design's own arrays, and the chunk count stays small (16 per 10⁶ rows).
IN_MEMORY_ROWS = 1 << 16


def in_memory_rows(budget_bytes: int, width: int) -> int:
    """Rows per chunk over in-memory arrays: :func:`rows_per_chunk`, at most :data:`IN_MEMORY_ROWS`."""
    return min(rows_per_chunk(budget_bytes, width), IN_MEMORY_ROWS)
