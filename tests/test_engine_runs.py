"""The calibration on every engine: results.json of ``robustmod appendix`` is byte-identical on the local
engine, a Dask LocalCluster of 1 worker and one of 2 workers, and when a worker is killed mid-calibration
(reproducible analyses: common practice, no source). The clusters are real dask.distributed LocalClusters
bound to 127.0.0.1 (loopback only), started here and handed to the command line with --scheduler.
"""
from __future__ import annotations

import os
import signal
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from robustmod.calibrate import CHUNK, _tasks
from robustmod.cli import main
from robustmod.demo import DEMO_FOCAL, DEMO_FORMULA, DEMO_MODERATOR, demo_data

distributed = pytest.importorskip("distributed")

#: Enough datasets for two chunks, so the engine runs more than one task.
DATASETS = 60


def _cluster(workers: int) -> Any:
    return distributed.LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                                    dashboard_address="127.0.0.1:0", silence_logs=50)


@pytest.fixture(scope="module")
def demo_csv(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("data") / "demo.csv"  # the invented demo scenario
    demo_data().to_csv(path, index=False)
    return path


def _appendix(data: Path, out: Path, *engine: str) -> bytes:
    argv = ["appendix", str(data), "--formula", DEMO_FORMULA, "--focal", DEMO_FOCAL, "--moderator", DEMO_MODERATOR,
            "--backends", "ols,hc3,wild,wls", "--set", "wild.replications=499", "--seed", "11",
            "--calibrate", str(DATASETS), "--out", str(out), "--quiet", *engine]
    assert main(argv) == 0
    return (out / "results.json").read_bytes()


@pytest.fixture(scope="module")
def local_bytes(demo_csv: Path, tmp_path_factory: pytest.TempPathFactory) -> bytes:
    return _appendix(demo_csv, tmp_path_factory.mktemp("local") / "appendix", "--engine", "local")


@pytest.fixture(scope="module")
def cluster_1() -> Iterator[Any]:
    with _cluster(1) as c:
        yield c


@pytest.fixture(scope="module")
def cluster_2() -> Iterator[Any]:
    with _cluster(2) as c:
        yield c


@pytest.mark.slow
def test_results_json_identical_on_local_and_one_and_two_dask_workers(
        demo_csv: Path, tmp_path: Path, local_bytes: bytes, cluster_1: Any, cluster_2: Any) -> None:
    one = _appendix(demo_csv, tmp_path / "one", "--engine", "dask", "--scheduler", cluster_1.scheduler_address)
    two = _appendix(demo_csv, tmp_path / "two", "--scheduler", cluster_2.scheduler_address)  # implies dask
    assert local_bytes == one == two
    assert b'"n_datasets": 60' in local_bytes
    assert b'"engine"' not in local_bytes  # how the run went goes to provenance.json, not results.json
    assert b"\"calibration engine\": \"dask\"" in (tmp_path / "two" / "provenance.json").read_bytes()


@pytest.mark.slow
def test_worker_killed_mid_calibration_leaves_results_json_unchanged(demo_csv: Path, tmp_path: Path,
                                                                     local_bytes: bytes) -> None:
    with _cluster(2) as cluster, distributed.Client(cluster, set_as_default=False) as client:
        pids = client.run(os.getpid)
        killed: list[int] = []
        stop = threading.Event()

        def kill_a_busy_worker() -> None:
            deadline = time.monotonic() + 120
            while not stop.is_set() and time.monotonic() < deadline:
                busy = [addr for addr, keys in client.processing().items() if keys]
                if busy:
                    time.sleep(0.3)  # inside the task by then (a chunk takes seconds)
                    os.kill(pids[busy[0]], signal.SIGKILL)
                    killed.append(pids[busy[0]])
                    return
                time.sleep(0.05)

        killer = threading.Thread(target=kill_a_busy_worker)
        killer.start()
        try:
            out = _appendix(demo_csv, tmp_path / "killed", "--scheduler", cluster.scheduler_address)
        finally:
            stop.set()
            killer.join()
        assert killed, "no worker was busy, so none was killed"
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline and len(client.scheduler_info()["workers"]) < 2:
            time.sleep(0.2)
        assert killed[0] not in client.run(os.getpid).values()  # the nanny replaced it
    assert out == local_bytes


def test_unreachable_scheduler_is_one_line_and_exit_2(demo_csv: Path, capsys: pytest.CaptureFixture[str]) -> None:
    argv = ["check", str(demo_csv), "--formula", DEMO_FORMULA, "--focal", DEMO_FOCAL, "--moderator", DEMO_MODERATOR,
            "--backends", "ols,hc3", "--calibrate", "10", "--engine", "dask", "--scheduler", "tcp://127.0.0.1:9",
            "--quiet"]  # nothing listens on port 9 of the loopback address
    assert main(argv) == 2
    err = capsys.readouterr().err.strip()
    assert "tcp://127.0.0.1:9" in err and "\n" not in err and "Traceback" not in err


def test_scheduler_with_the_local_engine_is_refused(demo_csv: Path, capsys: pytest.CaptureFixture[str]) -> None:
    argv = ["check", str(demo_csv), "--formula", DEMO_FORMULA, "--focal", DEMO_FOCAL, "--moderator", DEMO_MODERATOR,
            "--backends", "ols", "--engine", "local", "--scheduler", "tcp://127.0.0.1:8786", "--quiet"]
    assert main(argv) == 2
    assert "--engine dask" in capsys.readouterr().err


def test_dashboard_address_is_announced_when_a_cluster_is_started(demo_csv: Path,
                                                                  capsys: pytest.CaptureFixture[str]) -> None:
    argv = ["check", str(demo_csv), "--formula", DEMO_FORMULA, "--focal", DEMO_FOCAL, "--moderator", DEMO_MODERATOR,
            "--backends", "ols,hc3", "--calibrate", "20", "--engine", "dask", "--workers", "1", "--json"]
    assert main(argv) == 0
    captured = capsys.readouterr()
    line = [x for x in captured.err.splitlines() if "Dask cluster" in x]
    assert len(line) == 1 and "127.0.0.1" in line[0] and "dashboard" in line[0]
    assert '"engine": "dask"' in captured.out and '"workers": 1' in captured.out


def test_costly_back_end_gets_one_task_per_dataset_seeded_by_its_place() -> None:
    root = np.random.SeedSequence(3)
    bounds = [(0, CHUNK), (CHUNK, CHUNK + 10)]
    chunk_seqs = root.spawn(len(bounds))
    tasks = _tasks(["ols", "hc3"], ["bayes"], bounds, chunk_seqs, root, 4)
    assert [t[:3] for t in tasks] == [(("ols", "hc3"), 0, CHUNK), (("ols", "hc3"), CHUNK, CHUNK + 10),
                                      *((("bayes",), j, j + 1) for j in range(4))]
    # The seed of costly dataset j depends on its place alone, not on how many were asked for.
    again = np.random.SeedSequence(3)
    again.spawn(len(bounds))
    fewer = _tasks([], ["bayes"], bounds, [], again, 2)
    assert [t[3].entropy for t in fewer] == [t[3].entropy for t in tasks[2:4]]
    assert [t[3].spawn_key for t in fewer] == [t[3].spawn_key for t in tasks[2:4]]


def test_engine_table_of_the_config_file(tmp_path: Path) -> None:
    from robustmod.config import compare_arguments, load_config
    from robustmod.errors import InputError

    cfg = tmp_path / "analysis.toml"
    cfg.write_text('formula = "y ~ x * w"\n[engine]\nscheduler = "tcp://127.0.0.1:8786"\nworkers = 3\n')
    kw = compare_arguments(load_config(cfg))
    assert kw["engine"] == "dask" and kw["scheduler"] == "tcp://127.0.0.1:8786" and kw["workers"] == 3
    cfg.write_text('[engine]\nname = "Local"\n')
    assert compare_arguments(load_config(cfg))["engine"] == "local"
    for body, needle in (('[engine]\nworkers = 0\n', "'engine.workers'"), ('[engine]\nname = "spark"\n', "'engine.name'"),
                         ('[engine]\nhost = "x"\n', "'host'"), ('engine = "dask"\n', "'engine'")):
        cfg.write_text(body)
        with pytest.raises(InputError, match=needle) as err:
            load_config(cfg)
        assert "\n" not in str(err.value)


@pytest.mark.slow
def test_sampler_calibrated_across_local_workers_gives_the_same_rates() -> None:
    import robustmod.calibrate as cal
    from robustmod.design import build_design
    from robustmod.spec import ModelSpec

    design = build_design(demo_data(120), ModelSpec(formula=DEMO_FORMULA, focal=DEMO_FOCAL,
                                                    moderators=(DEMO_MODERATOR,)))
    runs = [cal.calibrate(design, ["hc3", "bayes"], n_datasets=10, seed=4, costly_datasets=6, workers=w)
            for w in (1, 2)]
    assert runs[0]["workers"] == 1 and runs[1]["workers"] == 2  # a costly back-end always uses the workers
    assert runs[0]["false_positive_rate"] == runs[1]["false_positive_rate"]
    assert runs[0]["power"] == runs[1]["power"]
    assert runs[0]["false_positive_rate"]["bayes"]["n"] == 6


def test_progress_advances_once_per_finished_task_on_a_given_engine(monkeypatch: pytest.MonkeyPatch) -> None:
    import robustmod.calibrate as cal
    from robustmod.design import build_design
    from robustmod.engines import make_engine
    from robustmod.spec import ModelSpec

    seen: list[tuple[int, int]] = []
    monkeypatch.setattr(cal, "_advance", lambda bar, bound: seen.append(tuple(bound)))
    design = build_design(demo_data(), ModelSpec(formula=DEMO_FORMULA, focal=DEMO_FOCAL, moderators=(DEMO_MODERATOR,)))
    with make_engine("local", workers=2) as eng:
        out = cal.calibrate(design, ["ols", "hc3"], n_datasets=120, seed=2, engine=eng, progress=True)
    assert sorted(seen) == [(0, CHUNK), (CHUNK, 2 * CHUNK), (2 * CHUNK, 120)]  # every dataset counted once
    assert out["workers"] == 2 and out["engine"] == "local"


def test_calibration_progress_bar_keeps_json_on_stdout_clean(demo_csv: Path, monkeypatch: pytest.MonkeyPatch,
                                                             capsys: pytest.CaptureFixture[str]) -> None:
    import json

    monkeypatch.setattr("robustmod.cli.options.stderr_is_terminal", lambda: True)  # as on a terminal
    monkeypatch.setenv("FORCE_COLOR", "1")  # rich then draws its bar as on a terminal
    argv = ["check", str(demo_csv), "--formula", DEMO_FORMULA, "--focal", DEMO_FOCAL, "--moderator", DEMO_MODERATOR,
            "--backends", "ols,hc3", "--calibrate", "60", "--json"]
    assert main(argv) == 0
    out = capsys.readouterr().out
    assert json.loads(out)["calibration"]["n_datasets"] == 60
