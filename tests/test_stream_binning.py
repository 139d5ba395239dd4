"""Streamed binning check (robustmod.kernels.binning) against robustmod.linearity.binning_check."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from robustmod import ModelSpec, build_design
from robustmod.design import Design
from robustmod.errors import InputError
from robustmod.kernels.binning import binning_fits
from robustmod.kernels.chunks import array_chunks
from robustmod.linearity import binning_check

SPEC = ModelSpec(formula="y ~ x * w + a", focal="x", moderators=("w",))


def _design(n: int = 1500, seed: int = 3, decimals: int | None = None) -> Design:
    # Known-truth simulation (invented data): the slope of x bends with w, so linearity fails.
    rng = np.random.default_rng(seed)
    x, w, a = rng.normal(size=n), rng.uniform(0, 10, n), rng.normal(size=n)
    if decimals is not None:
        w = w.round(decimals)
    y = 1 + x + w + 0.2 * x * w + 0.05 * x * w**2 + a + rng.normal(size=n) * (1 + 0.2 * w)
    return build_design(pd.DataFrame({"y": y, "x": x, "w": w, "a": a}), SPEC)


def _streamed(design: Design, chunk_rows: int, bins: object = 3):
    frame = design.data.frame
    chunks = array_chunks(design.X, design.y, chunk_rows=chunk_rows,
                          columns={"x": frame["x"].to_numpy(float), "w": frame["w"].to_numpy(float)})
    return binning_fits(chunks, focal="x", moderator="w", covariate_columns=design.columns_without({"x", "w"}),
                        bins=bins)  # type: ignore[arg-type]


@pytest.mark.parametrize(("chunk_rows", "bins"), [(4, 3), (97, 3), (10**5, 3), (61, 4), (200, [2.5, 5.0, 7.5])])
def test_matches_in_memory_binning_check(chunk_rows: int, bins: object) -> None:
    design = _design()
    mem = binning_check(design, bins=bins)  # type: ignore[arg-type]
    got = _streamed(design, chunk_rows, bins)
    s = got.summary
    assert mem is not None and got.bin_slopes is not None and got.wald is not None
    assert np.allclose(s.cuts, mem["cut_points"], rtol=1e-15, atol=0)
    rows = mem["bins"]
    assert [int(c) for c in s.counts] == [b["n"] for b in rows]
    assert np.allclose(s.medians, [b["median"] for b in rows], rtol=1e-15, atol=0)
    assert np.allclose(np.c_[s.lows, s.highs], [b["range"] for b in rows], rtol=0, atol=0)
    assert np.allclose(s.focal_sd, [b["focal_sd"] for b in rows], rtol=1e-12, atol=0)
    assert np.allclose(got.bin_slopes.estimate, [b["estimate"] for b in rows], rtol=1e-9, atol=0)
    assert np.allclose(got.bin_slopes.se, [b["se"] for b in rows], rtol=1e-9, atol=0)
    assert np.allclose(np.c_[got.bin_slopes.lower, got.bin_slopes.upper], [b["ci"] for b in rows], rtol=1e-9, atol=0)
    assert got.wald.statistic == pytest.approx(mem["wald"]["statistic"], rel=1e-9)
    assert [got.wald.df_num, got.wald.df_den] == mem["wald"]["df"]
    assert got.wald.p == pytest.approx(mem["wald"]["p"], rel=1e-6)
    assert list(got.notes) == [m for m in mem["notes"] if "raw scale" not in m and "fewer than" not in m]


@pytest.mark.parametrize("bins", [6, [0.5, 0.7, 5.5]])
def test_tied_moderator_matches_in_memory(bins: object) -> None:
    # w has 11 values: bins holding one value make the binning model rank-deficient, and the
    # cut points 0.5 < 0.7 leave an empty bin between them.
    design = _design(n=900, decimals=0)
    mem = binning_check(design, bins=bins)  # type: ignore[arg-type]
    got = _streamed(design, 50, bins)
    assert mem is not None
    assert [int(c) for c in got.summary.counts] == [b["n"] for b in mem["bins"]]
    assert list(got.notes) == [m for m in mem["notes"] if "fewer than" not in m and "barely varies" not in m]
    assert (got.wald is None) == (mem["wald"] is None)
    if got.wald is not None:
        assert got.wald.statistic == pytest.approx(mem["wald"]["statistic"], rel=1e-9)


def test_cut_points_outside_the_range_give_the_in_memory_message() -> None:
    design = _design(n=300)
    with pytest.raises(InputError) as mem:
        binning_check(design, bins=[-1.0, 5.0])
    with pytest.raises(InputError) as got:
        _streamed(design, 40, [-1.0, 5.0])
    assert str(got.value) == str(mem.value)


def _statsmodels_bins(df: pd.DataFrame, covariates: list[str], bins: int = 3):
    """The binning model written out by hand and fitted by statsmodels OLS with HC3."""
    import statsmodels.api as sm

    b = pd.qcut(df["w"], bins, labels=False).to_numpy()
    med = df.groupby(b)["w"].median().to_numpy()
    G = np.eye(bins)[b]
    wc = df["w"].to_numpy() - med[b]
    x = df["x"].to_numpy()
    X = np.column_stack([G, G * x[:, None], G * wc[:, None], G * (wc * x)[:, None], df[covariates].to_numpy()])
    return sm.OLS(df["y"].to_numpy(), X).fit(cov_type="HC3")


def test_ill_conditioned_bins_take_the_tsqr_route_and_match_statsmodels(monkeypatch: pytest.MonkeyPatch) -> None:
    # Invented data: the moderator sits far from zero (1e4 + U(0, 1)), so within a bin its column is
    # nearly the intercept and the bins' Gram matrices are too ill-conditioned for the Cholesky route.
    from robustmod.kernels import binning

    seen: list[bool] = []
    original = binning._cholesky_factor
    monkeypatch.setattr(binning, "_cholesky_factor", lambda G: seen.append((f := original(G)) is None) or f)
    rng = np.random.default_rng(11)
    n = 800
    x, w, a = rng.normal(size=n), 1e4 + rng.uniform(0, 1, n), rng.normal(size=n)
    y = 1 + x + 0.5 * (w - 1e4) + 0.3 * x * (w - 1e4) ** 2 + a + rng.normal(size=n)
    df = pd.DataFrame({"y": y, "x": x, "w": w, "a": a})
    got = binning_check(build_design(df, SPEC))
    assert got is not None and any(seen)
    res = _statsmodels_bins(df, ["a"])
    # Reference library: statsmodels OLS, HC3, on the hand-built binning model.
    np.testing.assert_allclose([b["estimate"] for b in got["bins"]], res.params[3:6], rtol=1e-7)
    np.testing.assert_allclose([b["se"] for b in got["bins"]], res.bse[3:6], rtol=1e-7)


def test_a_chunk_that_breaks_the_first_chunks_layout_gives_the_same_answer(monkeypatch: pytest.MonkeyPatch) -> None:
    # Invented data, no intercept: the column s is 1 on the first 100 rows (so in the first chunk it
    # looks like the bins' constant) and 0 or 1 afterwards; later chunks must not rely on it.
    from robustmod.kernels import binning

    layouts: list[dict[str, int]] = []
    original = binning._wide_factor
    monkeypatch.setattr(binning, "_wide_factor", lambda chunks, s, lay, *a: layouts.append(dict(lay.in_x))
                        or original(chunks, s, lay, *a))
    rng = np.random.default_rng(12)
    n = 1200
    s = np.r_[np.ones(100), rng.integers(0, 2, n - 100)].astype(float)
    x, w, a = rng.normal(size=n), rng.uniform(0, 10, n), rng.normal(size=n)
    y = 1 + s + x + w + 0.2 * x * w + 0.05 * x * w**2 + a + rng.normal(size=n)
    df = pd.DataFrame({"y": y, "x": x, "w": w, "a": a, "s": s})
    design = build_design(df, ModelSpec(formula="y ~ 0 + s + x * w + a", focal="x", moderators=("w",)))
    mem = binning_check(design)
    got = _streamed(design, 50)
    assert layouts[-2].get("one") == 0 and layouts[-1] == {}  # s taken for the constant, then dropped
    assert mem is not None and got.bin_slopes is not None and got.wald is not None
    np.testing.assert_allclose(got.bin_slopes.estimate, [b["estimate"] for b in mem["bins"]], rtol=1e-9)
    np.testing.assert_allclose(got.bin_slopes.se, [b["se"] for b in mem["bins"]], rtol=1e-9)
    assert got.wald.statistic == pytest.approx(mem["wald"]["statistic"], rel=1e-9)
    res = _statsmodels_bins(df, ["s", "a"])
    # Reference library: statsmodels OLS, HC3, on the hand-built binning model.
    np.testing.assert_allclose(got.bin_slopes.estimate, res.params[3:6], rtol=1e-8)
    np.testing.assert_allclose(got.bin_slopes.se, res.bse[3:6], rtol=1e-8)
