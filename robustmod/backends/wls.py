"""Weighted least squares with a modelled variance function (back-end ``wls``).

Mean model y = Xβ + ε with Var(εᵢ) = σᵢ²; the log-variance ηᵢ = log σᵢ² follows one of

==========  =====================================  ==========================================
loglinear   ηᵢ = zᵢᵀγ                               multiplicative heteroscedasticity, Harvey (1976)
power       σᵢ = σ·|μᵢ|^θ, ηᵢ = c + 2θ·log|μᵢ|      power of the mean, Carroll & Ruppert (1988)
groups      ηᵢ = γ_g for the group g of row i       one variance per group
known       σᵢ² = s² / wᵢ, wᵢ a column of weights   known inverse variances (up to the scale s²)
==========  =====================================  ==========================================

Estimation
    *two-step FGLS* (Harvey 1976; Wooldridge, Introductory Econometrics, ch. 8): OLS
    residuals ê, regress log ê² on z, add −E[log χ²₁] = 1.2704 to the intercept, weight by
    wᵢ = exp(−ẑᵢᵀγ̂). For groups the variance of a group is the mean of its ê².
    *ML* (default) maximises ℓ = −½ Σ [log 2π + ηᵢ + (yᵢ − μᵢ)² e^{−ηᵢ}] from the two-step
    start by Fisher scoring with step halving: in γ with β profiled out by WLS when η = Zγ
    (log-linear, groups; the information of γ is ½ZᵀZ), jointly in (β, c, θ) for the power of
    the mean with the expected information J_μᵀ W J_μ + ½ J_ηᵀ J_η. One routine per variance
    function, batched over datasets: a single fit is a batch of one. Converged means the Newton
    decrement ½ gᵀJ⁻¹g fell below 1e-8 (log-likelihood units); otherwise the two-step estimate is
    kept with a warning.

Standard errors of β (the weighted regression of √w·y on √w·X, thin QR, no inverse of XᵀWX)
    *robust* (default): HC3 on the weighted regression, valid when the variance function is
    wrong (Romano & Wolf 2017); *model*: s²(XᵀWX)⁻¹ with s² = Σ wᵢêᵢ² / (n − k).
Every t test uses n − k degrees of freedom.
With clustered rows (a design with cluster codes) the robust SE is CR2 on the weighted fit with
the working covariance W⁻¹ in the adjustment (Pustejovsky & Tipton 2018, as R's clubSandwich
does for a weighted fit with inverse-variance weights) and Satterthwaite df per contrast.
"""
from __future__ import annotations

import math
import warnings as _warnings
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, cast

import numpy as np
import pandas as pd
from scipy import linalg, stats

from ..defaults import LEVERAGE_ONE_TOL
from ..errors import InputError, option_error
from .base import Backend, Option, Unavailable, WaldFit, one_row_table
from .cluster import ClusterFit, weighted_cr2_fit
from .hc import hc_weights, leverages, r_inverse, sandwich
from .kernels import (
    ETA_LIMIT,
    design_row_numbers,
    floored_squares,
    leverage_one_reason,
    log_square_regression,
    solve_triangular_2d,
    wald_test,
    zero_residual_note,
)

if TYPE_CHECKING:  # pragma: no cover
    from ..design import Design
    from ..stream import StreamData
    from ..tables import Table

VARIANCE_FUNCTIONS = ("loglinear", "power", "groups", "known")
ESTIMATIONS = ("ml", "twostep")
SE_TYPES = ("robust", "model")
#: A ratio of largest to smallest weight above this earns a warning.
WEIGHT_RATIO_WARNING = 1e6
#: |μᵢ| below this share of mean |y| is raised to it in the power-of-the-mean model.
MEAN_FLOOR = 1e-6
ML_MAXITER = 200
#: Scoring stops when ½ gᵀH⁻¹g (log-likelihood units) falls below this ...
ML_DECREMENT_TOL = 1e-20
#: ... or when no step improves the likelihood any more while the decrement is below this: the
#: optimum to rounding (the streamed fit follows the same rule, so both stop at the same iterate).
ML_ROUNDING_TOL = 1e-10

#: The residual adjustment of the clustered WLS fit, for its clustering table.
CR2_WEIGHTED = "B_g^(−1/2), B_g = W_g⁻¹(I − H_gg)W_g⁻¹: CR2 with working covariance W⁻¹ (Pustejovsky & Tipton 2018)"

_FUNCTION_LABELS = {"loglinear": "log-linear variance", "power": "power-of-the-mean variance",
                    "groups": "one variance per group", "known": "known weights"}


class WLSWarning(UserWarning):
    """A WLS fit that needed a fallback or has extreme weights."""


# --------------------------------------------------------------------------------------
# The variance model: η(β, γ) and its Jacobians
# --------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class VarianceModel:
    """A variance function on one design.

    ``function`` is 'loglinear', 'power', 'groups' or 'known'; ``Z`` (n × p) holds the
    variance regressors (one-hot columns for groups, None for power and known);
    ``names`` the γ names; ``weights`` the known inverse variances.
    """

    function: str
    Z: np.ndarray | None = None
    names: tuple[str, ...] = ()
    weights: np.ndarray | None = None
    groups: np.ndarray | None = None  # integer group codes (groups only)
    source: str | None = None  # the column behind z, the groups or the weights

    @property
    def n_gamma(self) -> int:
        return 0 if self.function == "known" else len(self.names)

    def mean_floor(self, y: np.ndarray) -> float:
        scale = float(np.mean(np.abs(y)))
        return MEAN_FLOOR * (scale if scale > 0 else 1.0)

    def eta(self, X: np.ndarray, beta: np.ndarray, gamma: np.ndarray, floor: float) -> np.ndarray:
        """Log-variances ηᵢ (n,)."""
        if self.function == "power":
            m = np.maximum(np.abs(X @ beta), floor)
            return gamma[0] + 2.0 * gamma[1] * np.log(m)
        return self.Z @ gamma

    def jacobians(self, X: np.ndarray, beta: np.ndarray, gamma: np.ndarray, floor: float) -> tuple[np.ndarray | None, np.ndarray]:
        """(∂η/∂β or None when η does not involve β, ∂η/∂γ)."""
        if self.function == "power":
            mu = X @ beta
            m = np.abs(mu)
            inside = m > floor
            d_beta = np.where(inside, 2.0 * gamma[1] / np.where(inside, mu, 1.0), 0.0)[:, None] * X
            d_gamma = np.column_stack([np.ones_like(mu), 2.0 * np.log(np.maximum(m, floor))])
            return d_beta, d_gamma
        assert self.Z is not None  # every variance function but power and known has its regressors
        return None, self.Z


# --------------------------------------------------------------------------------------
# The weighted regression kernel (batched over datasets: a single fit is D = 1)
# --------------------------------------------------------------------------------------
def weighted_qr(X: np.ndarray, W: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Thin QR of √w·X for each row of W (D × n) → Q (D, n, k), R (D, k, k)."""
    Xw = np.sqrt(W)[:, :, None] * X[None, :, :]
    return np.linalg.qr(Xw, mode="reduced")


def weighted_resid(Q: np.ndarray, yw: np.ndarray) -> np.ndarray:
    """Whitened residuals √w·(y − Xβ̂) = yw − Q Qᵀ yw for each dataset (D, n)."""
    return yw - np.einsum("dnk,dk->dn", Q, np.einsum("dnk,dn->dk", Q, yw))


def _profile_nll(X: np.ndarray, Y: np.ndarray, eta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """½ Σ [ηᵢ + ê²ᵢ e^{−ηᵢ}] at the WLS β̂(η), with the ratios rᵢ = ê²ᵢ e^{−ηᵢ} (D × n)."""
    eta = np.clip(eta, -ETA_LIMIT, ETA_LIMIT)
    W = np.exp(-eta)
    Q, _ = weighted_qr(X, W)
    r = weighted_resid(Q, np.sqrt(W) * Y) ** 2
    return 0.5 * (eta + r).sum(axis=1), r


# --------------------------------------------------------------------------------------
# Two-step FGLS
# --------------------------------------------------------------------------------------
def twostep_gamma(vm: VarianceModel, X: np.ndarray, Y: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Two-step variance parameters for each dataset (rows of Y, D × n).

    Returns (γ̂ (D × p), SE of γ̂ (D × p), number of residuals raised from zero (D,)).
    Log-linear and power: OLS of log ê² on z (z = [1, log|μ̂|] for power, slope 2θ), intercept
    + 1.2704 (Harvey 1976), SEs from the auxiliary regression. Groups: log of the mean ê² of
    each group, SE by the delta method sqrt(var(ê²) / (n_g·mean(ê²)²)).
    """
    Qx, _ = np.linalg.qr(X, mode="reduced")
    fitted = (Y @ Qx) @ Qx.T
    E = Y - fitted
    e2, raised = floored_squares(E, Y)
    if vm.function == "groups":
        assert vm.Z is not None
        G = vm.Z  # one-hot, n × p
        counts = G.sum(axis=0)
        mean = (e2 @ G) / counts
        second = ((e2**2) @ G) / counts
        var = np.maximum(second - mean**2, 0.0) * counts / np.maximum(counts - 1, 1)
        return np.log(mean), np.sqrt(var / (counts * mean**2)), raised
    if vm.function == "power":
        # Each dataset has its own regressor log|μ̂|: z = [1, log|μ̂|], slope 2θ.
        logm = np.log(np.maximum(np.abs(fitted), vm.mean_floor(Y[0])))
        Z = np.stack([np.ones_like(logm), logm], axis=2)
        coef, se = log_square_regression(np.log(e2), Z)
        return coef * [1.0, 0.5], se * [1.0, 0.5], raised
    assert vm.Z is not None  # loglinear: the chosen variance regressors
    coef, se = log_square_regression(np.log(e2), vm.Z)
    return coef, se, raised


# --------------------------------------------------------------------------------------
# Maximum likelihood
# --------------------------------------------------------------------------------------
def loglik(vm: VarianceModel, X: np.ndarray, y: np.ndarray, beta: np.ndarray, gamma: np.ndarray, floor: float) -> float:
    """Normal log-likelihood ℓ = −½ Σ [log 2π + ηᵢ + (yᵢ − xᵢᵀβ)² e^{−ηᵢ}]."""
    eta = np.clip(vm.eta(X, beta, gamma, floor), -ETA_LIMIT, ETA_LIMIT)
    e = y - X @ beta
    return float(-0.5 * np.sum(math.log(2 * math.pi) + eta + e**2 * np.exp(-eta)))


def _information_factor(vm: VarianceModel, X: np.ndarray, beta: np.ndarray, gamma: np.ndarray,
                        floor: float) -> np.ndarray:
    """J (2n × (k+p)) with JᵀJ = expected information: rows √wᵢ·[xᵢ, 0] over rows ½√2·∂ηᵢ/∂(β, γ)."""
    eta = np.clip(vm.eta(X, beta, gamma, floor), -ETA_LIMIT, ETA_LIMIT)
    sw = np.exp(-0.5 * eta)
    d_beta, d_gamma = vm.jacobians(X, beta, gamma, floor)
    n, k = X.shape
    top = np.hstack([sw[:, None] * X, np.zeros((n, d_gamma.shape[1]))])
    bottom = np.hstack([np.zeros((n, k)) if d_beta is None else d_beta, d_gamma]) / math.sqrt(2.0)
    return np.vstack([top, bottom])


def ml_fit(vm: VarianceModel, X: np.ndarray, y: np.ndarray, beta0: np.ndarray, gamma0: np.ndarray
           ) -> tuple[np.ndarray, np.ndarray, np.ndarray | None, bool, int, str]:
    """Joint ML of (β, γ) of one dataset from a start: the batched routine of :meth:`WLSBackend.reject_many`
    on a batch of one (:func:`batched_ml_gamma` with β profiled out for η = Zγ, :func:`batched_ml_power`
    for the power of the mean). Returns (β̂, γ̂, information factor R̂ with R̂ᵀR̂ the expected
    information, converged, iterations, message)."""
    floor = vm.mean_floor(y)
    if vm.function == "power":
        B, G, done, iters = batched_ml_power(X, y[None, :], beta0[None, :], gamma0[None, :], floor)
        b, g = B[0], G[0]
    else:
        G, done, iters = batched_ml_gamma(vm, X, y[None, :], gamma0[None, :])
        g = G[0]
        W = np.exp(-np.clip(vm.Z @ g, -ETA_LIMIT, ETA_LIMIT))
        Q, R = weighted_qr(X, W[None, :])
        b = linalg.solve_triangular(R[0], Q[0].T @ (np.sqrt(W) * y), check_finite=False)
    ok = bool(done[0] and np.all(np.isfinite(b)) and np.all(np.isfinite(g)))
    message = "converged" if ok else (f"iteration limit reached ({int(iters[0])} iterations)"
                                      if int(iters[0]) >= ML_MAXITER else "no step improved the likelihood")
    Rinfo = None
    if ok:
        Rinfo = cast(np.ndarray, np.linalg.qr(_information_factor(vm, X, b, g, floor), mode="r"))  # mode "r" gives R alone
        ok = bool(np.all(np.isfinite(Rinfo)) and np.all(np.abs(np.diag(Rinfo)) > 0))
        message = message if ok else "the information at the optimum is singular"
    return b, g, Rinfo, ok, int(iters[0]), message


def _backtrack(trial: Any, t: np.ndarray, f_old: np.ndarray, halvings: int = 30) -> tuple[np.ndarray, np.ndarray, Any]:
    """Batched step halving: for each dataset halve its step length ``t`` until the objective
    ``trial(t)[0]`` is finite and not above ``f_old`` (at most ``halvings`` times).
    Returns (accepted, objective, what ``trial`` returned besides the objective)."""
    for _ in range(halvings):
        fc, extra = trial(t)
        ok = np.isfinite(fc) & (fc <= f_old + 1e-12 * np.abs(f_old))
        if ok.all():
            break
        t = np.where(ok, t, t / 2)
    return ok, fc, extra


def batched_ml_gamma(vm: VarianceModel, X: np.ndarray, Y: np.ndarray, gamma0: np.ndarray,
                     *, maxiter: int = ML_MAXITER, tol: float = ML_DECREMENT_TOL
                     ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """ML of γ for η = Zγ across datasets at once (rows of Y), β profiled out by WLS.

    Fisher scoring with step halving: γ ← γ + t·(ZᵀZ)⁻¹ Zᵀ(r − 1), rᵢ = ê²ᵢ e^{−ηᵢ}
    (Harvey 1976); the expected information of γ is ½ZᵀZ whatever β. Returns (γ̂, converged,
    iterations) per dataset.
    """
    Z = vm.Z
    assert Z is not None  # η = Zγ: loglinear or groups
    Qz, Rz = np.linalg.qr(Z, mode="reduced")
    G = gamma0.copy()
    f, r = _profile_nll(X, Y, G @ Z.T)
    done = np.zeros(G.shape[0], dtype=bool)
    failed = np.zeros(G.shape[0], dtype=bool)
    iters = np.zeros(G.shape[0], dtype=int)
    for _ in range(maxiter):
        act = np.flatnonzero(~done & ~failed)  # work only on the datasets still moving
        if act.size == 0:
            break
        Ga, fa, ra = G[act], f[act], r[act]
        rhs = (ra - 1.0) @ Qz
        step = solve_triangular_2d(Rz, rhs.T).T
        decrement = 0.25 * (rhs**2).sum(axis=1)  # ½ scoreᵀ info⁻¹ score, in ℓ units
        now = decrement < tol
        done[act[now]] = True
        iters[act[~now]] += 1

        def trial(t: np.ndarray, Ga: np.ndarray = Ga, step: np.ndarray = step, act: np.ndarray = act
                  ) -> tuple[np.ndarray, tuple[np.ndarray, np.ndarray]]:
            cand = Ga + t[:, None] * step
            fc, rc = _profile_nll(X, Y[act], cand @ Z.T)
            return fc, (cand, rc)

        ok, fc, (cand, rc) = _backtrack(trial, np.where(now, 0.0, 1.0), fa)
        flat = ~ok & (decrement < ML_ROUNDING_TOL)  # no step improves, at the optimum to rounding
        done[act[flat]] = True
        failed[act[~ok & ~flat]] = True  # no step improves far from it: leave it to the two-step fallback
        G[act] = np.where(ok[:, None], cand, Ga)
        f[act] = np.where(ok, fc, fa)
        r[act] = np.where(ok[:, None], rc, ra)
    return G, done, iters


# --------------------------------------------------------------------------------------
# The fit
# --------------------------------------------------------------------------------------
def _readonly(a: np.ndarray) -> np.ndarray:
    out = np.array(a, dtype=float)
    out.setflags(write=False)
    return out


class WLSFit(WaldFit):
    """A WLS Wald fit that also carries ``sigma_hat``, the fitted error SD of each design row."""

    def __init__(self, *args: Any, sigma_hat: np.ndarray, weights: np.ndarray, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.sigma_hat, self.weights = _readonly(sigma_hat), _readonly(weights)

    def report_tables(self) -> tuple[Table, ...]:
        return variance_model_tables(self.extras, self.backend_id)


class ClusteredWLSFit(ClusterFit):
    """The WLS fit of clustered rows: CR2 on the weighted fit, Satterthwaite df per contrast."""

    def __init__(self, *args: Any, sigma_hat: np.ndarray, weights: np.ndarray, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.sigma_hat, self.weights = _readonly(sigma_hat), _readonly(weights)

    def report_tables(self) -> tuple[Table, ...]:
        return super().report_tables() + variance_model_tables(self.extras, self.backend_id)


class StreamedWLSFit(WaldFit):
    """The WLS fit of data read in chunks: no per-row weights are held; the variance model's tables."""

    def report_tables(self) -> tuple[Table, ...]:
        return variance_model_tables(self.extras, self.backend_id)


def streamed_wls_fit(backend_id: str, s: Any, names: tuple[str, ...], rss_ols: float, *, se: str,
                     term_names: tuple[str, ...]) -> StreamedWLSFit:
    """The Wald fit and the extras of :func:`fit_wls` from a :class:`robustmod.kernels.wls.StreamedWLS`."""
    n, k, p = s.weighted.n, s.weighted.k, len(names)
    notes: list[str] = []
    used = "ml" if s.converged else "twostep (ML did not converge)"
    if not s.converged:
        notes.append("ML of the variance model did not converge (scoring stopped); the two-step FGLS "
                     "estimate is reported instead.")
    if not math.isfinite(s.weight_ratio) or s.weight_ratio > WEIGHT_RATIO_WARNING:
        notes.append(f"The largest weight is {s.weight_ratio:.3g} times the smallest; a few rows dominate the fit "
                     "(check the variance model or the data).")
    lr = lr_from_rss(n, k, p, rss_ols, s.loglik)
    info: dict[str, Any] = {
        "function": "loglinear", "z_terms": list(names), "source_column": None,
        "gamma": {name: {"estimate": float(g), "se": float(e)} for name, g, e in zip(names, s.gamma, s.gamma_se,
                                                                                  strict=True)},
        "loglik": s.loglik, "loglik_constant": lr["loglik_constant"], "lr_test": lr["lr_test"], "aic": lr["aic"],
        "aic_constant": lr["aic_constant"], "weight_ratio": s.weight_ratio, "scale_s2": s.scale_s2,
        "estimation": used, "se_type": se, "converged": s.converged, "iterations": s.iterations,
        "zero_residuals_raised": None, "read_in_chunks": True,
    }
    est = "ML" if s.converged else "two-step FGLS"
    label = f"WLS, {_FUNCTION_LABELS['loglinear']} ({est}) + {'HC3' if se == 'robust' else 'model SE'}"
    return StreamedWLSFit(backend_id, label, term_names, s.beta, s.cov, n - k, warnings=tuple(notes),
                          extras={"variance_model": info, "df_resid": n - k, "sigma": float(math.sqrt(s.scale_s2))},
                          se_label="HC3 on the weighted fit" if se == "robust" else "model-based s²(XᵀWX)⁻¹")


def variance_model_tables(extras: dict[str, Any], src: str) -> tuple[Table, ...]:
    """The variance model (coefficients on the user's terms) and its fit: LR test against constant
    variance, AIC of both, convergence, weight ratio — all from ``extras['variance_model']``."""
    from ..tables import Column, NotApplicable, make_table  # noqa: PLC0415

    vm = extras["variance_model"]
    tables = []
    gamma = vm.get("gamma") or {}
    if gamma:
        rows = [(_GAMMA_LABELS.get(name, name), g["estimate"],
                 NotApplicable("no standard error for this estimate") if g["se"] is None else g["se"])
                for name, g in gamma.items()]
        what = {"loglinear": "log σᵢ² = zᵢᵀγ", "power": "log σᵢ² = log σ² + 2θ·log|μᵢ|",
                "groups": "log σᵢ² = one value per group"}.get(vm["function"], "")
        tables.append(make_table(f"{src}.variance_model", f"Variance model ({what})",
                                 [Column("term", "Term", "text"), Column("estimate", "Estimate"),
                                  Column("se", "SE")], rows, source=src,
                                 notes=[f"Estimated by {_ESTIMATION_WORDS.get(vm['estimation'], vm['estimation'])}."]))
    lr = vm.get("lr_test")
    no_lr = NotApplicable("the variance model has no parameter beyond the scale to test")
    cells = [
        ("lr_statistic", "LR statistic against constant variance", "number", lr["statistic"] if lr else no_lr),
        ("lr_df", "LR df", "df", lr["df"] if lr else no_lr), ("lr_p", "LR p", "p", lr["p"] if lr else no_lr),
        ("aic", "AIC, modelled variance", "number", vm.get("aic")),
        ("aic_constant", "AIC, constant variance", "number", vm.get("aic_constant")),
        ("converged", "ML converged", "flag", vm.get("converged")),
        ("iterations", "Iterations", "integer", vm.get("iterations") if vm.get("converged") is not None else None),
        ("weight_ratio", "Largest / smallest weight", "number", vm.get("weight_ratio")),
    ]
    notes = [vm["loglik_note"].capitalize() + "."] if vm.get("loglik_note") else []
    tables.append(one_row_table(f"{src}.variance_fit", "Fit of the variance model", src, cells, notes))
    return tuple(tables)


#: Human labels of the γ of the power-of-the-mean model (other models use the user's term names).
_GAMMA_LABELS = {"log_sigma2": "log σ² (scale)", "theta": "θ (power of |mean|)"}
_ESTIMATION_WORDS = {"ml": "maximum likelihood", "twostep": "two-step FGLS", "known": "known weights",
                     "twostep (ML did not converge)": "two-step FGLS (maximum likelihood did not converge)"}


def _lr_parts(n: int, k: int, p: int, y: np.ndarray, X: np.ndarray, ll: float | None) -> dict[str, Any]:
    """LR test of the variance model against constant variance, AIC of both."""
    Q, _ = np.linalg.qr(X, mode="reduced")
    e = y - Q @ (Q.T @ y)
    return lr_from_rss(n, k, p, float(e @ e), ll)


def lr_from_rss(n: int, k: int, p: int, rss: float, ll: float | None) -> dict[str, Any]:
    """The LR test and AICs of :func:`_lr_parts` from the OLS residual sum of squares."""
    ll0 = -0.5 * n * (math.log(2 * math.pi) + math.log(max(rss, np.finfo(float).tiny) / n) + 1.0)
    out: dict[str, Any] = {"loglik_constant": ll0, "aic_constant": -2 * ll0 + 2 * (k + 1)}
    if ll is None or p <= 1:
        out["lr_test"] = None
        out["aic"] = None if ll is None else -2 * ll + 2 * (k + p)
        return out
    stat = max(2.0 * (ll - ll0), 0.0)
    out["lr_test"] = {"statistic": stat, "df": p - 1, "p": float(stats.chi2.sf(stat, p - 1))}
    out["aic"] = -2 * ll + 2 * (k + p)
    return out


@dataclass
class _VarianceEstimate:
    """What the variance-model step hands to the weighted fit."""

    W: np.ndarray
    gamma: np.ndarray
    gamma_se: np.ndarray | None
    beta_ml: np.ndarray | None
    converged: bool | None
    iterations: int
    used: str
    raised: int
    notes: list[str]


def _estimate_variance(vm: VarianceModel, X: np.ndarray, y: np.ndarray, estimation: str,
                       row_numbers: np.ndarray | None = None) -> _VarianceEstimate:
    """Weights from the variance model: known, two-step FGLS, or ML from the two-step start
    (kept only if it converged and does not lower the log-likelihood; otherwise two-step with a note)."""
    k = X.shape[1]
    notes: list[str] = []
    converged: bool | None = None
    iterations = 0
    used = estimation
    gamma = np.zeros(0)
    gamma_se: np.ndarray | None = None
    beta_ml: np.ndarray | None = None
    raised = 0
    floor = vm.mean_floor(y)
    if vm.function == "known":
        assert vm.weights is not None
        W = vm.weights / vm.weights.mean()
        used = "known"
    else:
        g2, g2_se, raised_arr = twostep_gamma(vm, X, y[None, :])
        gamma, gamma_se, raised = g2[0], g2_se[0], int(raised_arr[0])
        rows = np.arange(1, len(y) + 1) if row_numbers is None else row_numbers
        if raised and (note := zero_residual_note(X, y, rows)):
            notes.append(note)
        beta_ols = np.linalg.lstsq(X, y, rcond=None)[0]
        W = np.exp(-np.clip(vm.eta(X, beta_ols, gamma, floor), -ETA_LIMIT, ETA_LIMIT))
        Q, R = weighted_qr(X, W[None, :])
        beta2 = linalg.solve_triangular(R[0], Q[0].T @ (np.sqrt(W) * y), check_finite=False)
        if vm.function == "power":
            # The two-step weights use the OLS mean; refresh them at the FGLS mean.
            W = np.exp(-np.clip(vm.eta(X, beta2, gamma, floor), -ETA_LIMIT, ETA_LIMIT))
        if estimation == "ml":
            b_ml, g_ml, Rinfo, ok, iterations, message = ml_fit(vm, X, y, beta2, gamma)
            ll_two = _loglik_profiled_scale(vm, X, y, beta2, gamma, floor)
            ll_ml = loglik(vm, X, y, b_ml, g_ml, floor) if ok else -np.inf
            if ok and ll_ml >= ll_two - 1e-8 * abs(ll_two):
                converged = True
                gamma, beta_ml = g_ml, b_ml
                assert Rinfo is not None  # ml_fit returns the information factor whenever it converged
                cov_all = _cov_from_r(Rinfo)
                gamma_se = np.sqrt(np.maximum(np.diag(cov_all)[k:], 0.0))
                W = np.exp(-np.clip(vm.eta(X, b_ml, g_ml, floor), -ETA_LIMIT, ETA_LIMIT))
            else:
                converged = False
                used = "twostep (ML did not converge)"
                notes.append(f"ML of the variance model did not converge ({message}); the two-step FGLS "
                             "estimate is reported instead.")
                _warnings.warn(notes[-1], WLSWarning, stacklevel=2)
    return _VarianceEstimate(W, gamma, gamma_se, beta_ml, converged, iterations, used, raised, notes)


def fit_wls(y: np.ndarray, X: np.ndarray, vm: VarianceModel, term_names: tuple[str, ...], *,
            estimation: str = "ml", se: str = "robust", row_numbers: np.ndarray | None = None,
            backend_id: str = "wls", clusters: np.ndarray | None = None,
            cluster_name: str | None = None) -> WLSFit | ClusterFit | Unavailable:
    """Fit the mean and variance models and return the weighted Wald fit (see the module docstring);
    with ``clusters`` (codes 0 … G − 1) and ``se="robust"`` the SE are CR2 on the weighted fit."""
    y = np.asarray(y, dtype=float)
    X = np.asarray(X, dtype=float)
    n, k = X.shape
    floor = vm.mean_floor(y)
    ve = _estimate_variance(vm, X, y, estimation, row_numbers)
    W, notes, used = ve.W, ve.notes, ve.used
    ratio = float(W.max() / W.min())
    if not math.isfinite(ratio) or ratio > WEIGHT_RATIO_WARNING:
        notes.append(f"The largest weight is {ratio:.3g} times the smallest; a few rows dominate the fit "
                     "(check the variance model or the data).")
        _warnings.warn(notes[-1], WLSWarning, stacklevel=2)
    Q, R = weighted_qr(X, W[None, :])
    Q, R = Q[0], R[0]
    sw = np.sqrt(W)
    qty = Q.T @ (sw * y)
    beta = linalg.solve_triangular(R, qty, check_finite=False)
    ew = sw * y - Q @ qty  # whitened residuals
    df = n - k
    s2 = float(ew @ ew) / df
    Rinv = r_inverse(R)
    h = leverages(Q)
    label_fn = _FUNCTION_LABELS[vm.function]
    est_label = {"ml": "ML", "twostep": "two-step FGLS", "known": "known"}.get(used, "two-step FGLS")
    if se == "robust" and clusters is None:
        reason = leverage_one_reason(h, "HC3 on the weighted fit", row_numbers,
                                     "use --set wls.se=model or drop those rows")
        if reason:
            return Unavailable(backend_id, f"WLS, {label_fn}", reason)
        cov = sandwich(Q, Rinv, hc_weights("hc3", h, n, k) * ew**2)
        se_label = "HC3 on the weighted fit"
    else:
        cov = s2 * (Rinv @ Rinv.T)
        se_label = "model-based s²(XᵀWX)⁻¹"
    sigma_hat = np.sqrt(s2 / W)
    design_info = _variance_info(vm, X, y, ve, beta, ratio=ratio, s2=s2, se=se, estimation=estimation, floor=floor)
    extras = {"variance_model": design_info, "df_resid": df, "sigma": float(math.sqrt(s2))}
    est_part = "" if vm.function == "known" else f" ({est_label})"
    if clusters is not None and se == "robust":
        return weighted_cr2_fit(Q, R, sw * y, W, clusters, tuple(term_names), cluster_name=cluster_name,
                                label=f"WLS, {label_fn}{est_part} + CR2", backend_id=backend_id,
                                warnings=tuple(notes), extras={**extras, "adjustment": CR2_WEIGHTED},
                                fit_class=ClusteredWLSFit,
                                fit_kwargs={"sigma_hat": sigma_hat, "weights": W})
    label = f"WLS, {label_fn}{est_part} + {'HC3' if se == 'robust' else 'model SE'}"
    return WLSFit(backend_id, label, tuple(term_names), beta, cov, df, warnings=tuple(notes),
                  extras=extras, se_label=se_label, sigma_hat=sigma_hat, weights=W)


def _variance_info(vm: VarianceModel, X: np.ndarray, y: np.ndarray, ve: Any, beta: np.ndarray, *, ratio: float,
                   s2: float, se: str, estimation: str, floor: float) -> dict[str, Any]:
    """The fitted variance model as the fit's extras report it: γ with SEs, log-likelihoods, the LR
    test against constant variance, AIC, the weight ratio and how the estimate was reached."""
    n, k = X.shape
    gamma, gamma_se, used, converged = ve.gamma, ve.gamma_se, ve.used, ve.converged
    if vm.function == "known":
        ll = _loglik_known(y, X, beta, ve.W)
    elif converged:
        assert ve.beta_ml is not None  # set whenever the ML fit converged
        ll = loglik(vm, X, y, ve.beta_ml, gamma, floor)
    else:
        ll = _loglik_profiled_scale(vm, X, y, beta, gamma, floor)
    lr = _lr_parts(n, k, vm.n_gamma, y, X, ll)
    info: dict[str, Any] = {
        "function": vm.function,
        "z_terms": list(vm.names) if vm.function in ("loglinear", "groups") else
                   (["log_sigma2", "theta"] if vm.function == "power" else []),
        "source_column": vm.source,
        "gamma": {name: {"estimate": float(g), "se": None if gamma_se is None else float(s)}
                  for name, g, s in zip(_gamma_names(vm), gamma, gamma_se if gamma_se is not None else gamma, strict=False)},
        "loglik": ll, "loglik_constant": lr["loglik_constant"],
        "lr_test": lr["lr_test"], "aic": lr["aic"], "aic_constant": lr["aic_constant"],
        "weight_ratio": ratio, "scale_s2": s2,
        "estimation": used, "se_type": se, "converged": converged, "iterations": ve.iterations,
        "zero_residuals_raised": ve.raised,
    }
    if vm.function == "power":
        info["sigma"] = float(math.exp(0.5 * gamma[0]))
    if estimation == "twostep" and vm.function != "known":
        info["loglik_note"] = "evaluated at the two-step estimates with the scale profiled out"
    return info


def _gamma_names(vm: VarianceModel) -> tuple[str, ...]:
    return ("log_sigma2", "theta") if vm.function == "power" else vm.names


def _cov_from_r(R: np.ndarray) -> np.ndarray:
    Rinv = r_inverse(R)
    return Rinv @ Rinv.T


def _loglik_profiled_scale(vm: VarianceModel, X: np.ndarray, y: np.ndarray, beta: np.ndarray,
                           gamma: np.ndarray, floor: float) -> float:
    """ℓ at (β, γ) with the variance scale set to its ML value (σᵢ² = c·e^{ηᵢ}, c = mean(ê² e^{−η}))."""
    eta = np.clip(vm.eta(X, beta, gamma, floor), -ETA_LIMIT, ETA_LIMIT)
    e = y - X @ beta
    c = float(np.mean(e**2 * np.exp(-eta)))
    n = y.size
    return float(-0.5 * (n * math.log(2 * math.pi) + np.sum(eta) + n * math.log(c) + n))


def _loglik_known(y: np.ndarray, X: np.ndarray, beta: np.ndarray, W: np.ndarray) -> float:
    """ℓ with σᵢ² = c / wᵢ and c at its ML value."""
    e = y - X @ beta
    n = y.size
    c = float(np.mean(W * e**2))
    return float(-0.5 * (n * math.log(2 * math.pi) - np.sum(np.log(W)) + n * math.log(c) + n))


# --------------------------------------------------------------------------------------
# Building the variance model from a design
# --------------------------------------------------------------------------------------
def _design_column(design: Design, name: str) -> pd.Series:
    frame = design.data.frame
    return frame[name] if name in frame.columns else design.data.column(name)


def _first_bad_row(design: Design, bad: np.ndarray) -> int:
    return int(design.data.frame.index[int(np.flatnonzero(bad)[0])]) + 1


def variance_model_for(design: Design, variance: str, variance_terms: tuple[str, ...] | None,
                       group: str | None, weights: str | None) -> VarianceModel:
    """Build the variance model a back-end's options ask for on this design."""
    n = design.n_obs
    if variance == "known":
        assert weights is not None  # WLSBackend.finish_options requires the weights column with variance='known'
        col = _design_column(design, weights)
        if not pd.api.types.is_numeric_dtype(col) or pd.api.types.is_bool_dtype(col):
            raise InputError(f"The weights column {weights!r} must hold numbers (inverse variances); "
                             f"data row {_first_bad_row(design, np.ones(n, bool))} has {col.iloc[0]!r}.")
        w = col.to_numpy(dtype=float, na_value=np.nan)
        for bad, what in ((np.isnan(w), "is missing"), (~np.isfinite(w) & ~np.isnan(w), "is not finite"),
                          (np.isfinite(w) & (w <= 0), "is not positive")):
            if bad.any():
                i = int(np.flatnonzero(bad)[0])
                raise InputError(f"The weights column {weights!r} {what} in data row {_first_bad_row(design, bad)} "
                                 f"(value {float(w[i])!r}); weights must be positive finite inverse variances.")
        return VarianceModel("known", weights=w.copy(), source=weights)
    if variance == "power":
        return VarianceModel("power", names=("log_sigma2", "theta"))
    if variance == "groups":
        if group is None:
            cats = list(design.data.categorical_moderators)
            if not cats:
                raise option_error("group", "a column naming the groups (the model has no categorical moderator)", None)
            group = cats[0]
        col = _design_column(design, group)
        missing = col.isna().to_numpy()
        if missing.any():
            raise InputError(f"The group column {group!r} is missing in data row {_first_bad_row(design, missing)}; "
                             "fill it or drop those rows.")
        cat = pd.Categorical(col.astype(str) if not pd.api.types.is_numeric_dtype(col) else col)
        levels = list(cat.categories)
        counts = np.bincount(cat.codes, minlength=len(levels))
        if len(levels) < 2:
            raise InputError(f"The group column {group!r} has one level in the rows used; it needs at least two.")
        if counts.min() < 2:
            raise InputError(f"The group {levels[int(counts.argmin())]!r} of column {group!r} has fewer than two rows; "
                             "merge it with another group.")
        Z = (cat.codes[:, None] == np.arange(len(levels))[None, :]).astype(float)
        return VarianceModel("groups", Z=Z, names=tuple(f"log_var[{group}={lv}]" for lv in levels),
                             groups=np.asarray(cat.codes), source=group)
    Z, names = design.variance_matrix(variance_terms, option="variance_terms")
    return VarianceModel("loglinear", Z=Z, names=tuple(names), source=None)


# --------------------------------------------------------------------------------------
# The back-end
# --------------------------------------------------------------------------------------
class WLSBackend(Backend):
    """Weighted least squares with a modelled variance function.

    Parameters
    ----------
    variance : {"loglinear", "power", "groups", "known"}, default="loglinear"
    variance_terms : list of str, optional
        Columns of z for the log-linear model (an intercept is always added);
        default: the focal predictor and the moderators (dummies for a categorical one).
    group : str, optional
        Grouping column for ``variance="groups"``; default the categorical moderator.
    weights : str, optional
        Column of known inverse variances for ``variance="known"`` (up to a common scale).
    estimation : {"ml", "twostep"}, default="ml"
    se : {"robust", "model"}, default="robust"
        HC3 on the weighted fit (Romano & Wolf 2017) or s²(XᵀWX)⁻¹.
    """

    id = "wls"
    label = "WLS, log-linear variance (ML) + HC3"
    assumes_constant_variance = False
    assumes_independent_rows = True
    cost = "cheap"
    options = (
        Option("variance", "text", "loglinear", "The variance function: log-linear in z, a power of the mean, "
               "one variance per group, or known weights.", choices=VARIANCE_FUNCTIONS),
        Option("variance_terms", "names", None, "Columns of z of the log-linear model (an intercept is added); "
               "default the focal predictor and the moderators."),
        Option("group", "text", None, "Grouping column of variance='groups'; default the categorical moderator."),
        Option("weights", "text", None, "Column of known inverse variances of variance='known'."),
        Option("estimation", "text", "ml", "Joint maximum likelihood or two-step FGLS.", choices=ESTIMATIONS),
        Option("se", "text", "robust", "HC3 on the weighted fit (robust) or s²(XᵀWX)⁻¹ (model).", choices=SE_TYPES),
    )

    variance: str
    variance_terms: tuple[str, ...] | None
    group: str | None
    weights: str | None
    estimation: str
    se: str

    def finish_options(self) -> None:
        if self.variance_terms is not None and self.variance != "loglinear":
            raise option_error("variance_terms", "left unset unless variance='loglinear'", self.variance_terms, "wls")
        if self.group is not None and self.variance != "groups":
            raise option_error("group", "a column name, and given only with variance='groups'", self.group, "wls")
        if self.variance == "known" and self.weights is None:
            raise option_error("weights", "the name of a column of inverse variances when variance='known'",
                               self.weights, "wls")
        if self.weights is not None and self.variance != "known":
            raise option_error("weights", "left unset unless variance='known'", self.weights, "wls")
        est = "" if self.variance == "known" else (" (ML)" if self.estimation == "ml" else " (two-step FGLS)")
        self.label = f"WLS, {_FUNCTION_LABELS[self.variance]}{est} + {'HC3' if self.se == 'robust' else 'model SE'}"

    streams = True

    def fit_stream(self, data: StreamData, *, seed: int = 0, progress: bool = False) -> WaldFit | Unavailable:
        """The log-linear ML fit over chunks (:func:`robustmod.kernels.wls.streamed_wls`); other variance
        functions and the two-step estimate are fitted in memory only."""
        if self.variance != "loglinear" or self.estimation != "ml":
            return Unavailable(self.id, self.label, "Only the log-linear variance model fitted by ML reads data in "
                               "chunks; set wls.variance=loglinear and wls.estimation=ml, or read the data into "
                               "memory (--no-stream).")
        from ..kernels.wls import streamed_wls  # noqa: PLC0415  (kernels import the back-ends)

        chunks, names = data.variance_chunks(self.variance_terms)
        stage = {1: "WLS: OLS start", 2: "WLS: two-step start", 3: "WLS: two-step start"}
        with data.stage(lambda i: stage.get(i, f"WLS scoring pass {i - 3}")):
            s = streamed_wls(chunks, se=self.se)
        return streamed_wls_fit(self.id, s, names, data.ols().rss, se=self.se,
                                term_names=data.design.term_names)

    def variance_model(self, design: Design) -> VarianceModel:
        return variance_model_for(design, self.variance, self.variance_terms, self.group, self.weights)

    def fit(self, design: Design, *, seed: int = 0, progress: bool = False) -> WLSFit | ClusterFit | Unavailable:
        """Fit on the design (deterministic: ``seed`` is not used)."""
        vm = self.variance_model(design)
        rows = design_row_numbers(design)
        with _warnings.catch_warnings():
            _warnings.simplefilter("ignore", WLSWarning)  # the notes travel in fit.warnings
            return fit_wls(design.y, design.X, vm, design.term_names, estimation=self.estimation, se=self.se,
                           row_numbers=rows, backend_id=self.id, clusters=design.clusters,
                           cluster_name=design.cluster_name)

    def reject_many(self, design: Design, Y: np.ndarray, alpha: float, *, seed: int = 0) -> np.ndarray:
        """Does the product-term test reject at ``alpha`` for each column of Y (n × D outcomes on design.X)?

        t test for one product term, Wald F for several; the same variance model, estimation and
        SE type as :meth:`fit`. Two-step and log-linear/group ML run across all datasets at once;
        power-of-the-mean ML fits one dataset at a time. ``seed`` is not used (no randomness).
        """
        Y = np.asarray(Y, dtype=float)
        X = design.X
        n, k = X.shape
        if Y.ndim != 2 or Y.shape[0] != n:
            raise InputError(f"The simulated outcomes must be an array of {n} rows (one per design row) × datasets; "
                             f"got shape {Y.shape}.")
        Yd = Y.T  # D × n
        D = Yd.shape[0]
        vm = self.variance_model(design)
        if design.clusters is not None and self.se == "robust":
            return self._reject_clustered(design, vm, Yd, alpha)
        floor = vm.mean_floor(design.y)
        if vm.function == "known":
            assert vm.weights is not None
            W = np.broadcast_to(vm.weights / vm.weights.mean(), (D, n))
        else:
            gamma, _, _ = twostep_gamma(vm, X, Yd)
            if vm.function == "power":
                W = self._power_weights(vm, X, Yd, gamma, floor)
            else:
                if self.estimation == "ml":
                    g_ml, ok, _ = batched_ml_gamma(vm, X, Yd, gamma)
                    gamma = np.where(ok[:, None], g_ml, gamma)
                assert vm.Z is not None
                W = np.exp(-np.clip(gamma @ vm.Z.T, -ETA_LIMIT, ETA_LIMIT))
        return _reject_product(X, Yd, W, design.interaction_rows(), alpha, self.se)

    def _reject_clustered(self, design: Design, vm: VarianceModel, Yd: np.ndarray, alpha: float) -> np.ndarray:
        """The decision of :meth:`fit` per dataset: CR2's adjustments depend on the fitted weights of each one."""
        L = design.interaction_rows()
        out = np.zeros(Yd.shape[0], dtype=bool)
        with _warnings.catch_warnings():
            _warnings.simplefilter("ignore", WLSWarning)
            for d, yd in enumerate(Yd):  # one weighted fit per simulated dataset
                fit = fit_wls(yd, design.X, vm, design.term_names, estimation=self.estimation, se=self.se,
                              clusters=design.clusters)
                if isinstance(fit, ClusterFit):
                    out[d] = (fit.joint_test(L, alpha).supported if L.shape[0] > 1
                              else bool(np.asarray(fit.estimate(L, alpha).p)[0] < alpha))
        return out

    def _power_weights(self, vm: VarianceModel, X: np.ndarray, Yd: np.ndarray, gamma: np.ndarray,
                       floor: float) -> np.ndarray:
        Qx, Rx = np.linalg.qr(X, mode="reduced")
        B_ols = linalg.solve_triangular(Rx, Qx.T @ Yd.T, check_finite=False).T
        W = np.exp(-np.clip(_power_eta(X, B_ols, gamma, floor), -ETA_LIMIT, ETA_LIMIT))
        Q, R = weighted_qr(X, W)
        B = np.linalg.solve(R, np.einsum("dnk,dn->dk", Q, np.sqrt(W) * Yd)[:, :, None])[:, :, 0]
        if self.estimation == "ml":
            B_ml, g_ml, ok, _ = batched_ml_power(X, Yd, B, gamma, floor)
            B = np.where(ok[:, None], B_ml, B)
            gamma = np.where(ok[:, None], g_ml, gamma)
        return np.exp(-np.clip(_power_eta(X, B, gamma, floor), -ETA_LIMIT, ETA_LIMIT))


def _power_eta(X: np.ndarray, B: np.ndarray, G: np.ndarray, floor: float) -> np.ndarray:
    """ηᵢ = c + 2θ·log|μᵢ| for each dataset (rows of B, G) → D × n."""
    return G[:, :1] + 2.0 * G[:, 1:2] * np.log(np.maximum(np.abs(B @ X.T), floor))


def _power_nll(X: np.ndarray, Y: np.ndarray, B: np.ndarray, G: np.ndarray, floor: float) -> np.ndarray:
    eta = _power_eta(X, B, G, floor)
    bad = ~np.isfinite(eta).all(axis=1) | (np.abs(eta).max(axis=1) > ETA_LIMIT)
    eta = np.clip(eta, -ETA_LIMIT, ETA_LIMIT)
    f = 0.5 * (eta + (Y - B @ X.T) ** 2 * np.exp(-eta)).sum(axis=1)
    return np.where(bad, np.inf, f)


def batched_ml_power(X: np.ndarray, Y: np.ndarray, B0: np.ndarray, G0: np.ndarray, floor: float,
                     *, maxiter: int = ML_MAXITER) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Joint ML of (β, c, θ) of the power-of-the-mean model across datasets (rows of Y).

    Fisher scoring with step halving and the expected information J_μᵀWJ_μ + ½J_ηᵀJ_η
    (:func:`_information_factor`). Returns (β̂, γ̂, converged, iterations) per dataset.
    """
    D, n = Y.shape
    k = X.shape[1]
    B, G = B0.copy(), G0.copy()
    f = _power_nll(X, Y, B, G, floor)
    done = np.zeros(D, dtype=bool)
    failed = np.zeros(D, dtype=bool)
    iters = np.zeros(D, dtype=int)
    for _ in range(maxiter):
        act = np.flatnonzero(~done & ~failed)  # work only on the datasets still moving
        if act.size == 0:
            break
        Ba, Ga, Ya, fa = B[act], G[act], Y[act], f[act]
        Da = act.size
        mu = Ba @ X.T
        m = np.abs(mu)
        inside = m > floor
        logm = np.log(np.maximum(m, floor))
        eta = np.clip(Ga[:, :1] + 2.0 * Ga[:, 1:2] * logm, -ETA_LIMIT, ETA_LIMIT)
        w = np.exp(-eta)
        e = Ya - mu
        half = 0.5 * (e**2 * w - 1.0)
        deta_dmu = np.where(inside, 2.0 * Ga[:, 1:2] / np.where(inside, mu, 1.0), 0.0)
        score = np.concatenate([(w * e + deta_dmu * half) @ X, half.sum(axis=1, keepdims=True),
                                (2.0 * logm * half).sum(axis=1, keepdims=True)], axis=1)
        bottom = np.concatenate([deta_dmu[:, :, None] * X[None], np.ones((Da, n, 1)), 2.0 * logm[:, :, None]],
                                axis=2) / math.sqrt(2.0)
        info = np.einsum("dni,dnj->dij", bottom, bottom)
        info[:, :k, :k] += np.einsum("dn,ni,nj->dij", w, X, X)
        try:
            step = np.linalg.solve(info, score[:, :, None])[:, :, 0]
        except np.linalg.LinAlgError:
            failed[act] = True
            break
        decrement = 0.5 * np.einsum("di,di->d", score, step)
        now = np.isfinite(decrement) & (decrement < ML_DECREMENT_TOL)
        done[act[now]] = True
        iters[act[~now]] += 1

        def trial(t: np.ndarray, Ba: np.ndarray = Ba, Ga: np.ndarray = Ga, Ya: np.ndarray = Ya, step: np.ndarray = step
                  ) -> tuple[np.ndarray, tuple[np.ndarray, np.ndarray]]:
            Bc, Gc = Ba + t[:, None] * step[:, :k], Ga + t[:, None] * step[:, k:]
            return _power_nll(X, Ya, Bc, Gc, floor), (Bc, Gc)

        ok, fc, (Bc, Gc) = _backtrack(trial, np.where(now, 0.0, 1.0), fa)
        flat = ~ok & np.isfinite(decrement) & (decrement < ML_ROUNDING_TOL)  # at the optimum to rounding
        done[act[flat]] = True
        failed[act[~ok & ~flat]] = True  # no step improves far from it: leave it to the two-step fallback
        B[act] = np.where(ok[:, None], Bc, Ba)
        G[act] = np.where(ok[:, None], Gc, Ga)
        f[act] = np.where(ok, fc, fa)
    return B, G, done, iters


def _reject_product(X: np.ndarray, Yd: np.ndarray, W: np.ndarray, L: np.ndarray, alpha: float, se: str) -> np.ndarray:
    """Batched weighted fit and the test of L·β = 0 for each dataset (rows of Yd, weights W)."""
    D, n = Yd.shape
    k = X.shape[1]
    q = L.shape[0]
    W = np.ascontiguousarray(W)
    Q, R = weighted_qr(X, W)
    yw = np.sqrt(W) * Yd
    qty = np.einsum("dnk,dn->dk", Q, yw)
    beta = np.linalg.solve(R, qty[:, :, None])[:, :, 0]
    ew = yw - np.einsum("dnk,dk->dn", Q, qty)
    # M = L R⁻¹ for each dataset: solve Rᵀ Mᵀ = Lᵀ.
    Mt = np.linalg.solve(np.swapaxes(R, 1, 2), np.broadcast_to(L.T, (D, k, q)))
    if se == "robust":
        h = np.einsum("dnk,dnk->dn", Q, Q)
        u = hc_weights("hc3", np.minimum(h, 1.0 - LEVERAGE_ONE_TOL), n, k) * ew**2
        G = np.einsum("dnk,dkq->dnq", Q, Mt)
        V = np.einsum("dnq,dn,dnr->dqr", G, u, G)
    else:
        s2 = (ew**2).sum(axis=1) / (n - k)
        V = s2[:, None, None] * np.einsum("dkq,dkr->dqr", Mt, Mt)
    return wald_test(beta @ L.T, V, n - k)[1] < alpha
