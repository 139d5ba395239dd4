"""Engines run independent tasks — calibration chunks, grid specifications, data chunks — and
return their results in task order.

``local``: this machine (in-process for one worker, else a process pool); ``dask``: a
dask.distributed cluster (an existing scheduler, or a LocalCluster bound to 127.0.0.1).
Every task carries its own seed, so results do not depend on the engine or the number of
workers.
"""
from __future__ import annotations

from .base import ENGINES, Engine, check_engine_choice, make_engine

__all__ = ["ENGINES", "Engine", "check_engine_choice", "make_engine"]
