"""The sampler-free reference of the SBC (validation/sbc_exact.py) against scipy's dense densities.

The marginal ỹ | g ~ N(0, D(g) + X̃Σ₀X̃ᵀ) (Gelman et al. 2013, BDA3 §14.2) is computed there by the
Woodbury identity; scipy.stats.multivariate_normal evaluates the same density from the full n × n
covariance, so differences between two values of g must agree (the reference drops only constants).
"""
from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "validation"))
import sbc_exact  # noqa: E402


def _dense_logpost(g: np.ndarray, X: np.ndarray, Z: np.ndarray, y: np.ndarray, prior_var: np.ndarray) -> float:
    cov = np.diag(np.exp(2 * Z @ g)) + X @ np.diag(prior_var) @ X.T
    return float(stats.multivariate_normal(np.zeros(y.size), cov).logpdf(y) + stats.norm.logpdf(g).sum())


def test_woodbury_marginal_matches_the_dense_normal_density():
    Xs, Zs = sbc_exact.design(40, 5)
    rng = np.random.default_rng(11)
    prior_var = np.array([1.0, 6.25, 6.25, 6.25])
    y = Xs @ rng.normal(0, 2.5, 4) + np.exp(Zs @ np.array([0.2, 0.8, -0.5])) * rng.normal(size=40)
    G = rng.normal(size=(6, 3))
    fast = sbc_exact.marginal_logpost(G, Xs, Zs, y, prior_var)[0]
    dense = np.array([_dense_logpost(g, Xs, Zs, y, prior_var) for g in G])
    np.testing.assert_allclose(fast - fast[0], dense - dense[0], rtol=1e-9, atol=1e-8)


@pytest.mark.slow
def test_importance_sampled_cdf_matches_grid_quadrature():
    # Two numerical routes to the same posterior CDF of γ₁ (common practice, no source): importance
    # sampling from the t proposal, and the trapezoid rule on a 3-D grid around the mode.
    Xs, Zs = sbc_exact.design(60, 8)
    rng = np.random.default_rng(3)
    prior_var = np.array([1.0, 6.25, 6.25, 6.25])
    y = Xs @ np.array([0.1, 1.0, -0.5, 0.7]) + np.exp(Zs @ np.array([-0.5, 0.3, 0.0])) * rng.normal(size=60)
    truth = 0.45
    ref = sbc_exact.reference(Xs, Zs, y, prior_var, 0.7, truth, np.random.default_rng(1), 40000)
    axes = [np.linspace(-1.6, 0.6, 45), np.linspace(-0.6, 1.2, 61), np.linspace(-0.9, 0.9, 45)]
    G = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, 3)
    lp = sbc_exact.marginal_logpost(G, Xs, Zs, y, prior_var)[0].reshape(45, 61, 45)
    dens = np.trapezoid(np.trapezoid(np.exp(lp - lp.max()), axes[2], axis=2), axes[0], axis=0)  # over g₁
    below = axes[1] <= truth
    cdf = np.trapezoid(dens[below], axes[1][below]) / np.trapezoid(dens, axes[1])
    assert ref["pareto_k"] < 0.7
    assert abs(ref["cdf_gamma1"] - cdf) < 0.02
