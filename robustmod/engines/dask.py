"""Tasks on a dask.distributed cluster: an existing scheduler, or a LocalCluster on 127.0.0.1.

A worker that dies mid-run is replaced by its nanny and its tasks are rerun by the scheduler
(Dask's own recovery, plus ``retries`` for tasks that fail); results do not change because each
task carries its own seed.
"""
from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

from ..errors import InputError
from .base import Engine, TaskFn, available_cores, guarded, guarded_merge, unwrap

#: Seconds to wait for a scheduler before saying it cannot be reached.
CONNECT_TIMEOUT = 10

#: Times a failed task is resubmitted (a worker lost mid-task is rescheduled by Dask regardless).
RETRIES = 2


def _limit_blas() -> None:
    try:
        from threadpoolctl import threadpool_limits  # noqa: PLC0415

        threadpool_limits(1)
    except ImportError:  # pragma: no cover
        pass


def _call(fn: TaskFn, state: Any, task: tuple[Any, ...]) -> Any:
    _limit_blas()
    return fn(state, *task)


def _part(fn: TaskFn, state: Any, index: int, partition: Any) -> Any:
    _limit_blas()
    return guarded(fn, state, index, partition)


def _merge(merge: Callable[[Any, Any], Any], a: Any, b: Any) -> Any:
    _limit_blas()
    return guarded_merge(merge, a, b)


class DaskEngine(Engine):
    """dask.distributed: connect to ``scheduler``, or start (and later close) a LocalCluster."""

    name = "dask"

    def __init__(self, *, scheduler: str | None = None, workers: int | None = None,
                 announce: Callable[[str], None] | None = None, connect_timeout: float = CONNECT_TIMEOUT) -> None:
        try:
            from distributed import Client, LocalCluster  # noqa: PLC0415
        except ImportError:
            raise InputError("The dask engine needs dask.distributed, a dependency of robustmod; reinstall robustmod "
                             "(pip install robustmod) or install distributed, or choose --engine local.") from None
        self._cluster: Any = None
        self.scheduler = scheduler
        if scheduler:
            try:
                self._client = Client(scheduler, timeout=connect_timeout, set_as_default=False)
            except (OSError, TimeoutError) as exc:
                raise InputError(f"The Dask scheduler at {scheduler!r} cannot be reached ({type(exc).__name__}); "
                                 "check the address and that the scheduler is running, or leave out --scheduler "
                                 "to start a local cluster.") from None
        else:
            n = int(workers) if workers is not None else available_cores()
            self._cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True, host="127.0.0.1",
                                         dashboard_address="127.0.0.1:0", silence_logs=50)
            self._client = Client(self._cluster, set_as_default=False)
            link = getattr(self._cluster, "dashboard_link", None)
            if announce is not None:
                announce(f"Started a local Dask cluster with {n} worker(s) on 127.0.0.1"
                         + (f"; dashboard: {link}" if link else "") + ".")
        self._cap = workers

    @property
    def client(self) -> Any:
        return self._client

    @property
    def workers(self) -> int:
        n = len(self._client.scheduler_info().get("workers", {})) or 1
        return min(n, self._cap) if self._cap else n

    def map(self, fn: TaskFn, tasks: Sequence[tuple[Any, ...]], state: Any = None, *,
            on_done: Callable[[int], None] | None = None) -> list[Any]:
        from distributed import as_completed  # noqa: PLC0415

        if not tasks:
            return []
        # One object under a key of its own: a dict scattered as it is would put each value under its
        # dict key ('design', 'options', …), names that collide between runs on one scheduler, and a
        # lost worker then left the scheduler trying to compute such a key (seen as "already forgotten").
        shared = self._client.scatter([state], hash=False, broadcast=True)[0] if state is not None else None
        futures = [self._client.submit(_call, fn, shared, task, pure=False, retries=RETRIES) for task in tasks]
        index = {f.key: i for i, f in enumerate(futures)}
        results: list[Any] = [None] * len(tasks)
        for fut in as_completed(futures, loop=self._client.loop):
            i = index[fut.key]
            results[i] = fut.result()
            if on_done is not None:
                on_done(i)
        return results

    def map_reduce(self, fn: TaskFn, partitions: Sequence[Any], merge: Callable[[Any, Any], Any],
                   state: Any = None, *, on_done: Callable[[int], None] | None = None) -> Any:
        """One task per partition and a tree of merge tasks (neighbours paired level by level, as
        :func:`robustmod.engines.base.tree_merge` pairs them), so the result is the same on any number of
        workers; ``state`` is scattered once (its own key: equal states of different passes never collide)."""
        if not partitions:
            raise ValueError("map_reduce needs at least one partition")
        client = self._client
        shared = client.scatter([state], hash=False, broadcast=True)[0]
        level = [client.submit(_part, fn, shared, i, p, pure=False, retries=RETRIES)
                 for i, p in enumerate(partitions)]
        tasks = list(level)
        while len(level) > 1:
            nxt = [client.submit(_merge, merge, level[i], level[i + 1], pure=False, retries=RETRIES)
                   for i in range(0, len(level) - 1, 2)]
            if len(level) % 2:
                nxt.append(level[-1])
            level = nxt
        try:
            if on_done is not None:
                from distributed import as_completed  # noqa: PLC0415

                index = {f.key: i for i, f in enumerate(tasks)}
                for fut in as_completed(tasks, loop=client.loop):
                    on_done(index[fut.key])
            return unwrap(level[0].result())
        finally:
            del level, tasks, shared

    def describe(self) -> dict[str, Any]:
        return {"engine": self.name, "workers": self.workers,
                "scheduler": "local cluster on 127.0.0.1" if self._cluster is not None else "external"}

    def close(self) -> None:
        try:
            self._client.close()
        finally:
            if self._cluster is not None:
                self._cluster.close()
                self._cluster = None
