"""Streamed order statistics and Goldfeld–Quandt against numpy, the in-memory test and statsmodels."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from statsmodels.stats.diagnostic import het_goldfeldquandt

from robustmod import ModelSpec, build_design
from robustmod.diagnostics import GQ_DROP, goldfeld_quandt
from robustmod.kernels.chunks import array_chunks
from robustmod.kernels.gq import DROP_SHARE
from robustmod.kernels.gq import goldfeld_quandt as streamed_gq
from robustmod.kernels.order import order_statistics, quantiles


def _frame(n: int = 900, seed: int = 5, decimals: int | None = None) -> pd.DataFrame:
    # Known-truth simulation (invented data): spread grows with the moderator w.
    rng = np.random.default_rng(seed)
    x, w = rng.normal(size=n), rng.uniform(0, 10, n)
    if decimals is not None:
        w = w.round(decimals)
    return pd.DataFrame({"y": 1 + x + w + 0.2 * x * w + rng.normal(size=n) * (0.5 + 0.3 * w), "x": x, "w": w})


def _values(v: np.ndarray, m: int):
    return lambda: (v[a:a + m] for a in range(0, v.size, m))


@pytest.mark.parametrize("column", ["spread", "ties", "three values"])
def test_order_statistics_and_quantiles_match_numpy(column: str) -> None:
    # Reference: numpy's sort and np.quantile (linear rule) on the whole column.
    rng = np.random.default_rng(1)
    v = {"spread": rng.standard_t(3, 20001), "ties": rng.normal(size=20001).round(1),
         "three values": rng.integers(0, 3, 20001).astype(float)}[column]
    ranks = [0, 1, 6666, 10000, 20000]
    got = order_statistics(_values(v, 333), ranks, collect_limit=500)  # small limit: several narrowing passes
    assert np.array_equal(got, np.sort(v)[ranks])
    probs = [0.0, 1 / 3, 0.5, 2 / 3, 0.9, 1.0]
    assert np.allclose(quantiles(_values(v, 1000), probs), np.quantile(v, probs), rtol=1e-15, atol=0)


def test_drop_share_is_the_in_memory_one() -> None:
    assert DROP_SHARE == GQ_DROP


@pytest.mark.parametrize("chunk_rows", (4, 101, 10**4))
def test_gq_matches_in_memory_without_ties(chunk_rows: int) -> None:
    design = build_design(_frame(), ModelSpec(formula="y ~ x * w", focal="x", moderators=("w",)))
    mem = goldfeld_quandt(design)
    chunks = array_chunks(design.X, design.y, chunk_rows=chunk_rows, columns={"w": design.moderators["w"].values})
    got = streamed_gq(chunks, "w")
    assert mem is not None and got is not None
    assert got["statistic"] == pytest.approx(mem["statistic"], rel=1e-9)
    assert got["p"] == pytest.approx(mem["p"], rel=1e-8)
    assert got["df"] == mem["df"] and got["n_dropped_middle"] == mem["n_dropped_middle"]


def test_gq_matches_statsmodels() -> None:
    # Reference library: statsmodels het_goldfeldquandt on rows sorted by w, split = n₁, two-sided.
    df = _frame(n=500, seed=11)
    X = np.column_stack([np.ones(500), df.x, df.w, df.x * df.w])
    got = streamed_gq(array_chunks(X, df.y.to_numpy(), chunk_rows=37, columns={"w": df.w.to_numpy()}), "w")
    order = np.argsort(df.w.to_numpy())
    n1 = (500 - 100) // 2
    F, p, _ = het_goldfeldquandt(df.y.to_numpy()[order], X[order], split=n1, drop=500 - 2 * n1, result_object=False,
                                 alternative="two-sided")
    assert got is not None
    assert got["statistic"] == pytest.approx(F, rel=1e-9) and got["p"] == pytest.approx(p, rel=1e-8)


def test_gq_keeps_ties_together() -> None:
    df = _frame(n=600, decimals=0)  # w takes 11 values: every cut value is tied
    X = np.column_stack([np.ones(600), df.x, df.w, df.x * df.w])
    w = df.w.to_numpy()
    got = streamed_gq(array_chunks(X, df.y.to_numpy(), chunk_rows=50, columns={"w": w}), "w")
    assert got is not None
    lo, hi = got["split"]["low_at_most"], got["split"]["high_at_least"]
    assert got["group_sizes"] == {"low": int((w <= lo).sum()), "high": int((w >= hi).sum())}
    n1 = (600 - 120) // 2
    assert got["group_sizes"]["low"] >= n1 and got["group_sizes"]["high"] >= n1
    # The same rows in another order give the same test (the split does not depend on row order).
    perm = np.random.default_rng(0).permutation(600)
    again = streamed_gq(array_chunks(X[perm], df.y.to_numpy()[perm], chunk_rows=50, columns={"w": w[perm]}), "w")
    assert again is not None and again["statistic"] == pytest.approx(got["statistic"], rel=1e-9)


@pytest.mark.parametrize("chunk_rows", (3, 101, 10**4))
@pytest.mark.parametrize("decimals", (None, 0))
def test_gq_groups_summed_in_the_binning_pass(chunk_rows: int, decimals: int | None) -> None:
    # Reference: numpy cross-products of [X y] over the rows of each group, and the test's own passes
    # (the same rule, its groups summed apart from the binning check); decimals=0 makes ties at the cuts.
    from robustmod.kernels.binning import binning_fits
    from robustmod.kernels.gq import gq_split

    design = build_design(_frame(decimals=decimals), ModelSpec(formula="y ~ x * w", focal="x", moderators=("w",)))
    w = design.moderators["w"].values
    d = design.data.frame["x"].to_numpy(dtype=float)
    chunks = array_chunks(design.X, design.y, chunk_rows=chunk_rows, columns={"x": d, "w": w})
    split = gq_split(chunks, "w")
    assert split is not None
    alone = binning_fits(chunks, focal="x", moderator="w", covariate_columns=[])
    fits = binning_fits(chunks, focal="x", moderator="w", covariate_columns=[], side_groups=split.groups())
    assert fits.side is not None and alone.side is None
    grams, sizes = fits.side
    Z = np.column_stack([design.X, design.y])
    for name, rows in (("low", w <= split.low_at_most), ("high", w >= split.high_at_least)):
        assert sizes[name] == int(rows.sum())
        assert np.allclose(grams[name], Z[rows].T @ Z[rows], rtol=1e-12, atol=0)
    # The binning check itself does not change when its first pass also sums the groups.
    assert fits.wald is not None and alone.wald is not None
    assert fits.wald.statistic == pytest.approx(alone.wald.statistic, rel=1e-10)
    shared = streamed_gq(chunks, "w", split=split, gathered=fits.side)
    own = streamed_gq(chunks, "w")
    assert shared is not None and own is not None
    assert shared["statistic"] == pytest.approx(own["statistic"], rel=1e-10)
    assert shared["df"] == own["df"] and shared["group_sizes"] == own["group_sizes"]
    assert shared["split"] == own["split"]


def test_diagnostics_gq_is_the_standalone_test() -> None:
    # The diagnostics take Goldfeld–Quandt's groups from the binning check's first pass; the
    # standalone in-memory test (checked against statsmodels above) is the reference.
    from robustmod.diagnostics import variance_diagnostics

    design = build_design(_frame(n=2000, seed=8), ModelSpec(formula="y ~ x * w", focal="x", moderators=("w",)))
    got = variance_diagnostics(design)["goldfeld_quandt"]
    ref = goldfeld_quandt(design)
    assert got is not None and ref is not None
    assert got["statistic"] == pytest.approx(ref["statistic"], rel=1e-10)
    assert {k: v for k, v in got.items() if k not in {"statistic", "p"}} == \
        {k: v for k, v in ref.items() if k not in {"statistic", "p"}}
