"""Goldfeld–Quandt (1965) over chunks, split along a moderator with ties kept together.

Streaming rule. With n rows, drop = round(share·n) and n₁ = ⌊(n − drop)/2⌋, let c_lo be the
n₁-th smallest moderator value and c_hi the n₁-th largest (exact order statistics, see
:mod:`robustmod.kernels.order`). The low group is every row with w ≤ c_lo, the high group every
row with w ≥ c_hi; rows tied at a cut value all go to the same group, so the split does not
depend on the order of the rows in the file. When no value is tied at a cut, each group has
exactly n₁ rows and the test equals the in-memory one (rows sorted by w, first and last n₁).
With ties the groups can be larger than n₁; when c_lo ≥ c_hi the groups would share rows and
no test is reported. Each group's OLS fit comes from its cross-products of [X y] (one pass),
solved by Cholesky of the column-scaled XᵀX when its condition number is at most
:data:`robustmod.kernels.ols.MAX_CONDITION`: RSS = yᵀy − ‖R⁻ᵀXᵀy‖². That difference loses about
κ(R)·(yᵀy/RSS)·ε relative accuracy, so when that bound exceeds :data:`MAX_LOSS` a second pass sums
the squared residuals Σ(yᵢ − xᵢᵀβ̂)² of the group's rows instead (stationary in β̂: the solve's
error enters it only squared). An ill-conditioned XᵀX gets a TSQR factor of [X y], RSS = R²_{k+1,k+1}
(Householder accuracy). s² = RSS/(n_g − k); F = s²(high)/s²(low) with (n_high − k, n_low − k) df,
two-sided p = 2·min(P(F' ≥ F), P(F' ≤ F)).
"""
from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import linalg, stats

from ..cholesky import scaled_cholesky
from ..jsonvalues import num
from .accumulate import TSQR, GroupGrams
from .chunks import Chunk, ChunkColumn, ChunkSource, fold
from .ols import MAX_CONDITION
from .order import column_summary, order_statistics, sorted_summary

#: Share of middle rows dropped (the in-memory test's value, robustmod.diagnostics.GQ_DROP).
DROP_SHARE = 0.2
#: Largest κ(R)·yᵀy/RSS for which RSS is read off the cross-products (relative error about 1e5·ε).
MAX_LOSS = 1e5
#: Rows of a chunk gathered into one group block at a time (bounds the work space of a large chunk).
BLOCK_ROWS = 1 << 16


def _group_block(X: np.ndarray, y: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """[X y] at ``rows``, gathered column by column into one Fortran-ordered array (TSQR works in place)."""
    k = X.shape[1]
    outT = np.empty((k + 1, rows.size))  # filled through its transpose: see robustmod.lanes on np.take
    np.take(X.T, rows, axis=1, mode="clip", out=outT[:k])
    np.take(y, rows, mode="clip", out=outT[k])
    return outT.T


Cuts = dict[str, Callable[[np.ndarray], np.ndarray]]


def _chunk_blocks(c: Chunk, moderator: str, cuts: Cuts) -> Iterator[tuple[str, np.ndarray, np.ndarray, np.ndarray]]:
    """(group, rows of the block, X and y of the block) for each block of rows of one chunk."""
    w = np.asarray(c.columns[moderator], dtype=float)
    for a in range(0, c.size, BLOCK_ROWS):
        wb, Xb, yb = w[a:a + BLOCK_ROWS], c.X[a:a + BLOCK_ROWS], c.y[a:a + BLOCK_ROWS]
        for name, rule in cuts.items():
            rows = np.flatnonzero(rule(wb))
            if rows.size:
                yield name, rows, Xb, yb


class _Grams:
    """Cross-products of [X y] and row counts of each group (upper triangle and last column filled)."""

    def __init__(self, names: list[str], k: int) -> None:
        self.grams = {name: np.zeros((k + 1, k + 1)) for name in names}
        self.sizes = dict.fromkeys(names, 0)

    def merge(self, other: _Grams) -> _Grams:
        for name in self.grams:
            self.grams[name] += other.grams[name]
            self.sizes[name] += other.sizes[name]
        return self


class _Sums:
    """Residual sums of squares of each group."""

    def __init__(self, names: list[str]) -> None:
        self.rss = dict.fromkeys(names, 0.0)

    def merge(self, other: _Sums) -> _Sums:
        for name in self.rss:
            self.rss[name] += other.rss[name]
        return self


class _Groups:
    """TSQR factors of [X y] of each group."""

    def __init__(self, names: list[str], p: int) -> None:
        self.groups = {name: TSQR(p) for name in names}

    def merge(self, other: _Groups) -> _Groups:
        for name in self.groups:
            self.groups[name].merge(other.groups[name])
        return self


def _cholesky_fit(G: np.ndarray) -> tuple[np.ndarray, float, float] | None:
    """(β̂, RSS from the cross-products, its loss bound κ(R)·yᵀy/RSS) from the cross-products of [X y],
    by Cholesky of the column-scaled XᵀX; None when that is singular or its condition number exceeds
    MAX_CONDITION (the streamed OLS kernel's rule)."""
    k = G.shape[0] - 1
    R, condition = scaled_cholesky(G[:k, :k], MAX_CONDITION)
    if R is None:
        return None
    z = linalg.solve_triangular(R, G[:k, k], trans="T", check_finite=False)
    beta = linalg.solve_triangular(R, z, check_finite=False)
    rss = float(G[k, k] - z @ z)
    loss = np.sqrt(condition) * float(G[k, k]) / rss if rss > 0 else np.inf
    return beta, rss, loss


def _group_grams(chunks: ChunkSource, moderator: str, cuts: Cuts, k: int
                 ) -> tuple[dict[str, np.ndarray], dict[str, int]]:
    """Cross-products of [X y] over each group's rows, and the group sizes (rows gathered whole:
    measured faster than gathering column by column, or than multiplying in a 0/1 indicator)."""
    names = list(cuts)

    def step(acc: _Grams, c: Chunk) -> None:
        for name, rows, Xb, yb in _chunk_blocks(c, moderator, cuts):
            Xg, yg = Xb[rows], yb[rows]
            G = acc.grams[name]
            G[:k, :k] += np.dot(Xg.T, Xg)  # see robustmod.lanes on np.dot
            G[:k, k] += np.dot(Xg.T, yg)
            G[k, k] += float(yg @ yg)
            acc.sizes[name] += int(rows.size)

    got = fold(chunks, lambda: _Grams(names, k), step)
    for G in got.grams.values():
        G[k, :k] = G[:k, k]
    return got.grams, got.sizes


def _group_rss(chunks: ChunkSource, moderator: str, cuts: Cuts, k: int,
               gathered: GroupGrams | None = None) -> tuple[dict[str, int], dict[str, float]]:
    """Rows and residual sum of squares of each group's OLS fit (see the module docstring);
    ``gathered``: the groups' cross-products when another pass has already summed them."""
    names = list(cuts)
    grams, sizes = gathered if gathered is not None else _group_grams(chunks, moderator, cuts, k)
    fits = {name: _cholesky_fit(G) for name, G in grams.items()}
    if all(f is not None and f[2] <= MAX_LOSS for f in fits.values()):
        return sizes, {name: f[1] for name, f in fits.items() if f is not None}
    if all(f is not None for f in fits.values()):
        betas = {name: f[0] for name, f in fits.items() if f is not None}

        def residual_step(acc: _Sums, c: Chunk) -> None:
            for name, rows, Xb, yb in _chunk_blocks(c, moderator, cuts):
                e = yb[rows] - Xb[rows] @ betas[name]
                acc.rss[name] += float(e @ e)

        return sizes, fold(chunks, lambda: _Sums(names), residual_step).rss

    def tsqr_step(acc: _Groups, c: Chunk) -> None:
        for name, rows, Xb, yb in _chunk_blocks(c, moderator, cuts):
            acc.groups[name].add(_group_block(Xb, yb, rows), overwrite=True)

    groups = fold(chunks, lambda: _Groups(names, k + 1), tsqr_step).groups
    return sizes, {name: float(acc.factor()[k, k] ** 2) for name, acc in groups.items()}


@dataclass(frozen=True)
class Split:
    """The exact cut values of the streaming rule: low = rows with w ≤ low_at_most, high = rows with
    w ≥ high_at_least (n rows in all, k columns of X)."""

    n: int
    k: int
    low_at_most: float
    high_at_least: float

    def groups(self) -> dict[str, tuple[float, float]]:
        """Each group as a closed interval of moderator values."""
        return {"low": (-np.inf, self.low_at_most), "high": (self.high_at_least, np.inf)}


def gq_split(chunks: ChunkSource, moderator: str, *, drop_share: float = DROP_SHARE,
             sorted_values: np.ndarray | None = None) -> Split | None:
    """The cut values of the streaming rule (module docstring); None when a group would have at most
    k + 1 rows or the groups would share rows."""
    values = ChunkColumn(chunks, moderator)
    summary = sorted_summary(sorted_values) if sorted_values is not None else column_summary(values)
    n = summary[0]
    k = next(iter(chunks())).X.shape[1]
    n1 = (n - round(drop_share * n)) // 2
    if n1 <= k + 1:
        return None
    c_lo, c_hi = order_statistics(values, [n1 - 1, n - n1], summary=summary, sorted_values=sorted_values)
    if c_lo >= c_hi:
        return None
    return Split(int(n), int(k), float(c_lo), float(c_hi))


def goldfeld_quandt(chunks: ChunkSource, moderator: str, *, drop_share: float = DROP_SHARE,
                    sorted_values: np.ndarray | None = None, split: Split | None = None,
                    gathered: GroupGrams | None = None) -> dict[str, Any] | None:
    """F test of the residual variances of the high and low moderator groups; None when too few rows.

    ``moderator`` names the chunk column holding the moderator's raw values; ``sorted_values``, when
    at hand, is that whole column in ascending order (the cut values are then read off it).
    ``split`` and ``gathered``: the cut values from :func:`gq_split` and the groups' cross-products,
    when another pass has summed them (the binning check's first pass does, see
    :func:`robustmod.kernels.binning.binning_fits`); the test then makes a pass only if the
    cross-products are not accurate enough (module docstring).
    """
    if split is None:
        split = gq_split(chunks, moderator, drop_share=drop_share, sorted_values=sorted_values)
        gathered = None
    if split is None:
        return None
    n, k, c_lo, c_hi = split.n, split.k, split.low_at_most, split.high_at_least
    cuts: Cuts = {"low": lambda w: w <= c_lo, "high": lambda w: w >= c_hi}
    sizes, rss = _group_rss(chunks, moderator, cuts, k, gathered)
    s2 = {name: rss[name] / (sizes[name] - k) for name in cuts}
    if s2["low"] <= 0:
        return None
    F = s2["high"] / s2["low"]
    d_hi, d_lo = sizes["high"] - k, sizes["low"] - k
    p = 2 * min(stats.f.sf(F, d_hi, d_lo), stats.f.cdf(F, d_hi, d_lo))
    return {"statistic": num(F), "df": [int(d_hi), int(d_lo)], "p": num(min(1.0, p)), "moderator": moderator,
            "n_dropped_middle": int(n - sizes["low"] - sizes["high"]),
            "group_sizes": {"low": sizes["low"], "high": sizes["high"]},
            "split": {"low_at_most": float(c_lo), "high_at_least": float(c_hi)}}
