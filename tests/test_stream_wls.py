"""Streamed WLS-ML of the log-linear variance model against the in-memory back-end and statsmodels."""
from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from robustmod.backends.base import WaldFit
from robustmod.backends.wls import VarianceModel, batched_ml_gamma, fit_wls
from robustmod.kernels.chunks import array_chunks
from robustmod.kernels.wls import streamed_wls

NAMES = ("Intercept", "x", "w", "x:w")


def _data(n: int = 1501, seed: int = 2) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    # Known-truth simulation (invented data): log-variance linear in x and w.
    rng = np.random.default_rng(seed)
    x, w = rng.normal(size=n), rng.uniform(0, 10, n)
    X = np.column_stack([np.ones(n), x, w, x * w])
    y = 1 + x + w + 0.3 * x * w + rng.normal(size=n) * np.exp(0.1 + 0.15 * w + 0.2 * x)
    return X, y, np.column_stack([np.ones(n), x, w])


def _rel(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.max(np.abs(a - b) / np.abs(b)))


@pytest.mark.parametrize("chunk_rows", (3, 250, 10**5))
def test_optimum_matches_in_memory_scoring(chunk_rows: int) -> None:
    X, y, Z = _data()
    s = streamed_wls(array_chunks(X, y, chunk_rows=chunk_rows, columns={"Z": Z}))
    assert s.converged
    vm = VarianceModel("loglinear", Z=Z, names=("c", "x", "w"))
    G, done, _ = batched_ml_gamma(vm, X, y[None, :], s.gamma_twostep[None, :], maxiter=200, tol=1e-20)
    assert done[0]
    assert _rel(s.gamma, G[0]) < 1e-9


@pytest.mark.parametrize("chunk_rows", (7, 10**5))
def test_matches_in_memory_backend(chunk_rows: int) -> None:
    # Both paths run Fisher scoring to a Newton decrement below 1e-14 (log-likelihood units), so the
    # estimates, their SEs and the log-likelihood agree closely.
    X, y, Z = _data()
    mem = fit_wls(y, X, VarianceModel("loglinear", Z=Z, names=("c", "x", "w")), NAMES)
    assert isinstance(mem, WaldFit)
    s = streamed_wls(array_chunks(X, y, chunk_rows=chunk_rows, columns={"Z": Z}))
    vm_info = mem.extras["variance_model"]
    gamma = np.array([g["estimate"] for g in vm_info["gamma"].values()])
    gamma_se = np.array([g["se"] for g in vm_info["gamma"].values()])
    assert _rel(s.gamma, gamma) < 1e-9
    assert _rel(s.beta, mem.params) < 1e-9
    assert _rel(np.sqrt(np.diag(s.cov)), np.sqrt(np.diag(mem.cov))) < 1e-9
    assert _rel(s.gamma_se, gamma_se) < 1e-9
    assert s.loglik == pytest.approx(vm_info["loglik"], rel=1e-12)


def test_weighted_fit_matches_statsmodels() -> None:
    # Reference library: statsmodels WLS with weights exp(−zᵀγ̂), cov_type="HC3" and the model covariance.
    X, y, Z = _data(n=800, seed=6)
    chunks = array_chunks(X, y, chunk_rows=64, columns={"Z": Z})
    s = streamed_wls(chunks)
    W = np.exp(-(Z @ s.gamma))
    assert s.weight_ratio == pytest.approx(W.max() / W.min(), rel=1e-12)
    ref = sm.WLS(y, X, weights=W).fit(cov_type="HC3")
    assert _rel(s.beta, ref.params) < 1e-9
    assert _rel(np.sqrt(np.diag(s.cov)), ref.bse) < 1e-9
    model = streamed_wls(chunks, se="model")
    assert _rel(np.sqrt(np.diag(model.cov)), sm.WLS(y, X, weights=W).fit().bse) < 1e-9


def test_bad_se_option_is_a_one_line_error() -> None:
    from robustmod.errors import InputError

    X, y, Z = _data(n=100)
    with pytest.raises(InputError, match="'se' option must be one of robust, model"):
        streamed_wls(array_chunks(X, y, chunk_rows=30, columns={"Z": Z}), se="sandwich")
