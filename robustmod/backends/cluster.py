"""Cluster-robust sandwich covariances CR0–CR3 (back-ends ``cr0`` … ``cr3``).

With X = QR (thin QR), clusters g = 1 … G, Q_g and ê_g the rows of cluster g, and
M_g = Q_gᵀQ_g (k × k), every member is

    V = c · R⁻¹ [Σ_g u_g u_gᵀ] R⁻ᵀ,   u_g = T_g Q_gᵀ ê_g,

and the members differ in the k × k adjustment T_g and the factor c:

====  ===========================================  ====================================  ================================
CR0   T_g = I                                      c = 1                                 Liang & Zeger (1986)
CR1   T_g = I                                      c = G/(G − 1) · (n − 1)/(n − k)       common practice (Stata, statsmodels)
CR2   T_g = (I − M_g)^(−1/2)                       c = 1                                 Bell & McCaffrey (2002)
CR3   T_g = (I − M_g)^(−1)                         c = 1                                 Bell & McCaffrey (2002), jackknife form
====  ===========================================  ====================================  ================================

CR2 and CR3 adjust the residuals by (I − H_gg)^(−1/2) and (I − H_gg)^(−1), H_gg = Q_gQ_gᵀ the
n_g × n_g block of the hat matrix. Since H_gg = U Λ Uᵀ shares its non-zero eigenvalues with
M_g, Q_gᵀ (I − H_gg)^(−p) ê_g = (I − M_g)^(−p) Q_gᵀ ê_g: only k × k matrices per cluster are
formed, never an n_g × n_g block. Eigenvalues of I − M_g at zero (a cluster that alone
determines a direction) get a pseudo-inverse (their factor is 0). CR3 equals
Σ_g (β̂ − β̂₍₋g₎)(β̂ − β̂₍₋g₎)ᵀ, β̂₍₋g₎ the fit without cluster g.

Tests: CR0, CR1 and CR3 use t with G − 1 df and Wald F(q, G − 1) (Cameron & Miller 2015). CR2
uses the Satterthwaite df of each contrast under a working model of independent, equal-variance
errors, and for several contrasts at once the approximate Hotelling T² test "HTZ"
(Pustejovsky & Tipton 2018).
"""
from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np
from scipy import linalg, sparse, stats

from ..tables import Column, Table, make_table
from .base import Estimates, FamilyBackend, Fit, JointTest, Option, Unavailable, _as_rows, quadratic_forms

if TYPE_CHECKING:  # pragma: no cover
    from ..design import Design

LABELS = {
    "cr0": "OLS + CR0 (cluster-robust)",
    "cr1": "OLS + CR1 (cluster-robust)",
    "cr2": "OLS + CR2 (bias-reduced, Satterthwaite df)",
    "cr3": "OLS + CR3 (cluster jackknife)",
}
#: How each member adjusts the cluster residuals, for the settings table.
ADJUSTMENTS = {
    "cr0": "none",
    "cr1": "none; factor G/(G − 1)·(n − 1)/(n − k)",
    "cr2": "(I − H_gg)^(−1/2) (Bell & McCaffrey 2002)",
    "cr3": "(I − H_gg)^(−1), the cluster jackknife",
}
#: Power p of (I − M_g)^(−p) for the adjusted members.
ADJUSTMENT_POWER = {"cr2": 0.5, "cr3": 1.0}
#: Eigenvalues of I − M_g at or below this count as zero (pseudo-inverse).
SINGULAR_TOL = 1e-10
#: Doubles held at once when df are computed for many contrasts (G · k · rows of L).
DF_CHUNK_ELEMENTS = 2_000_000


# ---- kernels -----------------------------------------------------------------------------
def cluster_sums(Z: np.ndarray, codes: np.ndarray, n_clusters: int) -> np.ndarray:
    """Σ_{i∈g} Z_i for every cluster g (G × p): one bincount per column, no loop over rows or clusters."""
    Z = Z.reshape(Z.shape[0], -1)
    return np.stack([np.bincount(codes, weights=Z[:, j], minlength=n_clusters) for j in range(Z.shape[1])], axis=1)


def scores_many(Q: np.ndarray, E: np.ndarray, codes: np.ndarray, n_clusters: int) -> np.ndarray:
    """Q_gᵀ e_g for every cluster and every column of E (G × k × D), via a sparse cluster indicator."""
    n = Q.shape[0]
    ind = sparse.csr_matrix((np.ones(n), (codes, np.arange(n))), shape=(n_clusters, n))
    return np.stack([ind @ (Q[:, [j]] * E) for j in range(Q.shape[1])], axis=1)


def cluster_grams(Q: np.ndarray, codes: np.ndarray, n_clusters: int) -> np.ndarray:
    """M_g = Q_gᵀQ_g for every cluster (G × k × k), from one bincount per pair of columns."""
    k = Q.shape[1]
    jj, ll = np.triu_indices(k)
    out = np.empty((n_clusters, k, k))
    for j, m in zip(jj, ll, strict=False):
        v = np.bincount(codes, weights=Q[:, j] * Q[:, m], minlength=n_clusters)
        out[:, j, m] = v
        out[:, m, j] = v
    return out


def adjustment(M: np.ndarray, power: float) -> tuple[np.ndarray, int]:
    """T_g = (I − M_g)^(−power) for every cluster (G × k × k), pseudo-inverse on zero eigenvalues.

    Returns T and the number of clusters that needed the pseudo-inverse.
    """
    lam, W = np.linalg.eigh(M)
    rest = 1.0 - lam
    ok = rest > SINGULAR_TOL
    f = np.where(ok, np.maximum(rest, SINGULAR_TOL) ** (-power), 0.0)
    return (W * f[:, None, :]) @ np.swapaxes(W, 1, 2), int((~ok).any(axis=1).sum())


def cr_factor(kind: str, n: int, k: int, n_clusters: int) -> float:
    """The small-sample factor c: G/(G − 1)·(n − 1)/(n − k) for CR1, 1 otherwise."""
    if kind == "cr1":
        return n_clusters / (n_clusters - 1) * (n - 1) / (n - k)
    return 1.0


def cluster_ols(design: Design) -> tuple[np.ndarray, np.ndarray, np.ndarray, int, np.ndarray, np.ndarray]:
    """(Q, R, cluster codes, G, β̂, ê) of the OLS fit of a clustered design, from its shared QR."""
    if design.clusters is None:
        raise ValueError("a cluster-robust fit needs a design with cluster codes")
    Q, R = design.qr
    qty = Q.T @ design.y
    beta = linalg.solve_triangular(R, qty, check_finite=False)
    return Q, R, design.clusters, int(design.clusters.max()) + 1, beta, design.y - Q @ qty


def satterthwaite_df(D: np.ndarray, P: np.ndarray, N: np.ndarray) -> np.ndarray:
    """Satterthwaite df of c'β̂ for the columns d = R⁻ᵀc of D (k × m) (Bell & McCaffrey 2002).

    Under the working model ε ~ N(0, σ²I) the CR2 variance of c'β̂ is Σ_g (G_gᵀε)² with
    G_g = (I − H) ã_g, ã_g = (I − H_gg)^(−1/2) Q_g d padded to length n, so
    df = (Σ_g Ω_gg)² / Σ_gh Ω²_gh with Ω_gh = G_gᵀG_h = δ_gh α_g − z_gᵀz_h,
    α_g = dᵀ P_g d (P_g = T_g M_g T_g) and z_g = N_g d (N_g = M_g T_g). Everything is
    O(G·k²) per contrast; the G × G matrix Ω is never formed.
    """
    G, k, _ = P.shape
    m = D.shape[1]
    out = np.empty(m)
    step = max(1, DF_CHUNK_ELEMENTS // max(1, G * k))
    for a in range(0, m, step):
        d = D[:, a:a + step]
        alpha = np.einsum("gjl,jm,lm->gm", P, d, d)
        Z = np.einsum("gjl,lm->gjm", N, d)
        zz = np.einsum("gjm,gjm->gm", Z, Z)
        ZtZ = np.einsum("gjm,glm->mjl", Z, Z)
        trace = (alpha - zz).sum(axis=0)
        square = (alpha**2).sum(axis=0) - 2.0 * (alpha * zz).sum(axis=0) + np.einsum("mjl,mjl->m", ZtZ, ZtZ)
        with np.errstate(divide="ignore", invalid="ignore"):
            out[a:a + step] = np.where(square > 0, trace**2 / np.where(square > 0, square, 1.0), np.nan)
    return out


def htz_df(D: np.ndarray, P: np.ndarray, N: np.ndarray) -> float:
    """η of the approximate Hotelling T² test of q contrasts D = R⁻ᵀCᵀ (k × q) (Pustejovsky & Tipton 2018).

    With Ω = Σ_g G_gᵀG_g (q × q, the working-model expectation of C V Cᵀ), the contrasts are
    standardised so that Ω = I; then η = q(q + 1) / Σ_st Var(d_st), and for normal errors
    Var(d_st) = Σ_gh [Ω^ss_gh Ω^tt_gh + Ω^st_gh Ω^ts_gh], Ω^ab_gh = δ_gh α^ab_g − z_agᵀz_bh.
    """
    q = D.shape[1]
    alpha = np.einsum("gjl,ja,lb->gab", P, D, D)
    Z = np.einsum("gjl,la->gja", N, D)
    omega = alpha.sum(axis=0) - np.einsum("gja,gjb->ab", Z, Z)
    chol = linalg.cholesky(0.5 * (omega + omega.T), lower=True)
    Dt = linalg.solve_triangular(chol, D.T, lower=True).T  # D L⁻ᵀ: standardised, Ω = I
    alpha = np.einsum("gjl,ja,lb->gab", P, Dt, Dt)
    Z = np.einsum("gjl,la->gja", N, Dt)
    beta = np.einsum("gja,gjb->gab", Z, Z)
    ZZ = np.einsum("gja,glc->acjl", Z, Z)
    S = (np.einsum("gab,gcd->abcd", alpha, alpha) - np.einsum("gab,gcd->abcd", alpha, beta)
         - np.einsum("gcd,gab->abcd", alpha, beta) + np.einsum("acjl,bdjl->abcd", ZZ, ZZ))
    s, t = np.meshgrid(np.arange(q), np.arange(q), indexing="ij")
    total = float((S[s, s, t, t] + S[s, t, t, s]).sum())
    return q * (q + 1) / total


# ---- the fit -------------------------------------------------------------------------------
class ClusterFit(Fit):
    """L·β̂ with cluster-robust SE; t with G − 1 df (CR0/1/3) or each row's Satterthwaite df (CR2).

    ``extra["df"]`` of every :class:`Estimates` holds the df of each row, and each row's interval
    uses its own t quantile, so significance-region boundaries are where that row's p equals alpha.
    """

    kind = "wald"

    def __init__(self, backend_id: str, label: str, term_names: tuple[str, ...], params: np.ndarray,
                 cov: np.ndarray, R: np.ndarray, n_clusters: int,
                 df_parts: tuple[np.ndarray, np.ndarray] | None, **kwargs: Any) -> None:
        super().__init__(backend_id, label, term_names, params, **kwargs)
        self.cov = np.asarray(cov, dtype=float)
        self.cov.setflags(write=False)
        self.R = R
        self.n_clusters = int(n_clusters)
        self.df_parts = df_parts  # (P, N) of CR2's Satterthwaite df; None: G − 1 for every row
        self.df: float | None = None if df_parts is not None else float(n_clusters - 1)

    def report_tables(self) -> tuple[Table, ...]:
        """The clustering this fit used: column, number and sizes of clusters, adjustment and df rule."""
        sizes = self.extras.get("cluster_sizes", (None, None, None))
        rows = [("cluster column", str(self.extras.get("cluster"))), ("clusters G", str(self.n_clusters)),
                ("rows per cluster (min, median, max)", ", ".join(f"{v:g}" for v in sizes if v is not None)),
                ("residual adjustment", str(self.extras.get("adjustment", ADJUSTMENTS.get(self.backend_id)))),
                ("degrees of freedom", str(self.extras.get("df_rule")))]
        return (make_table(f"{self.backend_id}.clusters", f"Clustering used by {self.label}",
                           [Column("setting", "Setting", "text"), Column("value", "Value", "text")], rows,
                           source=self.backend_id),)

    def row_df(self, L: np.ndarray) -> np.ndarray:
        """Degrees of freedom of each row of L."""
        L = _as_rows(L, self.params.size)
        if self.df_parts is None:
            return np.full(L.shape[0], float(self.n_clusters - 1))
        D = linalg.solve_triangular(self.R, L.T, trans="T", check_finite=False)
        return satterthwaite_df(D, *self.df_parts)

    def estimate(self, L: np.ndarray, alpha: float, *, simultaneous: bool = False) -> Estimates:
        L = _as_rows(L, self.params.size)
        est = L @ self.params
        se = np.sqrt(np.maximum(quadratic_forms(L, self.cov), 0.0))
        df = self.row_df(L)
        usable = np.isfinite(df) & (df > 0)
        safe_df = np.where(usable, df, 1.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            t = np.where(se > 0, est / se, 0.0)
        p = np.where(usable, 2 * stats.t.sf(np.abs(t), safe_df), np.nan)
        rank = int(np.linalg.matrix_rank(L)) if simultaneous else 1
        if rank > 1:
            # Scheffé band with the smallest df among the rows (the most cautious of them).
            crit = np.full(L.shape[0], np.sqrt(rank * stats.f.ppf(1 - alpha, rank, float(safe_df.min()))))
            kind = f"Scheffé band, rank {rank}, df {float(safe_df.min()):.3g}"
        else:
            crit = stats.t.ppf(1 - alpha / 2, safe_df)
            kind = "t (Satterthwaite df per row)" if self.df_parts is not None else f"t (df {self.n_clusters - 1})"
        crit = np.where(usable, crit, np.inf)
        return Estimates(est, se, est - crit * se, est + crit * se, p, 1 - alpha, kind, {"statistic": t, "df": df})

    def joint_test(self, L: np.ndarray, alpha: float) -> JointTest:
        """Wald F(q, G − 1) for CR0/1/3; for CR2 the HTZ test F = (η − q + 1)/(η q)·Q ~ F(q, η − q + 1)."""
        L = _as_rows(L, self.params.size)
        q = L.shape[0]
        r = L @ self.params
        S = L @ self.cov @ L.T
        Q = float(r @ linalg.lstsq(S, r)[0])  # (Lβ)ᵀ(LVLᵀ)⁻¹(Lβ); a least-squares solve also copes with singular S
        if self.df_parts is None:
            den = float(self.n_clusters - 1)
            stat, method = Q / q, f"cluster-robust Wald F ({q}, {den:g})"
        else:
            D = linalg.solve_triangular(self.R, L.T, trans="T", check_finite=False)
            eta = htz_df(D, *self.df_parts)
            den = eta - q + 1
            stat, method = (eta - q + 1) / (eta * q) * Q, f"HTZ approximate Hotelling T² F ({q}, {den:.3g})"
        p = float(stats.f.sf(stat, q, den)) if den > 0 else float("nan")
        return JointTest(stat, q, den, p, method, bool(p < alpha))


# ---- the back-end ----------------------------------------------------------------------------
class ClusterBackend(FamilyBackend):
    """OLS with a cluster-robust covariance; ``id`` is one of cr0, cr1, cr2, cr3 (set by the registry)."""

    id = "cr2"
    label = LABELS["cr2"]
    labels = LABELS
    assumes_constant_variance = False
    assumes_independent_rows = False
    cost = "cheap"
    options = (Option("id", "text", "cr2", "The cluster-robust estimator (set by the back-end id).",
                      choices=tuple(LABELS), case="insensitive"),)

    def __init__(self, id: str = "cr2", **options: Any) -> None:
        super().__init__(id=id, **options)

    def reject_many(self, design: Design, Y: np.ndarray, alpha: float, *, seed: int = 0) -> np.ndarray:
        """Does the product-term test reject at ``alpha`` for each column of Y (n × D)?

        All D datasets share X and the clusters, so the adjustments T_g, the df (G − 1, or the
        Satterthwaite / HTZ df of CR2, which depend on X only) are computed once; the scores
        Q_gᵀê_g of every dataset come from one sparse product per column of Q. The decisions are
        those of :meth:`ClusterFit.estimate` / :meth:`ClusterFit.joint_test`. ``seed`` is unused.
        """
        Q, R, codes, G, _, _ = cluster_ols(design)
        Y = np.asarray(Y, dtype=float)
        if Y.ndim != 2 or Y.shape[0] != Q.shape[0]:
            raise ValueError(f"Y must be n × D with n = {Q.shape[0]}; got shape {Y.shape}")
        n, k = Q.shape
        L = design.interaction_rows()
        q = L.shape[0]
        QtY = Q.T @ Y
        r = (L @ linalg.solve_triangular(R, QtY, check_finite=False)).T  # D × q
        S = scores_many(Q, Y - Q @ QtY, codes, G)  # G × k × D
        D = linalg.solve_triangular(R, L.T, trans="T", check_finite=False)  # k × q
        df_parts = None
        if self.id in ADJUSTMENT_POWER:
            M = cluster_grams(Q, codes, G)
            T, _ = adjustment(M, ADJUSTMENT_POWER[self.id])
            S = np.einsum("gjl,gld->gjd", T, S)
            df_parts = (T @ M @ T, M @ T) if self.id == "cr2" else None
        U = np.einsum("gjd,jp->dgp", S, D)  # D × G × q: cᵀR⁻¹ u_g per dataset
        V = cr_factor(self.id, n, k, G) * np.einsum("dgp,dgr->dpr", U, U)
        stat = np.einsum("dp,dp->d", r, np.linalg.solve(V, r[:, :, None])[:, :, 0])  # Wald Q (t² for q = 1)
        if q == 1:
            den = float(satterthwaite_df(D, *df_parts)[0]) if df_parts is not None else float(G - 1)
            return stats.f.sf(stat, 1, den) < alpha
        if df_parts is None:
            return stats.f.sf(stat / q, q, float(G - 1)) < alpha
        eta = htz_df(D, *df_parts)
        return stats.f.sf((eta - q + 1) / (eta * q) * stat, q, eta - q + 1) < alpha

    def fit(self, design: Design, *, seed: int = 0, progress: bool = False) -> Fit | Unavailable:
        """β̂ from the shared QR, V from the per-cluster sums (``seed`` unused: nothing is random)."""
        if design.clusters is None:
            return Unavailable(self.id, self.label, "Cluster-robust standard errors need cluster ids; name the column "
                               "that holds them (compare(..., cluster='team')).")
        Q, R = design.qr
        return cluster_fit(self.id, Q, R, design.y, design.clusters, design.term_names,
                           cluster_name=design.cluster_name)


def cluster_fit(kind: str, Q: np.ndarray, R: np.ndarray, y: np.ndarray, codes: np.ndarray,
                term_names: tuple[str, ...], *, cluster_name: str | None = None, label: str | None = None,
                backend_id: str | None = None) -> ClusterFit:
    """Least squares from a thin QR factor X = QR with a CR covariance of ``kind`` (cr0 … cr3).

    For a weighted fit pass the QR of W^(1/2)X and W^(1/2)y: CR0/CR1 are then the weighted
    sandwich, and CR2/CR3 adjust the residuals of the transformed model (identity working model
    there). For CR2 with the working covariance W⁻¹ (as R's clubSandwich) use :func:`weighted_cr2_fit`.
    """
    n, k = Q.shape
    G = int(codes.max()) + 1
    qty = Q.T @ y
    beta = linalg.solve_triangular(R, qty, check_finite=False)
    scores = cluster_sums(Q * (y - Q @ qty)[:, None], codes, G)  # Q_gᵀ ê_g, G × k
    warnings: list[str] = []
    df_parts: tuple[np.ndarray, np.ndarray] | None = None
    if kind in ADJUSTMENT_POWER:
        M = cluster_grams(Q, codes, G)
        T, singular = adjustment(M, ADJUSTMENT_POWER[kind])
        scores = np.einsum("gjl,gl->gj", T, scores)
        if singular:
            warnings.append(f"{singular} cluster(s) alone determine a direction of the coefficients "
                            "(I − H_gg is singular); a pseudo-inverse was used for them"
                            + ("; the cluster jackknife is undefined there." if kind == "cr3" else "."))
        if kind == "cr2":
            df_parts = (T @ M @ T, M @ T)
    Rinv_meat = linalg.solve_triangular(R, scores.T, check_finite=False)  # R⁻¹ Uᵀ, k × G
    cov = cr_factor(kind, n, k, G) * (Rinv_meat @ Rinv_meat.T)
    sizes = np.bincount(codes, minlength=G)
    extras = {"n_clusters": G, "cluster": cluster_name,
              "cluster_sizes": (int(sizes.min()), float(np.median(sizes)), int(sizes.max())), "df_rule":
              "Satterthwaite per contrast" if df_parts is not None else f"G − 1 = {G - 1}"}
    reliable = not (kind == "cr3" and warnings)
    return ClusterFit(backend_id or kind, label or LABELS[kind], term_names, beta, 0.5 * (cov + cov.T), R, G,
                      df_parts, warnings=tuple(warnings), reliable=reliable, extras=extras, se_label=kind.upper())


#: Doubles of the padded n_g × n_g blocks held at once by :func:`weighted_cr2_fit`.
BLOCK_ELEMENTS = 4_000_000


def weighted_cr2_parts(Q: np.ndarray, ew: np.ndarray, w: np.ndarray, codes: np.ndarray,
                       n_clusters: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Scores s_g and the df parts (P_g, N_g) of CR2 on a weighted fit (Pustejovsky & Tipton 2018).

    Q from the thin QR of W^(1/2)X, ê_w = W^(1/2)(y − Xβ̂), working covariance Φ = W⁻¹. With
    D_g = Φ_g^(1/2) the adjustment is A_g = D_gᵀ B_g^(−1/2) D_g, B_g = D_g (I − H)_g Φ (I − H)_gᵀ D_gᵀ
    = W_g⁻¹ (I − Q_gQ_gᵀ) W_g⁻¹, so with C_g = W_g⁻¹ B_g^(−1/2) Q_g (n_g × k):
    s_g = C_gᵀ ê_w,g, P_g = C_gᵀC_g and N_g = Q_gᵀC_g (the df formula of :func:`satterthwaite_df`
    under Φ). B_g is an n_g × n_g block: clusters are padded to the largest size in batches.
    """
    k = Q.shape[1]
    order = np.argsort(codes, kind="stable")
    sizes = np.bincount(codes, minlength=n_clusters)
    starts = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    pos = np.empty(codes.size, np.intp)
    pos[order] = np.arange(codes.size) - np.repeat(starts, sizes)  # position of each row in its cluster
    S, P, N = np.zeros((n_clusters, k)), np.zeros((n_clusters, k, k)), np.zeros((n_clusters, k, k))
    by_size = np.argsort(sizes, kind="stable")
    a = 0
    while a < n_clusters:
        b = a + 1
        while b < n_clusters and (b - a + 1) * int(sizes[by_size[b]]) ** 2 <= BLOCK_ELEMENTS:
            b += 1
        groups = by_size[a:b]
        m = int(sizes[groups].max())
        slot = np.full(n_clusters, -1)
        slot[groups] = np.arange(groups.size)
        rows = np.flatnonzero(np.isin(codes, groups))
        gi, pi = slot[codes[rows]], pos[rows]
        Qp = np.zeros((groups.size, m, k))
        Qp[gi, pi] = Q[rows]
        winv = np.ones((groups.size, m))
        winv[gi, pi] = 1.0 / w[rows]
        e = np.zeros((groups.size, m))
        e[gi, pi] = ew[rows]
        pad = np.ones((groups.size, m), bool)
        pad[gi, pi] = False
        WQ = winv[:, :, None] * Qp
        B = -np.einsum("gik,gjk->gij", WQ, WQ)
        B += np.einsum("gi,ij->gij", np.where(pad, 1.0, winv**2), np.eye(m))
        lam, U = np.linalg.eigh(B)
        ok = lam > SINGULAR_TOL * lam.max(axis=1, keepdims=True)  # B_g^(+1/2): pseudo-inverse root
        f = np.where(ok, np.where(ok, lam, 1.0) ** -0.5, 0.0)
        root = (U * f[:, None, :]) @ np.swapaxes(U, 1, 2)
        C = winv[:, :, None] * (root @ Qp)
        S[groups] = np.einsum("gik,gi->gk", C, e)
        P[groups] = np.einsum("gik,gil->gkl", C, C)
        N[groups] = np.einsum("gik,gil->gkl", Qp, C)
        a = b
    return S, P, N


def weighted_cr2_fit(Q: np.ndarray, R: np.ndarray, yw: np.ndarray, w: np.ndarray, codes: np.ndarray,
                     term_names: tuple[str, ...], *, cluster_name: str | None, label: str,
                     backend_id: str, fit_class: type[ClusterFit] = ClusterFit,
                     fit_kwargs: dict[str, Any] | None = None, **kwargs: Any) -> ClusterFit:
    """Weighted least squares (QR of W^(1/2)X, yw = W^(1/2)y) with the CR2 covariance of
    :func:`weighted_cr2_parts` and Satterthwaite df per contrast; HTZ for several contrasts."""
    G = int(codes.max()) + 1
    qty = Q.T @ yw
    beta = linalg.solve_triangular(R, qty, check_finite=False)
    S, P, N = weighted_cr2_parts(Q, yw - Q @ qty, w, codes, G)
    Rinv_meat = linalg.solve_triangular(R, S.T, check_finite=False)
    cov = Rinv_meat @ Rinv_meat.T
    sizes = np.bincount(codes, minlength=G)
    extras = dict(kwargs.pop("extras", {}))
    extras.update({"n_clusters": G, "cluster": cluster_name, "df_rule": "Satterthwaite per contrast",
                   "cluster_sizes": (int(sizes.min()), float(np.median(sizes)), int(sizes.max()))})
    return fit_class(backend_id, label, term_names, beta, 0.5 * (cov + cov.T), R, G, (P, N), extras=extras,
                     se_label="CR2 on the weighted fit", **kwargs, **(fit_kwargs or {}))
