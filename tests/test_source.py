"""The chunked Source: same model matrices as the in-memory design, stable levels, one-line errors with rows."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from robustmod import ModelSpec, build_design
from robustmod.backends.ols import ols_fit
from robustmod.errors import InputError
from robustmod.kernels.chunks import rows_per_chunk
from robustmod.kernels.ols import streamed_ols
from robustmod.source import ModelChunks, Source


def _frame(n: int = 3000, seed: int = 7) -> pd.DataFrame:
    # Invented data for a known-truth check; the region "d" appears only in the last rows, so a
    # model spec fixed on the first chunk alone would miss it.
    rng = np.random.default_rng(seed)
    region = rng.choice(["a", "b", "c"], n)
    region[-40:] = "d"
    x, w = rng.normal(size=n), rng.uniform(1, 10, n)
    y = 1 + x + w + 0.2 * x * w + (region == "d") + rng.normal(size=n) * w
    return pd.DataFrame({"y": y, "x": x, "w": w, "region": region, "spare": np.arange(n)})


SPEC = ModelSpec(formula="y ~ x * w + region + log(w)", focal="x", moderators=("w",))


@pytest.mark.parametrize("layout", ["parquet", "folder", "csv"])
def test_model_matrices_and_fit_match_in_memory(tmp_path: Path, layout: str) -> None:
    df = _frame()
    df.loc[[5, 2500], "x"] = np.nan  # listwise deletion as in memory
    if layout == "parquet":
        path = tmp_path / "d.parquet"
        df.to_parquet(path, row_group_size=333)
    elif layout == "folder":
        path = tmp_path / "parts"
        path.mkdir()
        for i, a in enumerate(range(0, len(df), 1000)):
            df.iloc[a:a + 1000].to_parquet(path / f"part-{i}.parquet")
    else:
        path = tmp_path / "d.csv"
        df.to_csv(path, index=False)
    chunks = ModelChunks(Source(path, batch_rows=257), SPEC)
    design = build_design(df, SPEC)
    assert chunks.term_names == design.term_names
    X = np.vstack([c.X for c in chunks()])
    rows = np.concatenate([c.rows for c in chunks()])
    assert np.array_equal(rows, design.data.frame.index.to_numpy())
    assert np.allclose(X, design.X, rtol=1e-15, atol=0)
    assert chunks.profile.n_dropped == 2 and chunks.profile.columns["region"].levels == ("a", "b", "c", "d")
    w = chunks.profile.columns["w"]
    assert w.mean == pytest.approx(design.moderators["w"].mean, rel=1e-12)
    assert w.sd == pytest.approx(design.moderators["w"].sd, rel=1e-12)
    Q, R = design.qr
    mem = ols_fit("hc3", Q, R, design.y, design.term_names)
    got = streamed_ols(chunks, ["hc3"]).fit("hc3", chunks.term_names)
    assert np.allclose(got.params, mem.params, rtol=1e-9, atol=0)  # type: ignore[union-attr]


def test_non_numeric_value_late_in_a_csv_names_the_row(tmp_path: Path) -> None:
    n = 300_000
    path = tmp_path / "big.csv"
    x = np.arange(n) % 7
    w = (np.arange(n) % 5 + 1).astype(str).astype(object)
    w[273_000] = "seven"  # data row 273001
    pd.DataFrame({"y": np.arange(n) * 0.5, "x": x, "w": w}).to_csv(path, index=False)
    spec = ModelSpec(formula="y ~ x * w", focal="x", moderators=("w",))
    # Small batches: the file is read in several blocks and the bad cell sits in a late one.
    with pytest.raises(InputError, match=r"^Column 'w' has the non-numeric value 'seven' in data row 273001; "):
        ModelChunks(Source(path, batch_rows=2048), spec)


def test_infinite_value_in_a_big_parquet_file_gives_the_in_memory_message(tmp_path: Path) -> None:
    n = 200_000
    x = np.random.default_rng(1).normal(size=n)
    x[[150_000, 190_000]] = np.inf
    table = pa.table({"y": np.zeros(n), "x": x, "w": np.ones(n)})
    path = tmp_path / "big.parquet"
    pq.write_table(table, path, row_group_size=10_000)
    spec = ModelSpec(formula="y ~ x * w", focal="x", moderators=("w",))
    with pytest.raises(InputError) as big:
        ModelChunks(Source(path), spec)
    small = pd.DataFrame({"y": [0.0] * 4, "x": [1.0, 2.0, np.inf, 3.0], "w": [1.0, 2.0, 3.0, 4.0]})
    with pytest.raises(InputError) as mem:
        build_design(small, spec)
    assert str(big.value) == str(mem.value).replace("row 3 (1 in all)", "row 150001 (2 in all)")


def test_bad_term_value_names_the_file_row(tmp_path: Path) -> None:
    df = _frame(n=2000)
    df.loc[1777, "w"] = -1.0  # log(w) is not finite there
    path = tmp_path / "d.parquet"
    df.to_parquet(path, row_group_size=100)
    with pytest.raises(InputError, match=r"The term 'log\(w\)' is not finite in data row 1778 "):
        list(ModelChunks(Source(path, batch_rows=64), SPEC)())


def test_bad_paths_and_columns_are_one_line(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="does not exist"):
        Source(tmp_path / "nothing.parquet")
    (tmp_path / "d.xlsx").write_bytes(b"x")
    with pytest.raises(InputError, match="not read in chunks"):
        Source(tmp_path / "d.xlsx")
    path = tmp_path / "d.parquet"
    _frame(n=50).to_parquet(path)
    with pytest.raises(InputError, match="Column 'wx' is not in the data. Did you mean: 'x', 'w'"):
        ModelChunks(Source(path), ModelSpec(formula="y ~ x * wx", focal="x", moderators=("wx",)))
    with pytest.raises(InputError, match="center option"):
        ModelChunks(Source(path), ModelSpec(formula="y ~ x * center(w)", focal="x", moderators=("w",)))


def test_input_file_is_not_modified(tmp_path: Path) -> None:
    path = tmp_path / "d.parquet"
    _frame(n=500).to_parquet(path)
    before = path.read_bytes()
    streamed_ols(ModelChunks(Source(path, batch_rows=100), SPEC), ["hc3"])
    assert path.read_bytes() == before


def test_variance_regressors_match_the_design(tmp_path: Path) -> None:
    df = _frame(n=1200)
    path = tmp_path / "d.parquet"
    df.to_parquet(path, row_group_size=250)
    chunks = ModelChunks(Source(path, batch_rows=111), SPEC, variance_terms=("x", "w", "region"))
    Z = np.vstack([c.columns["Z"] for c in chunks()])
    want, _ = build_design(df, SPEC).variance_matrix(("x", "w", "region"))
    assert np.array_equal(Z, want)
    w = np.concatenate([c.columns["w"] for c in chunks()])
    assert np.array_equal(w, df["w"].to_numpy())


def test_chunk_size_follows_the_memory_budget(tmp_path: Path) -> None:
    df = _frame(n=5000)
    path = tmp_path / "d.parquet"
    df.to_parquet(path)
    chunks = ModelChunks(Source(path), SPEC, memory_budget=2**20)
    k = len(chunks.term_names)
    want = rows_per_chunk(2**20, 1 + k + k * (k + 1) // 2)
    sizes = [c.size for c in chunks()]
    assert chunks.chunk_rows == want and max(sizes) == want and sum(sizes) == 5000
