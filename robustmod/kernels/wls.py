"""WLS with a log-linear variance model, σᵢ² = exp(zᵢᵀγ), fitted by ML in passes over chunks.

Matches the ML path of :mod:`robustmod.backends.wls` (``variance="loglinear"``) at its optimum:

1. OLS (:func:`robustmod.kernels.ols.factor_pass`), then the two-step start (Harvey 1976):
   OLS of log êᵢ² on z with −E[log χ²₁] = 1.2704 added along the constant, exact zeros
   (|êᵢ| ≤ 10⁻¹² · max|y|) raised to 10⁻⁸ · mean ê² as in the in-memory fit, from a TSQR
   factor of [Z  log ê²  1].
2. Fisher scoring of the likelihood with β profiled out (Harvey 1976):
   γ ← γ + t·(ZᵀZ)⁻¹ Zᵀ(r − 1), rᵢ = êᵢ(γ)² e^{−ηᵢ}, ê(γ) the WLS residuals at weights
   e^{−η}; one pass gives β̂(γ) and −ℓ = ½ Σ [log 2π + ηᵢ + rᵢ] (TSQR of √w·[X y]), a second the
   score; t is halved until −ℓ does not rise. Stops when the Newton decrement
   ¼‖R_z⁻ᵀ Zᵀ(r − 1)‖² falls below ``tol`` or no step improves.
3. The weighted regression of √w·y on √w·X through :func:`robustmod.kernels.ols.streamed_ols`:
   β̂, HC3 on the weighted fit (``se="robust"``) or s²(XᵀWX)⁻¹ (``se="model"``). The expected
   information of γ is ½ZᵀZ whatever β, so SE(γ̂) = sqrt(diag(2(ZᵀZ)⁻¹)) by triangular solves.

The chunks carry the variance regressors as ``columns["Z"]`` (m × p, a constant first).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np
from scipy import linalg

from ..backends.hc import r_inverse
from ..backends.kernels import ETA_LIMIT, LOG_CHI2_CORRECTION, ZERO_RESIDUAL_FLOOR, ZERO_RESIDUAL_RTOL
from ..backends.wls import ML_DECREMENT_TOL, ML_MAXITER, ML_ROUNDING_TOL, SE_TYPES
from ..errors import option_error
from .accumulate import TSQR
from .chunks import Chunk, ChunkSource, fold, mapped
from .ols import StreamedOLS, factor_pass, streamed_ols

#: The in-memory fit's stopping rule, so both paths stop at the same iterate.
TOL = ML_DECREMENT_TOL
MAX_ITER = ML_MAXITER
HALVINGS = 40


@dataclass(frozen=True)
class StreamedWLS:
    """The fitted mean and variance models."""

    beta: np.ndarray
    cov: np.ndarray
    gamma: np.ndarray
    gamma_se: np.ndarray
    gamma_twostep: np.ndarray
    loglik: float
    converged: bool
    iterations: int
    weight_ratio: float
    scale_s2: float
    weighted: StreamedOLS


class _Sums:
    """A running total, a row count and a largest value (merged by sums and max)."""

    def __init__(self) -> None:
        self.total, self.n, self.largest = 0.0, 0, 0.0

    def add(self, total: float, n: int, largest: float) -> None:
        self.total += total
        self.n += n
        self.largest = max(self.largest, largest)

    def merge(self, other: _Sums) -> _Sums:
        self.add(other.total, other.n, other.largest)
        return self


class _Factor:
    """A TSQR factor whose width is set by the first block, with running sums beside it."""

    def __init__(self) -> None:
        self.tsqr: TSQR | None = None
        self.sums = _Sums()

    def add(self, block: np.ndarray) -> None:
        self.tsqr = self.tsqr or TSQR(block.shape[1])
        self.tsqr.add(block)

    def merge(self, other: _Factor) -> _Factor:
        if other.tsqr is not None:
            self.tsqr = other.tsqr if self.tsqr is None else self.tsqr.merge(other.tsqr)
        self.sums.merge(other.sums)
        return self

    def factor(self) -> np.ndarray:
        assert self.tsqr is not None
        return self.tsqr.factor()


class _Vector:
    """A running vector sum."""

    def __init__(self, p: int) -> None:
        self.value = np.zeros(p)

    def add(self, v: np.ndarray) -> None:
        self.value += v

    def merge(self, other: _Vector) -> _Vector:
        self.value = self.value + other.value
        return self


def _eta(c: Chunk, gamma: np.ndarray) -> np.ndarray:
    return np.clip(c.columns["Z"] @ gamma, -ETA_LIMIT, ETA_LIMIT)


def twostep_start(chunks: ChunkSource, beta_ols: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(γ̂ two-step, R_z with R_zᵀR_z = ZᵀZ): two passes (mean ê², then the log ê² regression)."""
    def sums(acc: _Sums, c: Chunk) -> None:
        e = c.y - c.X @ beta_ols
        acc.add(float(e @ e), c.size, float(np.abs(c.y).max(initial=0.0)))

    first = fold(chunks, _Sums, sums)
    rss, n, y_max = first.total, first.n, first.largest
    floor = ZERO_RESIDUAL_FLOOR * max(rss / n, np.finfo(float).tiny)
    zero_below = ZERO_RESIDUAL_RTOL * max(y_max, np.finfo(float).tiny)  # as exact_zeros in memory
    def logs(acc: _Factor, c: Chunk) -> None:
        e = c.y - c.X @ beta_ols
        Z = c.columns["Z"]
        acc.add(np.column_stack([Z, np.log(np.where(np.abs(e) <= zero_below, floor, e * e)), np.ones(c.size)]))

    R = fold(chunks, _Factor, logs).factor()
    p = R.shape[0] - 2
    Rz = R[:p, :p]
    coef = linalg.solve_triangular(Rz, R[:p, p], check_finite=False)
    along_constant = linalg.solve_triangular(Rz, R[:p, p + 1], check_finite=False)
    return coef + LOG_CHI2_CORRECTION * along_constant, Rz


def _profile(chunks: ChunkSource, gamma: np.ndarray) -> tuple[float, np.ndarray]:
    """(−ℓ at γ with β profiled out, β̂(γ)): one TSQR pass over √w·[X y]."""
    def step(acc: _Factor, c: Chunk) -> None:
        eta = _eta(c, gamma)
        sw = np.exp(-0.5 * eta)
        acc.add(np.column_stack([c.X * sw[:, None], c.y * sw]))
        acc.sums.add(float(eta.sum()), c.size, 0.0)

    acc = fold(chunks, _Factor, step)
    sum_eta, n = acc.sums.total, acc.sums.n
    R = acc.factor()
    k = R.shape[0] - 1
    beta = linalg.solve_triangular(R[:k, :k], R[:k, k], check_finite=False)
    return 0.5 * (n * math.log(2 * math.pi) + sum_eta + float(R[k, k]) ** 2), beta


def _score(chunks: ChunkSource, gamma: np.ndarray, beta: np.ndarray) -> np.ndarray:
    """Zᵀ(r − 1), rᵢ = êᵢ² e^{−ηᵢ} (one pass)."""
    def step(acc: _Vector, c: Chunk) -> None:
        e = c.y - c.X @ beta
        acc.add(c.columns["Z"].T @ (e * e * np.exp(-_eta(c, gamma)) - 1.0))

    return fold(chunks, lambda: _Vector(gamma.size), step).value


def scoring(chunks: ChunkSource, gamma0: np.ndarray, Rz: np.ndarray, *, tol: float = TOL,
            max_iter: int = MAX_ITER) -> tuple[np.ndarray, bool, int]:
    """Profile-likelihood Fisher scoring with step halving from γ₀; returns (γ̂, converged, iterations)."""
    gamma = gamma0.copy()
    f, beta = _profile(chunks, gamma)
    for it in range(1, max_iter + 1):
        rhs = linalg.solve_triangular(Rz, _score(chunks, gamma, beta), trans="T", check_finite=False)
        decrement = 0.25 * float(rhs @ rhs)
        if decrement < tol:
            return gamma, True, it
        step = linalg.solve_triangular(Rz, rhs, check_finite=False)
        t = 1.0
        for _ in range(HALVINGS):
            fc, bc = _profile(chunks, gamma + t * step)
            if np.isfinite(fc) and fc <= f + 1e-15 * abs(f):
                break
            t /= 2
        else:
            return gamma, decrement < ML_ROUNDING_TOL, it  # no step improves: at the optimum to rounding
        if fc >= f and np.all(t * np.abs(step) <= 1e-15 * np.maximum(np.abs(gamma), 1.0)):
            return gamma, decrement < ML_DECREMENT_TOL, it
        gamma, f, beta = gamma + t * step, fc, bc
    return gamma, False, max_iter


class _EtaSummary:
    """Sum, min and max of the log-variances ηᵢ, gathered during the weighted residual pass."""

    def __init__(self) -> None:
        self.total, self.low, self.high = 0.0, np.inf, -np.inf

    def merge(self, other: _EtaSummary) -> _EtaSummary:
        self.total += other.total
        self.low, self.high = min(self.low, other.low), max(self.high, other.high)
        return self

    def add(self, chunk: Chunk, resid: np.ndarray) -> None:
        eta = chunk.columns["eta"]
        if eta.size:
            self.total += float(eta.sum())
            self.low, self.high = min(self.low, float(eta.min())), max(self.high, float(eta.max()))


def streamed_wls(chunks: ChunkSource, *, se: str = "robust", tol: float = TOL, max_iter: int = MAX_ITER
                 ) -> StreamedWLS:
    """ML of the log-linear variance model and the weighted fit (see the module docstring)."""
    if se not in SE_TYPES:
        raise option_error("se", f"one of {', '.join(SE_TYPES)}", se)
    factor = factor_pass(chunks)
    gamma2, Rz = twostep_start(chunks, factor.beta)
    gamma, converged, iterations = scoring(chunks, gamma2, Rz, tol=tol, max_iter=max_iter)
    if not converged:
        gamma = gamma2

    def weigh(c: Chunk) -> Chunk:
        eta = _eta(c, gamma)
        sw = np.exp(-0.5 * eta)
        return replace(c, X=c.X * sw[:, None], y=c.y * sw, columns={**c.columns, "eta": eta})

    kind = "hc3" if se == "robust" else "ols"
    etas = _EtaSummary()
    weighted = streamed_ols(mapped(chunks, weigh), [kind], consumers=[etas])
    cov = weighted.cov[kind]
    if cov is None:
        cov = np.full((weighted.k, weighted.k), np.nan)
    n = weighted.n
    loglik = -0.5 * (n * math.log(2 * math.pi) + etas.total + weighted.rss)
    gamma_se = math.sqrt(2.0) * np.linalg.norm(r_inverse(Rz), axis=1)
    return StreamedWLS(weighted.beta, cov, gamma, gamma_se, gamma2, loglik, converged, iterations,
                       math.exp(etas.high - etas.low), weighted.rss / (n - weighted.k), weighted)
