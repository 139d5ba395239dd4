"""Reporting how long each slow step of a run took, through a callback the caller supplies.

``compare(..., on_step=callback)`` calls ``callback(step, seconds)`` as each step finishes
(design, each back-end, diagnostics, calibration); the command line prints them on stderr.
"""
from __future__ import annotations

import time
from collections.abc import Callable

#: ``callback(step_name, seconds)``, called when a step has finished.
StepCallback = Callable[[str, float], None]


def report_step(callback: StepCallback | None, step: str, started: float) -> None:
    """Tell ``callback`` that ``step``, begun at ``time.perf_counter() == started``, is done."""
    if callback is not None:
        callback(step, time.perf_counter() - started)
