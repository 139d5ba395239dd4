"""Determinism: the same input and seed give a byte-identical results.json, whatever the number of
worker processes of the calibration (common practice for reproducible analyses, no source)."""
from __future__ import annotations

import json

import robustmod
from robustmod.demo import DEMO_FOCAL, DEMO_FORMULA, DEMO_MODERATOR, demo_data
from robustmod.report.writers import results_dict


def _bytes(workers: int) -> bytes:
    """results.json bytes of one run (the run facts, such as timings and workers, go to provenance)."""
    res = robustmod.compare(demo_data(), DEMO_FORMULA, DEMO_FOCAL, DEMO_MODERATOR,
                            backends=["ols", "hc3", "wild", "wls"], options={"wild": {"replications": 499}},
                            calibration=120, workers=workers, seed=11)
    contract, run = results_dict(res)
    assert run["calibration workers"] == workers
    return json.dumps(contract, sort_keys=True, allow_nan=False).encode()


def test_results_identical_across_runs_and_worker_counts(monkeypatch):
    monkeypatch.setattr("robustmod.calibrate.PARALLEL_MIN_SECONDS", 0.0)  # use the pool even for a short job
    one = _bytes(1)
    assert one == _bytes(1)
    assert one == _bytes(2)
    d = json.loads(one)
    assert d["calibration"]["n_datasets"] == 120
    assert d["backends"]["wild"]["interaction"]["p"] is not None


def test_different_seed_changes_random_parts_only():
    a = robustmod.compare(demo_data(), DEMO_FORMULA, DEMO_FOCAL, DEMO_MODERATOR, backends=["hc3", "wild"],
                          options={"wild": {"replications": 499}}, seed=1)
    b = robustmod.compare(demo_data(), DEMO_FORMULA, DEMO_FOCAL, DEMO_MODERATOR, backends=["hc3", "wild"],
                          options={"wild": {"replications": 499}}, seed=2)
    assert a.results["hc3"].interaction == b.results["hc3"].interaction
    assert a.results["wild"].interaction["p"] != b.results["wild"].interaction["p"]
