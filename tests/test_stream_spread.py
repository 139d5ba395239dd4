"""Streamed residual spread by moderator bins against robustmod.diagnostics.residual_spread."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from robustmod import ModelSpec, build_design
from robustmod.diagnostics import residual_spread
from robustmod.kernels.chunks import array_chunks
from robustmod.kernels.ols import streamed_ols
from robustmod.kernels.spread import ResidualSpread


@pytest.mark.parametrize(("chunk_rows", "decimals"), [(3, None), (128, 0), (10**5, None)])
def test_matches_in_memory_spread(chunk_rows: int, decimals: int | None) -> None:
    # Known-truth simulation (invented data): spread grows with w; rounding w makes ties at the cuts.
    rng = np.random.default_rng(4)
    n = 900
    x, w = rng.normal(size=n), rng.uniform(0, 10, n)
    if decimals is not None:
        w = w.round(decimals)
    df = pd.DataFrame({"y": 1 + x + w + rng.normal(size=n) * (0.5 + w), "x": x, "w": w})
    design = build_design(df, ModelSpec(formula="y ~ x * w", focal="x", moderators=("w",)))
    mem = residual_spread(design)
    chunks = array_chunks(design.X, design.y, chunk_rows=chunk_rows, columns={"w": w})
    spread = ResidualSpread.quantile_bins(chunks, "w")
    streamed_ols(chunks, ["hc3"], consumers=[spread])
    got = spread.result()
    assert mem is not None
    assert [b["n"] for b in got["bins"]] == [b["n"] for b in mem["bins"]]
    assert [b["range"] for b in got["bins"]] == [b["range"] for b in mem["bins"]]
    assert np.allclose([b["sd"] for b in got["bins"]], [b["sd"] for b in mem["bins"]], rtol=1e-9, atol=0)
    assert got["ratio"] == pytest.approx(mem["ratio"], rel=1e-9)
