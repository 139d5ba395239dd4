"""The binning check of the linear interaction (Hainmueller, Mummolo & Xu 2019) over chunks.

The same quantities as :func:`robustmod.linearity.binning_check`, from passes over the chunks:
the cut points (exact streamed quantiles), per-bin counts, ranges and focal spread (merged
running moments), the bin medians (exact order statistics: bin j holds the ranks after the
rows of the bins below it), then three least-squares problems on the columns

    B = [G, G·D, G·(W − x_j), G·(W − x_j)·D]   (n × 4J, from the bin index),

the binning model [B, covariates] with HC3 (per-bin slopes), the factor of [X, B] whose lower-right
block gives B residualised on X (which binning columns add to the model), and the augmented model
[X, B_added] with HC3 for the Wald test.

None of the three is built as an n-row matrix. A row of bin j has its binning columns in bin j's
places only, and there they are the four base columns 1, D, W − x_j, (W − x_j)·D; so the row of the
wide matrix [X, B, covariates, y] is c·T_j, with c the row of the compact block C = [X, the base
columns X does not hold already, y] and T_j a fixed 0/±x_j matrix. Pass 1 accumulates each bin's
CᵀC (cache-sized blocks of rows, sorted by bin) and factors it by Cholesky of the column-scaled
matrix when its condition number is at most :data:`robustmod.kernels.ols.MAX_CONDITION` (else a
TSQR pass gives the factors, Householder accuracy); stacking the bins' factors R_j·T_j and one small
QR gives R of the wide matrix (Demmel et al. 2012), hence the factor of any column subset. Pass 2
gives the residuals, the leverages hᵢ = cᵢᵀ A_j A_jᵀ cᵢ (A_j = T_j R_S⁻¹ for model S) and the HC3
meat Σ_j A_jᵀ (C_jᵀ diag(ωᵢêᵢ²) C_j) A_j of both models at once.

The chunks carry the raw focal predictor and moderator as ``columns[focal]``, ``columns[moderator]``.
"""
from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace
from functools import partial
from typing import Any

import numpy as np
from scipy import linalg

from ..backends.base import Estimates, JointTest, WaldFit
from ..backends.hc import LEVERAGE_ONE_TOL, hc_weights, r_inverse
from ..cholesky import scaled_cholesky
from ..errors import InputError, option_error
from .accumulate import TSQR, GroupGrams, RunningMoments
from .chunks import Chunk, ChunkColumn, ChunkSource, fold
from .ols import MAX_CONDITION, SHOWN_ROWS, StreamedOLS
from .order import bin_numbers, column_summary, order_statistics, quantiles, sorted_summary

#: |R_jj| / ‖column‖ at or below which the binning model counts as rank-deficient.
RANK_TOL = 1e-10
#: Relative size below which a residualised column counts as spanned by the model.
SPAN_TOL = 1e-8
#: Relative residual below which two models count as spanning the same space (the plain model
#: y ~ D * W + Z: its augmented model is the binning model in other coordinates).
SAME_SPAN_TOL = 1e-10


def bin_index(w: np.ndarray, bins: int | Sequence[float], moderator: str) -> tuple[np.ndarray, np.ndarray]:
    """Bin number of each row and the interior cut points."""
    if isinstance(bins, (bool, np.bool_)):
        raise option_error("bins", "a whole number ≥ 2 or a list of interior cut points", bins)
    if isinstance(bins, (int, np.integer)):
        if bins < 2:
            raise option_error("bins", "a whole number ≥ 2 or a list of interior cut points", bins)
        cuts = np.quantile(w, np.arange(1, bins) / bins)
    else:
        try:
            cuts = np.asarray(list(bins), dtype=float)
        except (TypeError, ValueError):
            raise option_error("bins", "a whole number ≥ 2 or a list of interior cut points", bins) from None
        if cuts.ndim != 1 or cuts.size == 0 or not np.all(np.isfinite(cuts)) or np.any(np.diff(cuts) <= 0):
            raise option_error("bins", "cut points as a strictly increasing list of finite numbers", list(bins))
        if cuts[0] <= w.min() or cuts[-1] >= w.max():
            raise InputError(
                f"The bin cut points {list(cuts)} must lie inside the observed range of {moderator!r} "
                f"({w.min():g} to {w.max():g}); move them inside it."
            )
    # Rows at a cut point go to the lower bin (right-closed bins, as pandas.cut).
    return np.searchsorted(cuts, w, side="left"), cuts


@dataclass(frozen=True)
class BinSummary:
    """Per-bin facts of the binning check (bins in ascending order, empty ones left out)."""

    cuts: np.ndarray
    present: np.ndarray
    counts: np.ndarray
    medians: np.ndarray
    lows: np.ndarray
    highs: np.ndarray
    focal_sd: np.ndarray
    focal_varies: np.ndarray
    focal_sd_all: float
    n: int


def _cuts(values: Callable[[], Any], bins: int | Sequence[float], moderator: str,
          summary: tuple[int, float, float], sorted_values: np.ndarray | None = None) -> np.ndarray:
    """Interior cut points: the option is checked by the in-memory rule on the observed range
    (same messages); quantile cuts then come from the streamed column."""
    _, lo, hi = summary
    cuts = bin_index(np.array([lo, hi]), bins, moderator)[1]
    if isinstance(bins, (int, np.integer)):
        return quantiles(values, list(np.arange(1, bins) / bins), summary=summary, sorted_values=sorted_values)
    return cuts


class _Bins:
    """Per bin: row count, moderator range and focal moments."""

    def __init__(self, nb: int) -> None:
        self.counts = np.zeros(nb, dtype=np.int64)
        self.lows, self.highs = np.full(nb, np.inf), np.full(nb, -np.inf)
        self.per_bin = [RunningMoments(1) for _ in range(nb)]

    def merge(self, other: _Bins) -> _Bins:
        self.counts += other.counts
        np.minimum(self.lows, other.lows, out=self.lows)
        np.maximum(self.highs, other.highs, out=self.highs)
        for mine, theirs in zip(self.per_bin, other.per_bin, strict=True):
            mine.merge(theirs)
        return self


def bin_summary(chunks: ChunkSource, focal: str, moderator: str, bins: int | Sequence[float], *,
                sorted_values: np.ndarray | None = None, focal_spread: bool = True) -> BinSummary:
    """Cut points, counts, ranges, medians and focal spread of each non-empty bin.

    ``sorted_values``: the whole moderator column in ascending order, when at hand; the cut points,
    counts, ranges and medians are then read off it and one pass gathers the focal spread. With
    ``focal_spread=False`` as well no pass is made and the focal fields stay empty (pass 1 of
    :func:`binning_fits` fills them, see :func:`with_focal_spread`)."""
    values = ChunkColumn(chunks, moderator)
    summary = sorted_summary(sorted_values) if sorted_values is not None else column_summary(values)
    cuts = _cuts(values, bins, moderator, summary, sorted_values)
    nb = cuts.size + 1
    ranges = sorted_values is None
    if sorted_values is not None and not focal_spread:
        return _sorted_bins(sorted_values, cuts, summary, values)

    def step(acc: _Bins, chunk: Chunk) -> None:
        w = np.asarray(chunk.columns[moderator], dtype=float)
        d = np.asarray(chunk.columns[focal], dtype=float)
        idx = bin_numbers(cuts, w)  # rows at a cut go to the lower bin
        here = np.bincount(idx, minlength=nb)
        acc.counts += here
        # Each bin's focal moments in this chunk from weighted counts (passes over the rows, not
        # over the rows of each bin), merged into the bin's running moments.
        means: np.ndarray = np.bincount(idx, weights=d, minlength=nb) / np.maximum(here, 1)
        dev = d - means[idx]
        m2 = np.bincount(idx, weights=dev * dev, minlength=nb).astype(float)
        lo, hi = np.full(nb, np.inf), np.full(nb, -np.inf)
        np.minimum.at(lo, idx, d)
        np.maximum.at(hi, idx, d)
        if ranges:
            np.minimum.at(acc.lows, idx, w)
            np.maximum.at(acc.highs, idx, w)
        for j in np.flatnonzero(here):  # bins, not rows
            part = RunningMoments(1)
            part.n, part.mean, part.m2 = int(here[j]), means[j:j + 1].copy(), m2[j:j + 1]
            part.minimum, part.maximum = lo[j:j + 1], hi[j:j + 1]
            acc.per_bin[j].merge(part)

    got = fold(chunks, lambda: _Bins(nb), step)
    counts, lows, highs = got.counts, got.lows, got.highs
    present = np.flatnonzero(counts)
    start = np.concatenate([[0], np.cumsum(counts)])[present]
    c = counts[present]
    if sorted_values is not None:  # bins are runs of the sorted column
        lows[present], highs[present] = sorted_values[start], sorted_values[start + c - 1]
    medians = _medians(values, start, c, summary, sorted_values)
    bare = BinSummary(cuts, present, c, medians, lows[present], highs[present], np.zeros(0), np.zeros(0, dtype=bool),
                      0.0, int(summary[0]))
    return with_focal_spread(bare, [got.per_bin[j] for j in present])


def _medians(values: ChunkColumn, start: np.ndarray, c: np.ndarray, summary: tuple[int, float, float],
             sorted_values: np.ndarray | None) -> np.ndarray:
    """Median moderator value of each bin (bin j holds the ranks start[j] … start[j] + c[j] − 1)."""
    ranks = sorted({int(r) for r in np.concatenate([start + (c - 1) // 2, start + c // 2])})
    stats = dict(zip(ranks, order_statistics(values, ranks, summary=summary, sorted_values=sorted_values),
                     strict=False))
    return np.array([0.5 * (stats[int(s + (m - 1) // 2)] + stats[int(s + m // 2)]) for s, m in zip(start, c, strict=False)])


def _sorted_bins(sorted_values: np.ndarray, cuts: np.ndarray, summary: tuple[int, float, float],
                 values: ChunkColumn) -> BinSummary:
    """Counts, ranges and medians of the bins read off the sorted moderator column (no pass);
    the focal fields empty."""
    counts = np.diff(np.concatenate([[0], np.searchsorted(sorted_values, cuts, side="right"), [sorted_values.size]]))
    present = np.flatnonzero(counts)
    c = counts[present]
    start = np.concatenate([[0], np.cumsum(counts)])[present]
    return BinSummary(cuts, present, c, _medians(values, start, c, summary, sorted_values), sorted_values[start],
                      sorted_values[start + c - 1], np.zeros(0), np.zeros(0, dtype=bool), 0.0, int(summary[0]))


def with_focal_spread(s: BinSummary, per_bin: Sequence[RunningMoments]) -> BinSummary:
    """``s`` with its focal fields from the focal predictor's moments in each present bin."""
    focal_sd = np.array([np.sqrt(m.m2[0] / max(m.n - 1, 1)) for m in per_bin])
    all_d = RunningMoments(1)
    for m in per_bin:
        all_d.merge(m)
    sd_all = float(np.sqrt(all_d.m2[0] / (s.n - 1))) if s.n > 1 else 0.0
    dmin = np.array([m.minimum[0] for m in per_bin])
    dmax = np.array([m.maximum[0] for m in per_bin])
    return replace(s, focal_sd=focal_sd, focal_varies=dmax > dmin, focal_sd_all=sd_all)


def binning_columns(chunk: Chunk, s: BinSummary, focal: str, moderator: str,
                    covariate_columns: Sequence[int] = ()) -> np.ndarray:
    """B = [G, G·D, G·(W − x_j), G·(W − x_j)·D, X_cov] for the rows of one chunk (m × (4J + #cov)),
    one Fortran-ordered array filled in place (the factorisations read it column by column)."""
    w, d = np.asarray(chunk.columns[moderator], dtype=float), np.asarray(chunk.columns[focal], dtype=float)
    idx = np.searchsorted(s.cuts, w, side="left")
    J, cov = s.present.size, list(covariate_columns)
    out = np.empty((w.size, 4 * J + len(cov)), order="F")
    G, GD, GW, GWD = (out[:, a * J:(a + 1) * J] for a in range(4))
    np.equal(idx[:, None], s.present[None, :], out=G, casting="unsafe")
    np.multiply(G, d[:, None], out=GD)
    np.subtract(w[:, None], s.medians[None, :], out=GW)
    GW *= G
    np.multiply(GW, d[:, None], out=GWD)
    out[:, 4 * J:] = chunk.X[:, cov]
    return out


def added_columns(chunks: ChunkSource, build: Callable[[Chunk], np.ndarray], k: int) -> np.ndarray:
    """Indices of B's columns that add to span(X): TSQR of [X, B]; its block R₂₂ is B residualised on X,
    so a pivoted QR of R₂₂ (columns scaled) picks the same columns as one of the n-row residuals."""
    def step(acc: _Factors, c: Chunk) -> None:
        block = np.column_stack([c.X, build(c)])
        if not acc.accs:
            acc.accs.append(TSQR(block.shape[1]))
        acc.accs[0].add(block)

    got = fold(chunks, lambda: _Factors(0, 0), step)
    return added_from_factor(got.accs[0].factor(), k)


def added_from_factor(R: np.ndarray, k: int) -> np.ndarray:
    """The columns of B that add to span(X), from the triangular factor R of [X, B] (X first, k columns)."""
    R22 = R[k:, k:]
    res_norm = np.linalg.norm(R22, axis=0)
    norms = np.linalg.norm(R[:, k:], axis=0)
    rel = res_norm / np.where(norms > 0, norms, 1.0)
    cand = np.flatnonzero(rel > SPAN_TOL)
    if cand.size == 0:
        return cand
    _, Rp, piv = linalg.qr(R22[:, cand] / res_norm[cand], mode="economic", pivoting=True)
    d = np.abs(np.diag(Rp))
    rank = int((d > SPAN_TOL * max(d[0], 1e-300)).sum())
    return np.sort(cand[piv[:rank]])


#: Rows of a chunk handled at a time: cache-sized blocks make the small products fast and bound the work space.
BLOCK_ROWS = 1 << 16  # measured at n = 10⁶, k = 7 beside the other diagnostics: fewer GIL hand-overs than 1 << 14
#: The four base columns of a bin, in the order of B's column groups.
BASE = ("one", "d", "w", "dw")


class _LayoutChanged(Exception):
    """A chunk's X does not hold a base column where the first chunk's did."""


@dataclass(frozen=True)
class _Layout:
    """Where the compact block C = [X, extra columns, y] holds each base column of a bin: the X
    column that equals it exactly (the intercept, the raw focal predictor, the raw moderator, their
    product) or, when X has none, an extra column (the moderator's two then centred at the bin median)."""

    k: int
    in_x: dict[str, int]

    @property
    def extras(self) -> tuple[str, ...]:
        return tuple(b for b in BASE if b not in self.in_x)

    @property
    def width(self) -> int:
        """Columns of C before y."""
        return self.k + len(self.extras)

    def col(self, base: str) -> int:
        return self.in_x[base] if base in self.in_x else self.k + self.extras.index(base)


def _base_values(d: np.ndarray, w: np.ndarray, base: str) -> np.ndarray:
    if base == "one":
        return np.ones_like(d)
    return d if base == "d" else w if base == "w" else d * w


def _find_layout(chunk: Chunk, d: np.ndarray, w: np.ndarray) -> _Layout:
    """The base columns X holds exactly on the first rows (pass 1 checks the rest)."""
    X = chunk.X
    k = X.shape[1]
    head = slice(0, min(64, X.shape[0]))
    found: dict[str, int] = {}
    for base in BASE:
        v = _base_values(d[head], w[head], base)
        for j in range(k):
            if j not in found.values() and np.array_equal(X[head, j], v):  # pass 1 checks every row
                found[base] = j
                break
    return _Layout(k, found)


def _check_layout(lay: _Layout, C: np.ndarray, ds: np.ndarray, ws: np.ndarray) -> None:
    """Raise _LayoutChanged unless the gathered block C (rows sorted by bin) holds each base column
    where the layout says; checked on the gathered block, which is in cache."""
    for base, j in lay.in_x.items():
        col = C[:, j]
        if base == "one":
            same = bool((col == 1.0).all())
        elif base == "dw":
            same = np.array_equal(col, ds * ws)
        else:
            same = np.array_equal(col, ds if base == "d" else ws)
        if not same:
            raise _LayoutChanged


@dataclass(frozen=True)
class _Cells:
    """The bins cut further at extra moderator values: rows at a cut in the lower cell, as for bins.
    ``bin_of[c]``: the present bin holding cell c (0 for the cells of empty bins, which hold no rows);
    ``first``: the first cell of each present bin, and the number of cells."""

    cuts: np.ndarray
    bin_of: np.ndarray
    first: np.ndarray

    @property
    def size(self) -> int:
        return self.cuts.size + 1

    def inside(self, low: float, high: float) -> np.ndarray:
        """The cells whose every value lies in [low, high] (whole cells when both are cut values)."""
        lower = np.concatenate([[-np.inf], self.cuts])
        upper = np.concatenate([self.cuts, [np.inf]])
        return np.flatnonzero((lower >= np.nextafter(low, -np.inf)) & (upper <= high))


def _cells(s: BinSummary, groups: Mapping[str, tuple[float, float]]) -> _Cells:
    """Cells of the bins and of each closed interval of ``groups`` (the bins alone when none)."""
    extra = [v for lo, hi in groups.values() for v in (np.nextafter(lo, -np.inf), hi) if np.isfinite(v)]
    cuts = np.unique(np.concatenate([s.cuts, extra])) if extra else s.cuts
    lookup = np.zeros(s.cuts.size + 1, dtype=np.int64)
    lookup[s.present] = np.arange(s.present.size)
    bins = bin_numbers(s.cuts, np.concatenate([cuts, [np.inf]]))  # the bin of each cell's upper end
    first = np.searchsorted(bins, s.present, side="left")
    return _Cells(cuts, lookup[bins], np.append(first, cuts.size + 1))


def _chunk_blocks(c: Chunk, s: BinSummary, lay: _Layout, focal: str, moderator: str, cells: _Cells, *,
                  check: bool = True) -> Any:
    """(C, y, starts, rows, cell starts) per block of one chunk's rows, sorted by cell (bin j in rows
    starts[j]:starts[j + 1], cell i in rows cell_starts[i]:cell_starts[i + 1]): the compact block C
    (C-ordered, without y), y, and a function giving the data positions of its rows."""
    J, k, nc = s.present.size, lay.k, cells.size
    small = np.uint8 if nc < 256 else np.int64  # cell numbers as small integers: argsort is then a radix sort
    w_all = np.asarray(c.columns[moderator], dtype=float)
    d_all = np.asarray(c.columns[focal], dtype=float)
    for a in range(0, c.size, BLOCK_ROWS):
        b = min(c.size, a + BLOCK_ROWS)
        w, d = w_all[a:b], d_all[a:b]
        pos = bin_numbers(cells.cuts, w).astype(small)
        order = np.argsort(pos, kind="stable")
        cell_starts = np.zeros(nc + 1, dtype=np.int64)
        np.cumsum(np.bincount(pos, minlength=nc), out=cell_starts[1:])
        starts = cell_starts[cells.first]
        # Whole rows gathered into a C-ordered block: three times faster than gathering the columns
        # (measured at 16,384 rows × 7), and numpy lets go of the GIL while it copies.
        Xs = np.take(c.X[a:b], order, axis=0, mode="clip")
        ys = np.take(c.y[a:b], order, mode="clip")
        ws, ds = w[order], d[order]
        if check:
            _check_layout(lay, Xs, ds, ws)
        C = Xs
        if lay.extras:
            C = np.empty((b - a, lay.width))
            C[:, :k] = Xs
        for base in lay.extras:
            col = C[:, lay.col(base)]
            if base == "one":
                col.fill(1.0)
            elif base == "d":
                col[:] = ds
            else:
                for j in range(J):
                    r = slice(starts[j], starts[j + 1])
                    np.subtract(ws[r], s.medians[j], out=col[r])
                    if base == "dw":
                        col[r] *= ds[r]
        yield C, ys, starts, partial(_block_rows, c, a, b, order), cell_starts


def _block_rows(c: Chunk, a: int, b: int, order: np.ndarray) -> np.ndarray:
    """Data positions of a block's rows in bin order (asked for only when a row has leverage one)."""
    return np.asarray(c.rows[a:b])[order]


def _wide_map(lay: _Layout, s: BinSummary, j: int, cov: Sequence[int]) -> np.ndarray:
    """T_j: bin j's row of [X, B, y] (B = [G, G·D, G·(W − x_j), G·(W − x_j)·D, covariates]) is c·T_j."""
    k, J, nb = lay.k, s.present.size, 4 * s.present.size + len(cov)
    T = np.zeros((lay.width + 1, k + nb + 1))
    T[np.arange(k), np.arange(k)] = 1.0
    T[lay.col("one"), k + j] = 1.0
    T[lay.col("d"), k + J + j] = 1.0
    if s.lows[j] < s.highs[j]:  # else W − x_j is exactly zero in the bin: so are its two columns
        T[lay.col("w"), k + 2 * J + j] = 1.0
        if "w" in lay.in_x:  # the raw moderator column: centre it here
            T[lay.col("one"), k + 2 * J + j] = -s.medians[j]
        T[lay.col("dw"), k + 3 * J + j] = 1.0
        if "dw" in lay.in_x:
            T[lay.col("d"), k + 3 * J + j] = -s.medians[j]
    for i, col in enumerate(cov):
        T[col, k + 4 * J + i] = 1.0
    T[lay.width, -1] = 1.0
    return T


def _cholesky_factor(G: np.ndarray) -> np.ndarray | None:
    """[[R, Rᵀ⁻¹Cᵀy], [0, r]] from the Gram matrix of [C y] by Cholesky of the column-scaled CᵀC,
    or None when that is singular or its condition number exceeds MAX_CONDITION."""
    p = G.shape[0] - 1
    R, _ = scaled_cholesky(G[:p, :p], MAX_CONDITION)
    if R is None:
        return None
    out = np.zeros((p + 1, p + 1))
    out[:p, :p] = R
    out[:p, p] = linalg.solve_triangular(R, G[:p, p], trans="T", check_finite=False)
    out[p, p] = np.sqrt(max(float(G[p, p] - out[:p, p] @ out[:p, p]), 0.0))
    return out


class _Grams:
    """Per cell the Gram matrix of its compact rows; per bin the moments of its focal predictor."""

    def __init__(self, cells: int, J: int, p: int) -> None:
        self.grams = [np.zeros((p, p)) for _ in range(cells)]
        self.counts = np.zeros(cells, dtype=np.int64)
        self.focal = [RunningMoments(1) for _ in range(J)]

    def merge(self, other: _Grams) -> _Grams:
        self.grams = [a + b for a, b in zip(self.grams, other.grams, strict=True)]
        self.counts += other.counts
        for mine, theirs in zip(self.focal, other.focal, strict=True):
            mine.merge(theirs)
        return self


class _Factors:
    """Per bin a TSQR factor of its compact rows."""

    def __init__(self, J: int, p: int) -> None:
        self.accs = [TSQR(p) for _ in range(J)]

    def merge(self, other: _Factors) -> _Factors:
        if not self.accs:
            self.accs = other.accs
        elif other.accs:
            for mine, theirs in zip(self.accs, other.accs, strict=True):
                mine.merge(theirs)
        return self


@dataclass
class _Pass1:
    """What pass 1 gathers: R of the wide matrix [X, B, y], how it was factored, the moments of the
    focal predictor in each bin, and the cross-products of [X y] and row counts of each side group."""

    R: np.ndarray
    method: str
    focal: list[RunningMoments]
    side: GroupGrams


def _wide_factor(chunks: ChunkSource, s: BinSummary, lay: _Layout, focal: str, moderator: str,
                 cov: Sequence[int], cells: _Cells, groups: Mapping[str, tuple[float, float]]) -> _Pass1:
    """R of the wide matrix [X, B, y] from the bins' compact factors (pass 1, a TSQR pass if needed);
    the same pass sums the cross-products of each cell, of which the bins' and the side groups' are sums."""
    J, p, d_col, k = s.present.size, lay.width + 1, lay.col("d"), lay.k

    def gram_step(acc: _Grams, c: Chunk) -> None:
        for C, ys, _, _, cell_starts in _chunk_blocks(c, s, lay, focal, moderator, cells):
            for i in range(cells.size):
                r = slice(cell_starts[i], cell_starts[i + 1])
                if r.stop == r.start:
                    continue
                Cj, yj = C[r], ys[r]
                G = acc.grams[i]
                G[:-1, :-1] += np.dot(Cj.T, Cj)  # see robustmod.lanes on np.dot
                G[:-1, -1] += np.dot(Cj.T, yj)
                G[-1, -1] += float(np.dot(yj, yj))
                acc.counts[i] += r.stop - r.start
                acc.focal[cells.bin_of[i]].add(Cj[:, d_col])  # C holds the raw focal predictor (layout checked)

    got = fold(chunks, lambda: _Grams(cells.size, J, p), gram_step)
    for G in got.grams:
        G[-1, :-1] = G[:-1, -1]
    grams = [sum((got.grams[i] for i in range(cells.first[j], cells.first[j + 1])), np.zeros((p, p)))
             for j in range(J)]
    xy = [*range(k), p - 1]  # C starts with X; y is last
    side_grams: dict[str, np.ndarray] = {}
    side_sizes: dict[str, int] = {}
    for name, (lo, hi) in groups.items():
        inside = cells.inside(lo, hi)
        side_grams[name] = sum((got.grams[i][np.ix_(xy, xy)] for i in inside), np.zeros((k + 1, k + 1)))
        side_sizes[name] = int(got.counts[inside].sum())
    factors = [_cholesky_factor(G) for G in grams]
    method = "cholesky"
    if any(f is None for f in factors):
        method = "tsqr"

        def tsqr_step(acc: _Factors, c: Chunk) -> None:
            for C, ys, starts, _, _ in _chunk_blocks(c, s, lay, focal, moderator, cells):
                for j in range(J):
                    r = slice(starts[j], starts[j + 1])
                    acc.accs[j].add(np.column_stack([C[r], ys[r]]), overwrite=True)

        factors = [acc.factor() for acc in fold(chunks, lambda: _Factors(J, p), tsqr_step).accs]
    stacked = np.vstack([f @ _wide_map(lay, s, j, cov) for j, f in enumerate(factors) if f is not None])
    width = stacked.shape[1]
    R = np.zeros((width, width))
    top = np.asarray(np.linalg.qr(stacked, mode="r"))
    R[:top.shape[0]] = top[:width]
    return _Pass1(R, method, got.focal, (side_grams, side_sizes))


@dataclass
class _Model:
    """One least-squares model on a subset S of the wide columns, and its HC3 pass-2 sums."""

    beta: np.ndarray
    R: np.ndarray
    A: list[np.ndarray]  # per bin, T_j[:, S] R_S⁻¹ (compact → Q-factor coordinates)
    L: list[np.ndarray]  # per bin, Rᵀ of the QR of A_jᵀ: ‖c L_j‖ = ‖c A_j‖ with at most `width` columns (leverages)
    g: list[np.ndarray]  # per bin, T_j[:, S] β (the fitted values' form)
    meats: list[np.ndarray]
    rss: float = 0.0
    hmax: float = 0.0
    n_ones: int = 0
    ones: list[np.ndarray] | None = None
    columns: tuple[int, ...] = ()
    sums_from: _Model | None = None  # a model with the same column space: same residuals and leverages


def _same_span(R_wide: np.ndarray, a: _Model, b: _Model) -> bool:
    """Do the two models' columns span the same space (so their residuals and leverages agree)?"""
    if len(a.columns) != len(b.columns):
        return False
    Q, _ = np.linalg.qr(R_wide[:, list(b.columns)])
    A = R_wide[:, list(a.columns)]
    resid = np.linalg.norm(A - Q @ (Q.T @ A), axis=0)
    return bool(np.all(resid <= SAME_SPAN_TOL * np.maximum(np.linalg.norm(A, axis=0), 1e-300)))


def _model(R_wide: np.ndarray, S: Sequence[int], maps: list[np.ndarray], width: int) -> _Model | None:
    """The factor, β̂ and per-bin forms of the model on wide columns S; None when it is rank-deficient
    (|R_jj| / ‖column j‖ below RANK_TOL, the rule of the streamed OLS kernel)."""
    cols = [*S, R_wide.shape[1] - 1]
    Ra = np.asarray(np.linalg.qr(R_wide[:, cols], mode="r"))
    q = len(S)
    R, qty = Ra[:q, :q], Ra[:q, q]
    norms = np.linalg.norm(R_wide[:, list(S)], axis=0)
    rel = np.abs(np.diag(R)) / np.where(norms > 0, norms, 1.0)
    if np.any((rel < RANK_TOL) | (norms == 0)):
        return None
    beta = linalg.solve_triangular(R, qty, check_finite=False)
    Rinv = r_inverse(R)
    A = [T[:width, list(S)] @ Rinv for T in maps]
    L = [np.ascontiguousarray(np.asarray(np.linalg.qr(a.T, mode="r")).T) for a in A]
    return _Model(beta, R, A, L, [T[:width, list(S)] @ beta for T in maps],
                  [np.zeros((width, width)) for _ in maps], ones=[], columns=tuple(S))


def _residual_pass(chunks: ChunkSource, s: BinSummary, lay: _Layout, focal: str, moderator: str,
                   models: list[_Model], cells: _Cells) -> float:
    """Pass 2 for every model at once: RSS, leverages, leverage-one rows and the HC3 meats; returns
    the centred sum of squares of y."""
    n, width, J = s.n, lay.width, s.present.size

    def step(acc: _ModelSums, c: Chunk) -> None:
        for C, ys, starts, rows, _ in _chunk_blocks(c, s, lay, focal, moderator, cells, check=False):
            acc.ymom.add(ys)
            e, h = np.empty(ys.size), np.empty(ys.size)
            for m, sums in zip(models, acc.models, strict=True):
                # Residuals and leverages bin by bin (each bin its own fitted-value and leverage
                # forms), then the rest for the whole block at once (fewer, longer numpy calls).
                for j in range(J):
                    r = slice(starts[j], starts[j + 1])
                    if r.stop > r.start:
                        Cj = C[r]
                        np.subtract(ys[r], Cj @ m.g[j], out=e[r])
                        CL = Cj @ m.L[j]  # fewer columns than Cj @ A_j, the same row norms
                        np.square(CL, out=CL)
                        np.dot(CL, np.ones(CL.shape[1]), out=h[r])
                sums.rss += float(e @ e)
                sums.hmax = max(sums.hmax, float(h.max()))
                one = np.flatnonzero(h >= 1.0 - LEVERAGE_ONE_TOL)
                if one.size:
                    sums.n_ones += one.size
                    if sum(a.size for a in sums.ones) < SHOWN_ROWS:
                        sums.ones.append(np.sort(rows()[one]))
                if not sums.n_ones:  # the meats are of no use once a row has leverage one
                    u = hc_weights("hc3", h, n, m.beta.size)
                    u *= e * e
                    for j in range(J):
                        r = slice(starts[j], starts[j + 1])
                        if r.stop > r.start:
                            Cj = C[r]
                            sums.meats[j] += np.dot((Cj * u[r, None]).T, Cj)

    got = fold(chunks, lambda: _ModelSums(len(models), J, width), step)
    for m, sums in zip(models, got.models, strict=True):
        m.rss, m.hmax, m.n_ones, m.meats = sums.rss, sums.hmax, sums.n_ones, sums.meats
        if m.ones is not None:
            m.ones = sums.ones
    return float(got.ymom.m2[0])


class _ModelSum:
    """One model's pass-2 sums (as the fields of :class:`_Model`)."""

    def __init__(self, J: int, width: int) -> None:
        self.rss, self.hmax, self.n_ones = 0.0, 0.0, 0
        self.ones: list[np.ndarray] = []
        self.meats = [np.zeros((width, width)) for _ in range(J)]

    def merge(self, other: _ModelSum) -> _ModelSum:
        self.rss += other.rss
        self.hmax = max(self.hmax, other.hmax)
        self.n_ones += other.n_ones
        if sum(a.size for a in self.ones) < SHOWN_ROWS:
            self.ones += other.ones
        self.meats = [a + b for a, b in zip(self.meats, other.meats, strict=True)]
        return self


class _ModelSums:
    """Pass 2 of every model at once, and the moments of y."""

    def __init__(self, n_models: int, J: int, width: int) -> None:
        self.models = [_ModelSum(J, width) for _ in range(n_models)]
        self.ymom = RunningMoments(1)

    def merge(self, other: _ModelSums) -> _ModelSums:
        for mine, theirs in zip(self.models, other.models, strict=True):
            mine.merge(theirs)
        self.ymom.merge(other.ymom)
        return self


def _streamed(m: _Model, n: int, ss_total: float, method: str) -> StreamedOLS:
    """The model's HC3 fit in the form the streamed OLS kernel gives it."""
    src = m.sums_from or m
    Rinv = r_inverse(m.R)
    cov = None
    if not src.n_ones:
        meat = sum(a.T @ M @ a for a, M in zip(m.A, src.meats, strict=True))
        meat = 0.5 * (meat + meat.T)
        cov = Rinv @ meat @ Rinv.T
    shown = np.concatenate(src.ones)[:SHOWN_ROWS] if src.ones else np.zeros(0, dtype=int)
    return StreamedOLS(m.beta, m.R, n, m.beta.size, src.rss, ss_total, src.hmax, shown, src.n_ones, {"hc3": cov},
                       method)


@dataclass(frozen=True)
class BinningFits:
    """Per-bin HC3 slopes (or why not), and the HC3 Wald test of the added binning columns (or why not)."""

    summary: BinSummary
    bin_slopes: Estimates | None
    wald: JointTest | None
    added: np.ndarray
    notes: tuple[str, ...]
    #: Cross-products of [X y] and row counts of the ``side_groups`` asked for, when pass 1 ran.
    side: GroupGrams | None = None


def _layout_and_factor(chunks: ChunkSource, first: Chunk, s: BinSummary, focal: str, moderator: str,
                       cov: Sequence[int], cells: _Cells, groups: Mapping[str, tuple[float, float]]
                       ) -> tuple[_Layout, _Pass1]:
    """The compact layout (from the first chunk) and what pass 1 gathers."""
    lay = _find_layout(first, np.asarray(first.columns[focal], dtype=float),
                       np.asarray(first.columns[moderator], dtype=float))
    try:
        return lay, _wide_factor(chunks, s, lay, focal, moderator, cov, cells, groups)
    except _LayoutChanged:  # a later chunk's X differs: every base column as an extra one
        lay = _Layout(lay.k, {})
        return lay, _wide_factor(chunks, s, lay, focal, moderator, cov, cells, groups)


def _summary(chunks: ChunkSource, focal: str, moderator: str, bins: int | Sequence[float],
             sorted_values: np.ndarray | None) -> tuple[BinSummary, list[str]]:
    """The bins and the first note; with the sorted moderator at hand the bins need no pass, and
    pass 1 gathers the focal spread (a pass of its own when there will be no pass 1)."""
    s = bin_summary(chunks, focal, moderator, bins, sorted_values=sorted_values, focal_spread=sorted_values is None)
    if sorted_values is not None and s.present.size < 2:
        s = bin_summary(chunks, focal, moderator, bins, sorted_values=sorted_values)
    notes = ["Some bins are empty (many tied moderator values); they were left out."] \
        if s.present.size < s.cuts.size + 1 else []
    return s, notes


def binning_fits(  # noqa: PLR0912 - mirrors binning_check step by step (same notes, same order); a split is open work
        chunks: ChunkSource, *, focal: str, moderator: str, covariate_columns: Sequence[int],
        bins: int | Sequence[float] = 3, alpha: float = 0.05, sorted_values: np.ndarray | None = None,
        side_groups: Mapping[str, tuple[float, float]] | None = None) -> BinningFits:
    """The streamed pieces of :func:`robustmod.linearity.binning_check` (its notes' wording kept).

    ``sorted_values``: the whole moderator column in ascending order, when at hand (fewer passes).
    ``side_groups``: closed intervals [low, high] of the moderator whose rows' cross-products of
    [X y] pass 1 also sums (Goldfeld–Quandt's groups); in ``side`` of the result when pass 1 ran."""
    s, notes = _summary(chunks, focal, moderator, bins, sorted_values)
    J = s.present.size
    cov_cols = list(covariate_columns)
    first = next(iter(chunks()))
    k = first.X.shape[1]
    if J < 2:
        return BinningFits(s, None, None, np.zeros(0, dtype=int), tuple(notes))
    n_bin_cols = 4 * J + len(cov_cols)
    groups = dict(side_groups or {})
    cells = _cells(s, groups)
    lay, first_pass = _layout_and_factor(chunks, first, s, focal, moderator, cov_cols, cells, groups)
    if sorted_values is not None:
        s = with_focal_spread(s, first_pass.focal)
    maps = [_wide_map(lay, s, j, cov_cols) for j in range(J)]
    bin_model = None
    if s.n <= n_bin_cols + 1:
        notes.append(f"Too few rows ({s.n}) for the {n_bin_cols} columns of the binning model; "
                     "per-bin slopes cannot be estimated.")
    else:
        bin_model = _model(first_pass.R, range(k, k + n_bin_cols), maps, lay.width)
        if bin_model is None:
            notes.append("The binning model is rank-deficient (a bin has too few distinct rows or no focal "
                         "variation); per-bin slopes cannot be estimated.")
    R_wide, method = first_pass.R, first_pass.method
    added = added_from_factor(R_wide[:k + n_bin_cols, :k + n_bin_cols], k)
    aug_model = None
    aug_tried = bool(added.size) and s.n > k + added.size + 1
    if aug_tried:
        aug_model = _model(R_wide, [*range(k), *(k + added)], maps, lay.width)
    if bin_model is not None and aug_model is not None and _same_span(R_wide, aug_model, bin_model):
        aug_model.sums_from = bin_model
    models = [m for m in (bin_model, aug_model) if m is not None and m.sums_from is None]
    ss_total = _residual_pass(chunks, s, lay, focal, moderator, models, cells) if models else 0.0
    est_bin = None
    if bin_model is not None:
        bin_fit = _streamed(bin_model, s.n, ss_total, method).fit("hc3", tuple(f"c{i}" for i in range(n_bin_cols)))
        if isinstance(bin_fit, WaldFit):
            est_bin = bin_fit.estimate(np.eye(n_bin_cols)[J:2 * J], alpha)
        else:
            notes.append(f"Per-bin HC3 slopes unavailable: {bin_fit.reason}")
    wald = None
    if added.size:
        if aug_tried:
            wf = None if aug_model is None else _streamed(aug_model, s.n, ss_total, method).fit(
                "hc3", tuple(f"c{i}" for i in range(k + added.size)))
            if isinstance(wf, WaldFit):
                L = np.zeros((added.size, k + added.size))
                L[np.arange(added.size), k + np.arange(added.size)] = 1.0
                wald = wf.joint_test(L, alpha)
            else:
                notes.append(f"Wald test unavailable: {'rank-deficient' if wf is None else wf.reason}")
    else:
        notes.append("The model already spans the binning model; nothing to test.")
    return BinningFits(s, est_bin, wald, added, tuple(notes), first_pass.side if groups else None)
