"""Goldfeld–Quandt (1965) over chunks, split along a moderator with ties kept together.

Streaming rule. With n rows, drop = round(share·n) and n₁ = ⌊(n − drop)/2⌋, let c_lo be the
n₁-th smallest moderator value and c_hi the n₁-th largest (exact order statistics, see
:mod:`robustmod.kernels.order`). The low group is every row with w ≤ c_lo, the high group every
row with w ≥ c_hi; rows tied at a cut value all go to the same group, so the split does not
depend on the order of the rows in the file. When no value is tied at a cut, each group has
exactly n₁ rows and the test equals the in-memory one (rows sorted by w, first and last n₁).
With ties the groups can be larger than n₁; when c_lo ≥ c_hi the groups would share rows and
no test is reported. Each group's OLS residual variance s² = RSS/(n_g − k) comes from a TSQR
factor of [X y] (RSS = R²_{k+1,k+1}); F = s²(high)/s²(low) with (n_high − k, n_low − k) df,
two-sided p = 2·min(P(F' ≥ F), P(F' ≤ F)).
"""
from __future__ import annotations

from typing import Any

import numpy as np
from scipy import stats

from ..jsonvalues import num
from .accumulate import TSQR
from .chunks import Chunk, ChunkColumn, ChunkSource, fold
from .order import column_summary, order_statistics, sorted_summary

#: Share of middle rows dropped (the in-memory test's value, robustmod.diagnostics.GQ_DROP).
DROP_SHARE = 0.2
#: Rows of a chunk gathered into one group block at a time (bounds the work space of a large chunk).
BLOCK_ROWS = 1 << 16


def _group_block(X: np.ndarray, y: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """[X y] at ``rows``, gathered column by column into one Fortran-ordered array (TSQR works in place)."""
    k = X.shape[1]
    out = np.empty((rows.size, k + 1), order="F")
    for j in range(k):
        np.take(X[:, j], rows, out=out[:, j])
    np.take(y, rows, out=out[:, k])
    return out


class _Groups:
    """TSQR factors of [X y] and row counts of the low and high groups."""

    def __init__(self, p: int) -> None:
        self.groups = {"low": TSQR(p), "high": TSQR(p)}
        self.sizes = {"low": 0, "high": 0}

    def merge(self, other: _Groups) -> _Groups:
        for name in self.groups:
            self.groups[name].merge(other.groups[name])
            self.sizes[name] += other.sizes[name]
        return self


def goldfeld_quandt(chunks: ChunkSource, moderator: str, *, drop_share: float = DROP_SHARE,
                    sorted_values: np.ndarray | None = None) -> dict[str, Any] | None:
    """F test of the residual variances of the high and low moderator groups; None when too few rows.

    ``moderator`` names the chunk column holding the moderator's raw values; ``sorted_values``, when
    at hand, is that whole column in ascending order (the cut values are then read off it).
    """
    values = ChunkColumn(chunks, moderator)
    summary = sorted_summary(sorted_values) if sorted_values is not None else column_summary(values)
    n = summary[0]
    first = next(iter(chunks()))
    k = first.X.shape[1]
    drop = round(drop_share * n)
    n1 = (n - drop) // 2
    if n1 <= k + 1:
        return None
    c_lo, c_hi = order_statistics(values, [n1 - 1, n - n1], summary=summary, sorted_values=sorted_values)
    if c_lo >= c_hi:
        return None
    def step(acc: _Groups, c: Chunk) -> None:
        w = np.asarray(c.columns[moderator], dtype=float)
        for a in range(0, c.size, BLOCK_ROWS):
            wb, Xb, yb = w[a:a + BLOCK_ROWS], c.X[a:a + BLOCK_ROWS], c.y[a:a + BLOCK_ROWS]
            for name, mask in (("low", wb <= c_lo), ("high", wb >= c_hi)):
                rows = np.flatnonzero(mask)
                if rows.size:
                    acc.groups[name].add(_group_block(Xb, yb, rows), overwrite=True)
                    acc.sizes[name] += int(rows.size)

    both = fold(chunks, lambda: _Groups(k + 1), step)
    groups, sizes = both.groups, both.sizes
    s2 = {name: float(acc.factor()[k, k] ** 2) / (sizes[name] - k) for name, acc in groups.items()}
    if s2["low"] <= 0:
        return None
    F = s2["high"] / s2["low"]
    d_hi, d_lo = sizes["high"] - k, sizes["low"] - k
    p = 2 * min(stats.f.sf(F, d_hi, d_lo), stats.f.cdf(F, d_hi, d_lo))
    return {"statistic": num(F), "df": [int(d_hi), int(d_lo)], "p": num(min(1.0, p)), "moderator": moderator,
            "n_dropped_middle": int(n - sizes["low"] - sizes["high"]),
            "group_sizes": {"low": sizes["low"], "high": sizes["high"]},
            "split": {"low_at_most": float(c_lo), "high_at_least": float(c_hi)}}
