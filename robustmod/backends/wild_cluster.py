"""Wild cluster bootstrap: the ``wild`` back-end when the rows are clustered.

Cameron, Gelbach & Miller (2008); MacKinnon & Webb (2017). One auxiliary weight v_g per
cluster (Rademacher, Mammen, or Webb's six-point weights, advised for few clusters; Webb 2013),
all 2^G Rademacher sign patterns when 2^G ≤ B. With X = QR, base residuals ẽ (the full fit, or
the fit without the product term(s) for the null-imposed bootstrap), s_g = Q_gᵀẽ_g and
M_g = Q_gᵀQ_g (computed once, O(n·k²)), a replicate is, in O(G·k²):

    y* = X β_base + v_g ẽ_i,     R(β* − β_base) = d = Σ_g v_g s_g,
    Q_gᵀ e*_g = v_g s_g − M_g d,   V*_CR1 = c · R⁻¹ [Σ_g (Q_gᵀe*_g)(Q_gᵀe*_g)ᵀ] R⁻ᵀ,

with c = G/(G − 1)·(n − 1)/(n − k) (CR1). The draws fill the same :class:`BootstrapFit` as the
row-level wild bootstrap, so intervals (bootstrap-t), null-imposed p of the product term(s) and
bands for any L come from one set of replicates.
"""
from __future__ import annotations

import time
from typing import TYPE_CHECKING, Any

import numpy as np

from .base import Fit, Unavailable
from .cluster import cluster_grams, cluster_ols, cluster_sums, cr_factor, scores_many
from .hc import r_inverse
from .kernels import batched_quadratic
from .wild import (
    CHUNK_ELEMENTS,
    WEIGHT_LABELS,
    BootstrapFit,
    _chunks,
    _enumerate,
    _full_from_pairs,
    _progress,
    _weight_chunk,
    sign_patterns,
)

if TYPE_CHECKING:  # pragma: no cover
    from ..design import Design

#: Below this many clusters Rademacher weights have too few distinct draws (Webb 2013).
FEW_FOR_RADEMACHER = 12
#: Relative tolerance under which a bootstrap statistic ties with the observed one.
TIE_TOL = 1e-9


class ClusterBootstrapFit(BootstrapFit):
    """The wild cluster bootstrap's fit: ties up to rounding count as at least as extreme.

    With few clusters the draws include exact copies of the observed statistic (the all-ones
    sign pattern reproduces the sample, its mirror the same |t|), which rounding must not drop.
    """

    def _null_p(self, cols: tuple[int, ...]) -> float:
        W, W_star = self._null_wald(cols)
        return float(np.mean(W_star >= W * (1.0 - TIE_TOL)))


def cluster_replicates(V: np.ndarray, scores: np.ndarray, grams: np.ndarray, rows: np.ndarray,
                       factor: float) -> tuple[np.ndarray, np.ndarray]:
    """β* − β_base on ``rows`` (p × k rows of R⁻¹) and the upper-triangle entries of their CR1
    covariance, for a chunk of cluster weights V (c × G); O(c·G·k²), nothing of size n."""
    d = V @ scores  # c × k
    W = V[:, :, None] * scores[None] - np.einsum("gjl,cl->cgj", grams, d, optimize=True)  # Q_gᵀ e*_g
    Wr = W @ rows.T  # c × G × p
    jj, ll = np.triu_indices(rows.shape[0])
    meat = np.einsum("cgj,cgl->cjl", Wr, Wr, optimize=True)[:, jj, ll]
    return d @ rows.T, factor * meat


def _residuals_without(X: np.ndarray, y: np.ndarray, cols: tuple[int, ...]) -> np.ndarray:
    """Residuals of y on X without the columns ``cols`` (the null-imposed base)."""
    keep = [j for j in range(X.shape[1]) if j not in cols]
    Q0, _ = np.linalg.qr(X[:, keep], mode="reduced")
    return y - Q0 @ (Q0.T @ y)


def _weights(kind: str, G: int, a: int, b: int, enum: bool, rng: np.random.Generator) -> np.ndarray:
    return sign_patterns(G, a, b) if enum else _weight_chunk(kind, G, b - a, rng)[:, :G]


def _notes(backend: Any, G: int, B: int, enum: bool) -> list[str]:
    notes = []
    if enum:
        notes.append(f"With {G} clusters there are only {B} distinct Rademacher sign patterns; all were enumerated "
                     f"instead of drawing {backend.replications} replicates.")
    if backend.weights == "rademacher" and G < FEW_FOR_RADEMACHER:
        notes.append(f"Only {G} clusters: Webb's six-point weights (wild option weights='webb') are advised over "
                     "Rademacher weights with so few clusters (Webb 2013).")
    if backend.se != "hc3" or backend.transform != "hc2":
        notes.append("With clusters the wild bootstrap uses the CR1 t statistic and unscaled residuals; the 'se' "
                     "and 'transform' options apply to row-level data only.")
    return notes


def wild_cluster_fit(backend: Any, design: Design, *, seed: int, progress: bool = False) -> Fit | Unavailable:
    """Unrestricted and null-imposed wild cluster bootstraps sharing one set of cluster weights."""
    t0 = time.perf_counter()
    Q, R, codes, G, beta, resid = cluster_ols(design)
    n, k = Q.shape
    Rinv = r_inverse(R)
    factor = cr_factor("cr1", n, k, G)
    grams = cluster_grams(Q, codes, G)
    scores = cluster_sums(Q * resid[:, None], codes, G)
    U = scores @ Rinv.T
    cov = factor * (U.T @ U)
    null_sets = backend._null_sets(design)
    null_scores = [cluster_sums(Q * _residuals_without(design.X, design.y, cols)[:, None], codes, G)
                   for cols in null_sets]
    enum = _enumerate(backend.weights, G, backend.replications)
    B = 2**G if enum else backend.replications
    label = f"Wild cluster bootstrap (CR1-t, {WEIGHT_LABELS[backend.weights]})"
    delta, meat = np.empty((B, k)), np.empty((B, k * (k + 1) // 2))
    null = {cols: (np.empty((B, len(cols))), np.empty((B, len(cols) * (len(cols) + 1) // 2))) for cols in null_sets}
    rng = np.random.default_rng(seed)
    step = max(1, CHUNK_ELEMENTS // (G * k))
    with _progress(progress and B * G * k * k >= 50_000_000, B, label) as advance:
        for a, b in _chunks(B, step):
            V = _weights(backend.weights, G, a, b, enum, rng)
            delta[a:b], meat[a:b] = cluster_replicates(V, scores, grams, Rinv, factor)
            for cols, s in zip(null_sets, null_scores, strict=False):
                null[cols][0][a:b], null[cols][1][a:b] = cluster_replicates(V, s, grams, Rinv[list(cols)], factor)
            advance(b - a)
    warnings = _notes(backend, G, B, enum)
    alpha = float(design.spec.alpha)
    reliable = not (enum and 2.0 / B >= alpha)
    if not reliable:
        warnings.append(f"The smallest attainable bootstrap p with {B} sign patterns is {2.0 / B:.3g}, not below "
                        f"alpha = {alpha:g}; use weights='webb' or more clusters.")
    interval = f"wild cluster bootstrap-t ({WEIGHT_LABELS[backend.weights]}, G = {G}, B = {B})"
    fit = ClusterBootstrapFit(backend.id, label, design.term_names, beta, cov, delta, meat, null, interval,
                       warnings=tuple(warnings), reliable=reliable, se_label="CR1 (wild cluster bootstrap-t)")
    fit.extras.update({
        "replications": B, "replications_requested": backend.replications, "weights": backend.weights,
        "n_clusters": G, "cluster": design.cluster_name, "se": "cr1", "enumerated": enum,
        "sign_patterns": B if enum else None, "interaction_p": fit.null_p[null_sets[-1]],
        "seconds": time.perf_counter() - t0,
    })
    return fit


def cluster_null_p_many(backend: Any, design: Design, Y: np.ndarray, *, seed: int) -> np.ndarray:
    """Null-imposed wild cluster bootstrap p of the product term(s) for each column of Y (n × D).

    Dataset d uses replicates d·B … (d+1)·B − 1 of the weight stream of ``seed``, so the first
    dataset gets the draws a fit with the same seed uses; the CR1 Wald statistic (t² for one
    product term) is compared with its null-imposed draws.
    """
    Q, R, codes, G, _, _ = cluster_ols(design)
    n, k = Q.shape
    cols = tuple(int(c) for c in design.interaction_columns)
    q = len(cols)
    rows = r_inverse(R)[list(cols)]
    factor = cr_factor("cr1", n, k, G)
    grams = cluster_grams(Q, codes, G)
    QtY = Q.T @ Y
    b_obs = (rows @ QtY).T  # D × q
    U_obs = np.einsum("gjd,pj->dgp", scores_many(Q, Y - Q @ QtY, codes, G), rows)  # D × G × q
    W_obs = batched_quadratic(b_obs, factor * np.einsum("dgp,dgr->dpr", U_obs, U_obs))
    keep = [j for j in range(k) if j not in cols]
    Q0, _ = np.linalg.qr(design.X[:, keep], mode="reduced")
    S0 = scores_many(Q, Y - Q0 @ (Q0.T @ Y), codes, G)  # G × k × D
    enum = _enumerate(backend.weights, G, backend.replications)
    B = 2**G if enum else backend.replications
    rng = np.random.default_rng(seed)
    step = max(1, CHUNK_ELEMENTS // (G * k))
    p = np.empty(Y.shape[1])
    for d in range(Y.shape[1]):
        hits = 0
        for a, b in _chunks(B, step):
            D, M = cluster_replicates(_weights(backend.weights, G, a, b, enum, rng), S0[:, :, d], grams, rows, factor)
            hits += int(np.sum(batched_quadratic(D, _full_from_pairs(M, q)) >= W_obs[d] * (1.0 - TIE_TOL)))
        p[d] = hits / B
    return p
