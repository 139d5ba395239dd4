"""The binning check of the linear interaction (Hainmueller, Mummolo & Xu 2019) over chunks.

The same quantities as :func:`robustmod.linearity.binning_check`, from passes over the chunks:
the cut points (exact streamed quantiles), per-bin counts, ranges and focal spread (merged
running moments), the bin medians (exact order statistics: bin j holds the ranks after the
rows of the bins below it), then three least-squares problems on chunk-built columns

    B = [G, G·D, G·(W − x_j), G·(W − x_j)·D]   (n × 4J, built per chunk from the bin index),

the binning model [B, covariates] with HC3 (per-bin slopes), the TSQR factor of [X, B] whose
lower-right block gives B residualised on X (which binning columns add to the model), and the
augmented model [X, B_added] with HC3 for the Wald test. Each HC3 fit is
:func:`robustmod.kernels.ols.streamed_ols` on mapped chunks.

The chunks carry the raw focal predictor and moderator as ``columns[focal]``, ``columns[moderator]``.
"""
from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from scipy import linalg

from ..backends.base import Estimates, JointTest, WaldFit
from ..errors import InputError, option_error
from .accumulate import TSQR, RunningMoments
from .chunks import Chunk, ChunkSource, mapped
from .ols import StreamedOLS, streamed_ols
from .order import column_summary, order_statistics, quantiles

#: |R_jj| / ‖column‖ at or below which the binning model counts as rank-deficient.
RANK_TOL = 1e-10
#: Relative size below which a residualised column counts as spanned by the model.
SPAN_TOL = 1e-8


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
          summary: tuple[int, float, float]) -> np.ndarray:
    """Interior cut points: the option is checked by the in-memory rule on the observed range
    (same messages); quantile cuts then come from the streamed column."""
    _, lo, hi = summary
    cuts = bin_index(np.array([lo, hi]), bins, moderator)[1]
    if isinstance(bins, (int, np.integer)):
        return quantiles(values, list(np.arange(1, bins) / bins), summary=summary)
    return cuts


def bin_summary(chunks: ChunkSource, focal: str, moderator: str, bins: int | Sequence[float]) -> BinSummary:
    """Cut points, counts, ranges, medians and focal spread of each non-empty bin."""
    def values() -> Any:
        return (np.asarray(c.columns[moderator], dtype=float) for c in chunks())

    summary = column_summary(values)
    cuts = _cuts(values, bins, moderator, summary)
    nb = cuts.size + 1
    counts = np.zeros(nb, dtype=np.int64)
    lows, highs = np.full(nb, np.inf), np.full(nb, -np.inf)
    dmin, dmax = np.full(nb, np.inf), np.full(nb, -np.inf)
    per_bin = [RunningMoments(1) for _ in range(nb)]
    all_d = RunningMoments(1)
    for chunk in chunks():
        w = np.asarray(chunk.columns[moderator], dtype=float)
        d = np.asarray(chunk.columns[focal], dtype=float)
        idx = np.searchsorted(cuts, w, side="left")  # rows at a cut go to the lower bin
        counts += np.bincount(idx, minlength=nb)
        np.minimum.at(lows, idx, w)
        np.maximum.at(highs, idx, w)
        np.minimum.at(dmin, idx, d)
        np.maximum.at(dmax, idx, d)
        all_d.add(d)
        for j in np.unique(idx):  # bins, not rows
            per_bin[j].add(d[idx == j])
    present = np.flatnonzero(counts)
    start = np.concatenate([[0], np.cumsum(counts)])[present]
    c = counts[present]
    ranks = sorted({int(r) for r in np.concatenate([start + (c - 1) // 2, start + c // 2])})
    stats = dict(zip(ranks, order_statistics(values, ranks, summary=summary), strict=False))
    medians = np.array([0.5 * (stats[int(s + (m - 1) // 2)] + stats[int(s + m // 2)]) for s, m in zip(start, c, strict=False)])
    focal_sd = np.array([np.sqrt(per_bin[j].m2[0] / max(per_bin[j].n - 1, 1)) for j in present])
    n = int(summary[0])
    sd_all = float(np.sqrt(all_d.m2[0] / (n - 1))) if n > 1 else 0.0
    return BinSummary(cuts, present, c, medians, lows[present], highs[present], focal_sd,
                      dmax[present] > dmin[present], sd_all, n)


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


def _hc3(chunks: ChunkSource, build: Callable[[Chunk], np.ndarray]) -> StreamedOLS | str:
    """HC3 fit of y on the columns ``build`` makes per chunk, or the reason it cannot be had."""
    try:
        return streamed_ols(mapped(chunks, lambda c: replace(c, X=build(c))), ["hc3"], alias_tol=RANK_TOL)
    except InputError:
        return "rank-deficient"


def added_columns(chunks: ChunkSource, build: Callable[[Chunk], np.ndarray], k: int) -> np.ndarray:
    """Indices of B's columns that add to span(X): TSQR of [X, B]; its block R₂₂ is B residualised on X,
    so a pivoted QR of R₂₂ (columns scaled) picks the same columns as one of the n-row residuals."""
    acc: TSQR | None = None
    for c in chunks():
        block = np.column_stack([c.X, build(c)])
        acc = acc or TSQR(block.shape[1])
        acc.add(block)
    assert acc is not None
    R = acc.factor()
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


@dataclass(frozen=True)
class BinningFits:
    """Per-bin HC3 slopes (or why not), and the HC3 Wald test of the added binning columns (or why not)."""

    summary: BinSummary
    bin_slopes: Estimates | None
    wald: JointTest | None
    added: np.ndarray
    notes: tuple[str, ...]


def binning_fits(  # noqa: PLR0912 - mirrors binning_check step by step (same notes, same order); a split is open work
        chunks: ChunkSource, *, focal: str, moderator: str, covariate_columns: Sequence[int],
        bins: int | Sequence[float] = 3, alpha: float = 0.05) -> BinningFits:
    """The streamed pieces of :func:`robustmod.linearity.binning_check` (its notes' wording kept)."""
    s = bin_summary(chunks, focal, moderator, bins)
    notes: list[str] = []
    if s.present.size < s.cuts.size + 1:
        notes.append("Some bins are empty (many tied moderator values); they were left out.")
    J = s.present.size
    cov_cols = list(covariate_columns)
    first = next(iter(chunks()))
    k = first.X.shape[1]
    if J < 2:
        return BinningFits(s, None, None, np.zeros(0, dtype=int), tuple(notes))

    def xbin(c: Chunk) -> np.ndarray:
        return binning_columns(c, s, focal, moderator, cov_cols)

    n_bin_cols = 4 * J + len(cov_cols)
    est_bin = None
    if s.n <= n_bin_cols + 1:
        notes.append(f"Too few rows ({s.n}) for the {n_bin_cols} columns of the binning model; "
                     "per-bin slopes cannot be estimated.")
    else:
        fit = _hc3(chunks, xbin)
        if isinstance(fit, str):
            notes.append("The binning model is rank-deficient (a bin has too few distinct rows or no focal "
                         "variation); per-bin slopes cannot be estimated.")
        else:
            bin_fit = fit.fit("hc3", tuple(f"c{i}" for i in range(n_bin_cols)))
            if isinstance(bin_fit, WaldFit):
                est_bin = bin_fit.estimate(np.eye(n_bin_cols)[J:2 * J], alpha)
            else:
                notes.append(f"Per-bin HC3 slopes unavailable: {bin_fit.reason}")
    wald = None
    added = added_columns(chunks, xbin, k)
    if added.size:
        if s.n > k + added.size + 1:
            fa = _hc3(chunks, lambda c: np.column_stack([c.X, xbin(c)[:, added]]))
            wf = None if isinstance(fa, str) else fa.fit("hc3", tuple(f"c{i}" for i in range(k + added.size)))
            if isinstance(wf, WaldFit):
                L = np.zeros((added.size, k + added.size))
                L[np.arange(added.size), k + np.arange(added.size)] = 1.0
                wald = wf.joint_test(L, alpha)
            else:
                notes.append(f"Wald test unavailable: {'rank-deficient' if wf is None else wf.reason}")
    else:
        notes.append("The model already spans the binning model; nothing to test.")
    return BinningFits(s, est_bin, wald, added, tuple(notes))
