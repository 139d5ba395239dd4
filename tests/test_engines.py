"""Engines: the same seeded tasks give the same results on every engine and worker count; a Dask
worker killed mid-run is replaced and its tasks rerun; an unreachable scheduler is a one-line error.

The Dask tests start a real dask.distributed LocalCluster bound to 127.0.0.1 (loopback only).
"""
from __future__ import annotations

import os
import signal
import threading
import time

import cloudpickle
import engine_tasks
import numpy as np
import pytest
from engine_tasks import seeded_sum, slow_seeded

from robustmod.engines import make_engine
from robustmod.errors import InputError

# Dask's worker processes cannot import the tests folder: ship the task functions by value.
cloudpickle.register_pickle_by_value(engine_tasks)

STATE = {"n": 500, "scale": 2.0, "sleep": 0.0}
TASKS = [(i, int(s)) for i, s in enumerate(np.random.SeedSequence(7).generate_state(24))]


def _expected() -> list[tuple[int, float]]:
    return [seeded_sum(STATE, *t) for t in TASKS]


@pytest.mark.parametrize("workers", [1, 2])
def test_local_engine_matches_direct_calls(workers: int) -> None:
    done: list[int] = []
    with make_engine("local", workers=workers) as eng:
        out = eng.map(seeded_sum, TASKS, STATE, on_done=done.append)
    assert out == _expected()
    assert sorted(done) == list(range(len(TASKS)))


@pytest.mark.parametrize("workers", [1, 2])
def test_dask_local_cluster_matches_local_engine(workers: int) -> None:
    lines: list[str] = []
    with make_engine("dask", workers=workers, announce=lines.append) as eng:
        assert eng.workers == workers
        out = eng.map(seeded_sum, TASKS, STATE)
        assert "127.0.0.1" in str(eng.client.scheduler.address)
    assert out == _expected()
    assert lines and "127.0.0.1" in lines[0]


def test_dask_runs_one_after_another_with_the_same_state_names() -> None:
    # States are dicts with the same names from run to run (as the calibration's are): scattered value
    # by value, each under its dict key, the second run lost its inputs ("lost dependencies").
    with make_engine("dask", workers=2) as eng:
        for scale in (1.0, 2.0, 3.0, 4.0):
            state = {**STATE, "scale": scale}
            assert eng.map(seeded_sum, TASKS[:4], state) == [seeded_sum(state, *t) for t in TASKS[:4]]


def test_dask_worker_killed_mid_run_is_replaced_and_results_unchanged() -> None:
    state = {**STATE, "sleep": 0.3}
    with make_engine("dask", workers=2) as eng:
        pids = list(eng.client.run(os.getpid).values())
        assert len(pids) == 2

        def kill_one() -> None:
            time.sleep(1.0)  # tasks are running on both workers by then
            os.kill(pids[0], signal.SIGKILL)

        killer = threading.Thread(target=kill_one)
        killer.start()
        out = eng.map(slow_seeded, TASKS, state)
        killer.join()
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline and len(eng.client.scheduler_info()["workers"]) < 2:
            time.sleep(0.2)
        new_pids = set(eng.client.run(os.getpid).values())
        assert len(new_pids) == 2 and pids[0] not in new_pids  # the nanny replaced the killed worker
    assert [r[:2] for r in out] == _expected()


def test_unreachable_scheduler_is_one_line_error() -> None:
    with pytest.raises(InputError) as err:
        make_engine("dask", scheduler="tcp://127.0.0.1:9", connect_timeout=1.0)  # nothing listens on port 9
    msg = str(err.value)
    assert "tcp://127.0.0.1:9" in msg and "\n" not in msg


def test_engine_options_are_checked() -> None:
    with pytest.raises(InputError, match="dask"):
        make_engine("dasc")
    with pytest.raises(InputError, match="workers"):
        make_engine("local", workers=0)
    with pytest.raises(InputError, match="--engine dask"):
        make_engine("local", scheduler="tcp://127.0.0.1:8786")
