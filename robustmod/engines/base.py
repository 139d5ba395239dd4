"""The engine interface and the one place that turns user options into an engine."""
from __future__ import annotations

import os
from abc import ABC, abstractmethod
from collections.abc import Callable, Sequence
from typing import Any

from ..defaults import ENGINES
from ..errors import InputError, close_matches, option_error

#: fn(state, *task) -> result; must be a module-level function (it is pickled).
TaskFn = Callable[..., Any]


def available_cores() -> int:
    """Cores this process may use (the affinity mask where the platform has one)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover  (platforms without affinity masks)
        return max(1, os.cpu_count() or 1)


class Engine(ABC):
    """Runs ``fn(state, *task)`` for every task; ``state`` is shipped to each worker once."""

    name: str = "abstract"

    @property
    @abstractmethod
    def workers(self) -> int:
        """How many tasks may run at once."""

    @abstractmethod
    def map(self, fn: TaskFn, tasks: Sequence[tuple[Any, ...]], state: Any = None, *,
            on_done: Callable[[int], None] | None = None) -> list[Any]:
        """Results of ``fn(state, *tasks[i])`` in task order; ``on_done(i)`` as each task finishes."""

    def map_reduce(self, fn: TaskFn, partitions: Sequence[Any], merge: Callable[[Any, Any], Any],
                   state: Any = None, *, on_done: Callable[[int], None] | None = None) -> Any:
        """``fn(state, p)`` for every partition p, combined by ``merge`` in a pairwise tree over the
        partitions in order (:func:`tree_merge`), so the result does not depend on which task ends first.

        An :class:`~robustmod.errors.InputError` of a partition (a bad value in the file) is raised
        after the others have ended: the one of the earliest partition, as a single pass would raise it.
        This engine folds the partitions one after the other in this process; Dask runs them as tasks.
        ``on_done(i)`` is called as partition i's task ends."""
        parts = []
        for i, p in enumerate(partitions):
            parts.append(guarded(fn, state, i, p))
            if on_done is not None:
                on_done(i)
        return unwrap(tree_merge(parts, lambda a, b: guarded_merge(merge, a, b)))

    def close(self) -> None:  # noqa: B027 - an optional hook: an engine that starts nothing keeps this no-op
        """Release what the engine started (worker processes, a LocalCluster)."""

    def describe(self) -> dict[str, Any]:
        """What provenance records of this engine (never timings)."""
        return {"engine": self.name, "workers": self.workers}

    def __enter__(self) -> Engine:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


class Failed:
    """A partition's InputError, kept with the partition's position until the reduction ends."""

    def __init__(self, index: int, error: InputError) -> None:
        self.index, self.error = index, error


def guarded(fn: TaskFn, state: Any, index: int, partition: Any) -> Any:
    """``fn(state, partition)``, or :class:`Failed` when it raises an InputError."""
    try:
        return fn(state, partition)
    except InputError as exc:
        return Failed(index, exc)


def guarded_merge(merge: Callable[[Any, Any], Any], a: Any, b: Any) -> Any:
    """``merge(a, b)``; a failure wins, the earlier partition's first (a precedes b in the file)."""
    if isinstance(a, Failed):
        return a
    if isinstance(b, Failed):
        return b
    return merge(a, b)


def unwrap(result: Any) -> Any:
    if isinstance(result, Failed):
        raise result.error
    return result


def tree_merge(items: Sequence[Any], merge: Callable[[Any, Any], Any]) -> Any:
    """Pairwise merges of neighbours, level by level ((1 2) (3 4) (5) → ((1 2) (3 4)) (5) → …)."""
    level = list(items)
    if not level:
        raise ValueError("tree_merge needs at least one item")
    while len(level) > 1:
        nxt = [merge(level[i], level[i + 1]) for i in range(0, len(level) - 1, 2)]
        if len(level) % 2:
            nxt.append(level[-1])
        level = nxt
    return level[0]


def check_engine_choice(name: str, scheduler: str | None = None) -> str:
    """The engine name, lower-cased; one-line errors for an unknown name or a scheduler without dask."""
    key = str(name).strip().lower()
    if key not in ENGINES:
        raise InputError(f"The 'engine' option must be one of {', '.join(ENGINES)}; got {name!r}."
                         + close_matches(str(name), ENGINES))
    if key == "local" and scheduler:
        raise InputError("The 'scheduler' option needs the dask engine; add --engine dask (API engine='dask').")
    return key


def make_engine(name: str = "local", *, scheduler: str | None = None, workers: int | None = None,
                announce: Callable[[str], None] | None = None, connect_timeout: float = 10.0) -> Engine:
    """The engine ``name`` ("local" or "dask").

    ``scheduler`` is the address of a running dask.distributed scheduler (dask only; without it a
    LocalCluster on 127.0.0.1 is started and closed with the engine). ``workers`` caps the worker
    count (default: the available cores). ``announce`` receives one line such as the dashboard address;
    ``connect_timeout`` is how many seconds to wait for ``scheduler``.
    """
    key = check_engine_choice(name, scheduler)
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int) or workers < 1):
        raise option_error("workers", "a whole number ≥ 1 (or left out for the available cores)", workers)
    if key == "local":
        from .local import LocalEngine  # noqa: PLC0415

        return LocalEngine(workers)
    from .dask import DaskEngine  # noqa: PLC0415  (dask imports only when asked for)

    return DaskEngine(scheduler=scheduler, workers=workers, announce=announce, connect_timeout=connect_timeout)
