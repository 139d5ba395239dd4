"""Exact order statistics, quantiles and bin medians of one column streamed in chunks.

Each pass narrows, for every wanted rank r (0-based, ascending order), a value interval
[lo, hi] known to hold the r-th smallest value together with the count of values below lo:
a histogram of :data:`BINS` equal-width bins over the interval finds the bin that holds rank
r, and once an interval holds at most :data:`COLLECT_LIMIT` values they are gathered and
sorted. An interval whose values are all equal (ties) is settled at once. Spread-out data
need two passes after the first (n ≤ BINS · COLLECT_LIMIT ≈ 4·10⁹); memory stays at one chunk
plus the gathered values.

Quantiles follow numpy's default ('linear') rule, x₍ᵢ₎ + g·(x₍ᵢ₊₁₎ − x₍ᵢ₎) at the virtual index
q·(n − 1), so they equal ``np.quantile`` on the whole column.

In memory the column can be sorted once (``sorted_values``, e.g. the design's sorted moderator): every
order statistic is then one look-up, and the quantiles, the Goldfeld–Quandt cuts and the bin medians
of one design share that one sort.
"""
from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from .chunks import fold

BINS = 4096
COLLECT_LIMIT = 2**20

ValueSource = Callable[[], Iterator[np.ndarray]]


@dataclass
class _Target:
    rank: int
    lo: float
    hi: float
    below: int
    count: int
    value: float | None = None


class _Range:
    """Count, min and max of the values seen."""

    def __init__(self) -> None:
        self.n, self.lo, self.hi = 0, np.inf, -np.inf

    def add(self, v: np.ndarray) -> None:
        if v.size:
            self.n += v.size
            self.lo, self.hi = min(self.lo, float(v.min())), max(self.hi, float(v.max()))

    def merge(self, other: _Range) -> _Range:
        self.n += other.n
        self.lo, self.hi = min(self.lo, other.lo), max(self.hi, other.hi)
        return self


def column_summary(values: ValueSource) -> tuple[int, float, float]:
    """(n, min, max) in one pass."""
    r = fold(values, _Range, _Range.add)
    return r.n, r.lo, r.hi


def sorted_summary(sorted_values: np.ndarray) -> tuple[int, float, float]:
    """(n, min, max) of a column from its sorted values."""
    n = int(sorted_values.size)
    return (n, float(sorted_values[0]), float(sorted_values[-1])) if n else (0, np.inf, -np.inf)


def order_statistics(values: ValueSource, ranks: Sequence[int], *, summary: tuple[int, float, float] | None = None,
                     bins: int = BINS, collect_limit: int = COLLECT_LIMIT,
                     sorted_values: np.ndarray | None = None) -> np.ndarray:
    """The ``ranks``-th smallest values (0-based) of the streamed column, exactly.

    ``sorted_values``: the whole column in ascending order, when at hand (no pass is made then)."""
    if sorted_values is not None:
        n = sorted_values.size
        if any(not 0 <= r < n for r in ranks):
            raise InputError(f"An order statistic was asked for outside the {n} rows of the column.")
        return np.asarray(sorted_values, dtype=float)[np.asarray(ranks, dtype=np.int64)]
    n, vmin, vmax = summary if summary is not None else column_summary(values)
    if any(not 0 <= r < n for r in ranks):
        raise InputError(f"An order statistic was asked for outside the {n} rows of the column.")
    targets = {int(r): _Target(int(r), vmin, vmax, 0, n) for r in ranks}
    if vmin == vmax:
        return np.full(len(ranks), vmin)
    while any(t.value is None for t in targets.values()):
        _narrow([t for t in targets.values() if t.value is None], values, bins, collect_limit)
    return np.array([targets[int(r)].value for r in ranks], dtype=float)


class _Narrowing:
    """One narrowing pass's gathered values (per small interval) and histograms (per large one)."""

    def __init__(self, n_gather: int, n_split: int, bins: int) -> None:
        self.got: list[list[np.ndarray]] = [[] for _ in range(n_gather)]
        self.counts = [np.zeros(bins, dtype=np.int64) for _ in range(n_split)]
        self.low = [np.inf] * n_split
        self.high = [-np.inf] * n_split

    def merge(self, other: _Narrowing) -> _Narrowing:
        self.got = [mine + theirs for mine, theirs in zip(self.got, other.got, strict=True)]
        self.counts = [a + b for a, b in zip(self.counts, other.counts, strict=True)]
        self.low = [min(a, b) for a, b in zip(self.low, other.low, strict=True)]
        self.high = [max(a, b) for a, b in zip(self.high, other.high, strict=True)]
        return self


def _narrow(open_targets: list[_Target], values: ValueSource, bins: int, collect_limit: int) -> None:
    """One pass: gather small intervals, histogram the others."""
    gather = [t for t in open_targets if t.count <= collect_limit]
    split = [t for t in open_targets if t.count > collect_limit]
    edges = [np.linspace(t.lo, t.hi, bins + 1) for t in split]
    windows = [(t.lo, t.hi) for t in gather]
    ranges = [(t.lo, t.hi) for t in split]

    def step(acc: _Narrowing, v: np.ndarray) -> None:
        for i, (lo, hi) in enumerate(windows):
            acc.got[i].append(v[(v >= lo) & (v <= hi)])
        for i, (lo, hi) in enumerate(ranges):
            s = v[(v >= lo) & (v <= hi)]
            if s.size:
                pos = np.minimum(np.searchsorted(edges[i], s, side="right") - 1, bins - 1)
                acc.counts[i] += np.bincount(pos, minlength=bins)
                acc.low[i], acc.high[i] = min(acc.low[i], float(s.min())), max(acc.high[i], float(s.max()))

    acc = fold(values, lambda: _Narrowing(len(gather), len(split), bins), step)
    got, counts, low, high = acc.got, acc.counts, acc.low, acc.high
    for t, parts in zip(gather, got, strict=False):
        t.value = float(np.sort(np.concatenate(parts))[t.rank - t.below])
    for t, e, c, lo, hi in zip(split, edges, counts, low, high, strict=False):
        if lo == hi:  # every value in the interval is the same (ties)
            t.value = lo
            continue
        cum = t.below + np.cumsum(c)
        j = int(np.searchsorted(cum, t.rank, side="right"))
        t.below = int(cum[j - 1]) if j else t.below
        t.count = int(c[j])
        t.lo = float(e[j])
        t.hi = float(e[j + 1]) if j == bins - 1 else float(np.nextafter(e[j + 1], -np.inf))


def bin_numbers(cuts: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Bin of each value (finite values), rows at a cut in the lower bin: ``np.searchsorted(cuts, w, side="left")``,
    which for a few cuts is a sum of comparisons (much faster than a binary search per row)."""
    if cuts.size > 8:
        return np.searchsorted(cuts, w, side="left")
    out = np.zeros(w.shape, dtype=np.int64)
    for c in cuts:
        out += w > c
    return out


def quantiles(values: ValueSource, probs: Sequence[float], *, summary: tuple[int, float, float] | None = None,
              sorted_values: np.ndarray | None = None) -> np.ndarray:
    """``np.quantile(column, probs)`` (linear rule) from streamed order statistics (or from
    ``sorted_values``, the column in ascending order, when at hand)."""
    if sorted_values is not None:
        summary = sorted_summary(sorted_values)
    summary = summary if summary is not None else column_summary(values)
    n = summary[0]
    virtual = np.asarray(probs, dtype=float) * (n - 1)
    i = np.floor(virtual).astype(int)
    g = virtual - i
    ranks = sorted(set(i.tolist()) | set(np.minimum(i + 1, n - 1).tolist()))
    stats = dict(zip(ranks, order_statistics(values, ranks, summary=summary, sorted_values=sorted_values),
                     strict=False))
    a = np.array([stats[int(r)] for r in i])
    b = np.array([stats[int(min(r + 1, n - 1))] for r in i])
    return np.where(g >= 0.5, b - (b - a) * (1 - g), a + (b - a) * g)
