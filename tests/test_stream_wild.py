"""Streamed wild bootstrap against the in-memory kernel of robustmod.backends.wild on the same weights."""
from __future__ import annotations

import numpy as np
import pytest

from robustmod.backends.base import WaldFit
from robustmod.backends.hc import hc_weights, leverages, r_inverse
from robustmod.backends.wild import (
    BootstrapFit,
    _Kernel,
    _pairs_within,
    _Source,
    residual_factor,
)
from robustmod.kernels.chunks import array_chunks
from robustmod.kernels.wild import WEIGHT_BLOCK, stream_weights, streamed_wild
from robustmod.thin_qr import thin_qr

NAMES = ("Intercept", "x", "w", "x:w")
B, BATCH, SEED = 199, 64, 11


def _data(n: int = 5000, seed: int = 1) -> tuple[np.ndarray, np.ndarray]:
    # Known-truth simulation (invented data); n spans two weight blocks.
    rng = np.random.default_rng(seed)
    x, w = rng.normal(size=n), rng.uniform(0, 10, n)
    X = np.column_stack([np.ones(n), x, w, x * w])
    return X, 1 + x + w + 0.1 * x * w + rng.normal(size=n) * (0.5 + 0.3 * w)


def _in_memory(X: np.ndarray, y: np.ndarray, weights: str) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """delta, meat and the null-imposed (β*, M) of column 3 from wild.py's kernel on the streamed weights."""
    n, k = X.shape
    V = np.vstack([stream_weights(weights, SEED, r, 0, n, min(BATCH, B - a)) for r, a in enumerate(range(0, B, BATCH))])
    Q, R = thin_qr(X)
    A = r_inverse(R) @ Q.T
    h = leverages(Q)
    resid = (y - Q @ (Q.T @ y)) * residual_factor("hc2", h)
    Q0, _ = thin_qr(X[:, :3])
    resid0 = (y - Q0 @ (Q0.T @ y)) * residual_factor("hc2", leverages(Q0))
    sources = [_Source(resid, np.arange(k * (k + 1) // 2)), _Source(resid0, _pairs_within((3,), k))]
    out = _Kernel(X, A, hc_weights("hc3", h, n, k), sources, n, unit_square=weights == "rademacher").run(V)
    return out[0][0], out[0][1], out[1][0][:, [3]], out[1][1]


@pytest.mark.parametrize(("chunk_rows", "weights"), [(61, "rademacher"), (1000, "mammen"), (10**5, "webb")])
def test_matches_in_memory_kernel(chunk_rows: int, weights: str) -> None:
    X, y = _data()
    fit = streamed_wild(array_chunks(X, y, chunk_rows=chunk_rows), NAMES, [3], replications=B, weights=weights,
                        seed=SEED, batch=BATCH)
    assert isinstance(fit, BootstrapFit)
    delta, meat, b0, m0 = _in_memory(X, y, weights)
    assert np.allclose(fit.delta, delta, rtol=1e-9, atol=1e-12 * np.abs(delta).max())
    assert np.allclose(fit.meat, meat, rtol=1e-9, atol=1e-12 * np.abs(meat).max())
    assert np.allclose(fit.null[(3,)][0], b0, rtol=1e-9, atol=1e-12 * np.abs(b0).max())
    assert np.allclose(fit.null[(3,)][1], m0, rtol=1e-9, atol=0)
    ref = BootstrapFit("wild", "ref", NAMES, fit.params, fit.cov, delta, meat, {(3,): (b0, m0)}, "ref")
    L = np.array([[0, 0, 0, 1.0], [0, 1, 2.0, 2.0], [0, 1, 8.0, 8.0]])  # product term, slopes at w = 2 and 8
    got, want = fit.estimate(L, 0.05), ref.estimate(L, 0.05)
    assert np.array_equal(got.p, want.p)
    assert np.allclose(got.lower, want.lower, rtol=1e-9) and np.allclose(got.upper, want.upper, rtol=1e-9)


def test_weights_do_not_depend_on_chunking_and_have_unit_variance() -> None:
    whole = stream_weights("webb", 3, 0, 0, 3 * WEIGHT_BLOCK + 5, 50)
    parts = np.hstack([stream_weights("webb", 3, 0, a, min(a + 999, 3 * WEIGHT_BLOCK + 5), 50)
                       for a in range(0, 3 * WEIGHT_BLOCK + 5, 999)])
    assert np.array_equal(whole, parts)
    # Webb (2014) weights have mean 0 and variance 1 (published construction).
    assert abs(whole.mean()) < 0.02 and abs(whole.var() - 1) < 0.02


def test_point_estimate_and_cov_are_the_hc3_fit() -> None:
    X, y = _data(n=800)
    fit = streamed_wild(array_chunks(X, y, chunk_rows=100), NAMES, [3], replications=99, seed=2)
    from robustmod.backends.ols import ols_fit

    Q, R = thin_qr(X)
    mem = ols_fit("hc3", Q, R, y, NAMES)
    assert isinstance(mem, WaldFit) and isinstance(fit, BootstrapFit)
    assert np.allclose(fit.params, mem.params, rtol=1e-9) and np.allclose(fit.cov, mem.cov, rtol=1e-9)


def test_bad_options_are_one_line_errors() -> None:
    from robustmod.errors import InputError

    X, y = _data(n=200)
    chunks = array_chunks(X, y, chunk_rows=50)
    with pytest.raises(InputError, match="'se' option must be one of"):
        streamed_wild(chunks, NAMES, [3], replications=99, se="hc9", seed=1)
    with pytest.raises(InputError, match="'replications' option"):
        streamed_wild(chunks, NAMES, [3], replications=10, seed=1)
