"""Module-level task functions for the engine tests (tasks are pickled to worker processes)."""
from __future__ import annotations

import os
import time
from typing import Any

import numpy as np


def seeded_sum(state: dict[str, Any], index: int, seed: int) -> tuple[int, float]:
    """A seeded draw scaled by the shared state: the same (index, seed) always gives the same number."""
    rng = np.random.default_rng(seed)
    return index, float(rng.standard_normal(state["n"]).sum() * state["scale"])


def slow_seeded(state: dict[str, Any], index: int, seed: int) -> tuple[int, float, int]:
    """Like seeded_sum, but takes a while and says which process ran it."""
    time.sleep(state["sleep"])
    return (*seeded_sum(state, index, seed), os.getpid())
