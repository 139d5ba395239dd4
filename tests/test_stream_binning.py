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
