"""Pareto-smoothed importance-sampling leave-one-out (PSIS-LOO), all observations at once.

Vehtari, Gelman & Gabry (2017), "Practical Bayesian model evaluation using leave-one-out
cross-validation and WAIC", Statistics and Computing 27: for observation i with S posterior draws of
the pointwise log-likelihood ℓᵢₛ, the raw importance ratios are rᵢₛ ∝ exp(−ℓᵢₛ). The largest
M = ⌈min(S/5, 3√(S/r_eff))⌉ of them are replaced by the expected order statistics of a generalized
Pareto distribution fitted to them (the empirical-Bayes fit of Zhang & Stephens 2009, with the weakly
informative prior on the shape k of Vehtari et al.), truncated at the largest raw ratio, and normalised.
Then elpd_loo,i = log Σₛ wᵢₛ exp(ℓᵢₛ), elpd_loo = Σᵢ elpd_loo,i with SE √(n·Var(elpd_loo,i)), and
p_loo = Σᵢ log(S⁻¹ Σₛ exp ℓᵢₛ) − elpd_loo; k̂ᵢ is the fitted shape (above 0.7: unreliable).

The rules (cut-off, prior, negligible-weight threshold, tails of at most four ratios left unsmoothed)
are those of ArviZ's ``loo``, the reference the tests compare with; this module differs only in
working on every observation in one array operation instead of one observation at a time, and in
ordering only the m + 1 largest ratios of each (np.argpartition), as every sum runs over all draws.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: Prior of the generalized Pareto fit (Zhang & Stephens 2009; the shape prior of Vehtari et al.).
PRIOR_BS = 3.0
PRIOR_K = 10.0
#: Rows of observations fitted together (bounds the rows × grid × tail work array).
ROWS_PER_BLOCK = 256


@dataclass(frozen=True)
class PsisLoo:
    """elpd_loo, its SE, p_loo, the pointwise elpd_loo,i and the Pareto shapes k̂ᵢ."""

    elpd_loo: float
    se: float
    p_loo: float
    loo_i: np.ndarray
    pareto_k: np.ndarray


def _logsumexp(a: np.ndarray) -> np.ndarray:
    """log Σ exp along the last axis, by the largest term (rows of −∞ stay −∞)."""
    top = a.max(axis=-1, keepdims=True)
    top = np.where(np.isfinite(top), top, 0.0)
    return np.log(np.exp(a - top).sum(axis=-1)) + top[..., 0]


def _gpd_fit(tail: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(k̂, σ̂) of the generalized Pareto distribution for each row of ``tail`` (ascending, > 0):
    the posterior mean of θ = −k/σ over Zhang & Stephens' grid, k from it, then the prior on k."""
    r, n = tail.shape
    m = 30 + int(n ** 0.5)
    grid = 1.0 - np.sqrt(m / (np.arange(1, m + 1, dtype=float) - 0.5))
    b = grid[None, :] / (PRIOR_BS * tail[:, int(n / 4 + 0.5) - 1])[:, None] + (1.0 / tail[:, -1])[:, None]
    k = np.log1p(-b[:, :, None] * tail[:, None, :]).mean(axis=2)
    profile = n * (np.log(-(b / k)) - k - 1.0)
    weights = 1.0 / np.exp(profile[:, None, :] - profile[:, :, None]).sum(axis=2)
    weights = np.where(weights >= 10 * np.finfo(float).eps, weights, 0.0)
    weights /= weights.sum(axis=1, keepdims=True)
    b_post = (b * weights).sum(axis=1)
    k_post = np.log1p(-b_post[:, None] * tail).mean(axis=1)
    sigma = -k_post / b_post
    return (n * k_post + PRIOR_K * 0.5) / (n + PRIOR_K), sigma


def _gpd_quantiles(probs: np.ndarray, k: np.ndarray, sigma: np.ndarray) -> np.ndarray:
    """Quantiles σ·((1 − p)^(−k) − 1)/k of the generalized Pareto distribution (−σ·log(1 − p) at
    k = 0), one row per (k, σ); NaN where σ ≤ 0. ``probs`` lie strictly inside (0, 1)."""
    tiny = np.abs(k) < np.finfo(float).eps
    safe_k = np.where(tiny, 1.0, k)
    lp = np.log1p(-probs)[None, :]
    q = np.where(tiny[:, None], -lp, np.expm1(-safe_k[:, None] * lp) / safe_k[:, None]) * sigma[:, None]
    return np.where((sigma > 0)[:, None], q, np.nan)


def _smoothed_tail(tail: np.ndarray, cut: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Rows of the ascending tail log ratios above ``cut`` (log ratios shifted so that the largest is
    0): the smoothed tail, truncated at 0 (unchanged where the fit fails or the tail has four entries
    or fewer), and k̂ of each row (∞ when not fitted)."""
    r, t = tail.shape
    if t <= 4:  # too few ratios to fit: no smoothing
        return tail, np.full(r, np.inf)
    exp_cut = np.exp(cut)
    k, sigma = _gpd_fit(np.exp(tail) - exp_cut[:, None])
    probs = np.arange(0.5, t) / t
    smoothed = np.minimum(np.log(_gpd_quantiles(probs, k, sigma) + exp_cut[:, None]), 0.0)
    fitted = np.isfinite(k)
    return np.where(fitted[:, None], smoothed, tail), k


def psis_loo(loglik: np.ndarray, r_eff: float = 1.0) -> PsisLoo:
    """PSIS-LOO from the pointwise log-likelihood, shape (draws, observations) with the draws of all
    chains in one axis; ``r_eff`` is the relative efficiency of the draws (mean ESS / draws)."""
    ll = np.ascontiguousarray(np.asarray(loglik, dtype=float).T)  # observations × draws
    n, s = ll.shape
    m = int(np.ceil(min(s / 5.0, 3 * (s / r_eff) ** 0.5)))  # tail length before ties are taken out
    floor = np.log(np.finfo(float).tiny)
    # Only the m + 1 largest log ratios −ℓ need an order: the (m + 1)-th largest is the cut, the tail
    # is those above it; every sum below is over all draws and does not depend on their order.
    log_w = np.negative(ll)
    top_idx = np.argpartition(log_w, s - m - 1, axis=1)[:, s - m - 1:]
    top = np.take_along_axis(log_w, top_idx, axis=1)
    order = np.argsort(top, axis=1)
    top_idx = np.take_along_axis(top_idx, order, axis=1)
    top = np.take_along_axis(top, order, axis=1)
    log_w -= top[:, -1:]
    top -= top[:, -1:]
    cut = np.maximum(top[:, 0], floor)
    tails = (top[:, 1:] > cut[:, None]).sum(axis=1)
    k_hat = np.empty(n)
    for t in np.unique(tails):
        rows = np.flatnonzero(tails == t)
        for a in range(0, rows.size, ROWS_PER_BLOCK):
            block = rows[a:a + ROWS_PER_BLOCK]
            at = top_idx[block, m + 1 - t:]
            smoothed, k_hat[block] = _smoothed_tail(top[block, m + 1 - t:], cut[block])
            log_w[block[:, None], at] = smoothed
    log_w -= _logsumexp(log_w)[:, None]
    loo_i = _logsumexp(log_w + ll)
    lppd = float((_logsumexp(ll) - np.log(s)).sum())
    elpd = float(loo_i.sum())
    return PsisLoo(elpd_loo=elpd, se=float(np.sqrt(n * np.var(loo_i))), p_loo=lppd - elpd, loo_i=loo_i,
                   pareto_k=k_hat)
