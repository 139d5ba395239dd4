"""Streaming OLS (robustmod.kernels.ols) against the in-memory fit and statsmodels."""
from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from robustmod.backends.base import Unavailable, WaldFit
from robustmod.backends.ols import ols_fit
from robustmod.errors import InputError
from robustmod.kernels.chunks import array_chunks, rows_per_chunk
from robustmod.kernels.ols import factor_pass, streamed_ols
from robustmod.thin_qr import thin_qr

KINDS = ("ols", "hc0", "hc1", "hc2", "hc3", "hc4", "hc4m", "hc5")
NAMES = ("Intercept", "x", "w", "x:w")
#: Chunk sizes: a few rows, uneven last chunk, one chunk larger than the data.
CHUNKS = (3, 7, 1000, 10**6)


def _data(n: int = 1203, seed: int = 4) -> tuple[np.ndarray, np.ndarray]:
    # Known-truth simulation (invented data): variance grows with the moderator.
    rng = np.random.default_rng(seed)
    x, w = rng.normal(size=n), rng.uniform(0, 10, n)
    X = np.column_stack([np.ones(n), x, w, x * w])
    return X, 1 + x + 0.5 * w + 0.3 * x * w + rng.normal(size=n) * (0.5 + w)


def _rel(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.max(np.abs(a - b) / np.maximum(np.abs(b), 1e-300)))


@pytest.mark.parametrize("chunk_rows", CHUNKS)
def test_matches_in_memory_fit(chunk_rows: int) -> None:
    X, y = _data()
    Q, R = thin_qr(X)
    s = streamed_ols(array_chunks(X, y, chunk_rows=chunk_rows), KINDS)
    for kind in KINDS:
        mem = ols_fit(kind, Q, R, y, NAMES)
        got = s.fit(kind, NAMES)
        assert isinstance(mem, WaldFit) and isinstance(got, WaldFit)
        assert _rel(got.params, mem.params) < 1e-9, kind
        assert _rel(np.sqrt(np.diag(got.cov)), np.sqrt(np.diag(mem.cov))) < 1e-9, kind
        L = np.array([[0, 1, 2.0, 0], [0, 1, 7.5, 0]]) + np.array([[0, 0, 0, 2.0], [0, 0, 0, 7.5]])
        assert _rel(got.estimate(L, 0.05).se, mem.estimate(L, 0.05).se) < 1e-9, kind  # conditional slopes
        assert got.df == mem.df


def test_matches_statsmodels_hc3() -> None:
    # Reference library: statsmodels OLS with cov_type="HC0" … "HC3".
    X, y = _data(n=801, seed=9)
    s = streamed_ols(array_chunks(X, y, chunk_rows=50), KINDS)
    res = sm.OLS(y, X).fit()
    assert _rel(s.beta, res.params) < 1e-9
    assert _rel(np.sqrt(np.diag(s.cov["ols"])), res.bse) < 1e-9
    for kind in ("hc0", "hc1", "hc2", "hc3"):
        ref = res.get_robustcov_results(cov_type=kind.upper())
        assert _rel(np.sqrt(np.diag(s.cov[kind])), ref.bse) < 1e-9, kind


def test_ill_conditioned_design_falls_back_to_tsqr() -> None:
    # Levels far from zero make XᵀX ill-conditioned (common practice, no source): the QR path must take over.
    X, y = _data()
    X = X.copy()
    X[:, 2] += 1e5
    X[:, 3] = X[:, 1] * X[:, 2]
    f = factor_pass(array_chunks(X, y, chunk_rows=100))
    assert f.method == "tsqr" and f.condition > 1e6
    Q, R = thin_qr(X)
    mem = ols_fit("hc3", Q, R, y, NAMES)
    s = streamed_ols(array_chunks(X, y, chunk_rows=100), ["hc3"])
    assert isinstance(mem, WaldFit)
    assert _rel(s.beta, mem.params) < 1e-9
    assert _rel(np.sqrt(np.diag(s.cov["hc3"])), np.sqrt(np.diag(mem.cov))) < 1e-9


def test_leverage_one_row_is_named() -> None:
    # A dummy that is one in a single row gives that row leverage 1 (common practice, no source).
    X, y = _data(n=60)
    X = np.column_stack([X, np.eye(60)[:, 41]])
    s = streamed_ols(array_chunks(X, y, chunk_rows=8, rows=np.arange(60) + 100), ["hc0", "hc3"])
    got = s.fit("hc3", (*NAMES, "d"))
    assert isinstance(got, Unavailable) and "row(s) 142 " in got.reason
    assert isinstance(s.fit("hc0", (*NAMES, "d")), WaldFit)


def test_aliased_column_is_refused() -> None:
    X, y = _data(n=100)
    X = np.column_stack([X, 2 * X[:, 1]])
    with pytest.raises(InputError, match="'twice_x'"):
        streamed_ols(array_chunks(X, y, chunk_rows=30), names=(*NAMES, "twice_x"))


def test_chunk_rows_from_budget() -> None:
    assert rows_per_chunk(2**20, 8, factor=4) == 2**20 // (8 * 8 * 4)
    assert rows_per_chunk(10, 8) == 1024  # never below the floor
    with pytest.raises(InputError, match="memory_budget"):
        rows_per_chunk(0, 8)
