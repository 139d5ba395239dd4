"""Tasks on this machine: in the calling process for one worker, else a process pool."""
from __future__ import annotations

from collections.abc import Callable, Sequence
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from typing import Any

from .base import Engine, TaskFn, available_cores

_STATE: dict[str, Any] = {}


def _init_worker(state: Any) -> None:
    try:  # one BLAS thread per worker process: the workers already fill the cores
        from threadpoolctl import threadpool_limits  # noqa: PLC0415

        threadpool_limits(1)
    except ImportError:  # pragma: no cover
        pass
    _STATE["state"] = state


def _call(fn: TaskFn, task: tuple[Any, ...]) -> Any:
    return fn(_STATE["state"], *task)


class LocalEngine(Engine):
    """Processes on this machine; ``workers=1`` runs every task in the calling process."""

    name = "local"

    def __init__(self, workers: int | None = None) -> None:
        self._workers = int(workers) if workers is not None else available_cores()

    @property
    def workers(self) -> int:
        return self._workers

    def map(self, fn: TaskFn, tasks: Sequence[tuple[Any, ...]], state: Any = None, *,
            on_done: Callable[[int], None] | None = None) -> list[Any]:
        results: list[Any] = [None] * len(tasks)
        if self._workers <= 1 or len(tasks) <= 1:
            for i, task in enumerate(tasks):
                results[i] = fn(state, *task)
                if on_done is not None:
                    on_done(i)
            return results
        n = min(self._workers, len(tasks))
        with ProcessPoolExecutor(max_workers=n, initializer=_init_worker, initargs=(state,)) as pool:
            pending = {pool.submit(_call, fn, task): i for i, task in enumerate(tasks)}
            while pending:
                done, _ = wait(pending, return_when=FIRST_COMPLETED)
                for fut in done:
                    i = pending.pop(fut)
                    results[i] = fut.result()
                    if on_done is not None:
                        on_done(i)
        return results
