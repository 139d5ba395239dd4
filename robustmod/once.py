"""Values computed once per object, also when several threads ask for one at the same time.

The in-memory path shares a few n-row results of a design (its residuals, leverages and OLS fits)
between the back-ends and the diagnostics, which may run on two threads (:mod:`robustmod.lanes`).
A plain dictionary would let both threads compute the same value; here the second one waits for
the first. Entries are keyed weakly by the object, so they go with it.
"""
from __future__ import annotations

import threading
import weakref
from collections.abc import Callable, Hashable
from typing import Any, Generic, TypeVar

V = TypeVar("V")


class OncePer(Generic[V]):
    """``get(owner, compute, part)``: ``compute()`` made once per owner object and ``part``."""

    def __init__(self) -> None:
        self._values: weakref.WeakKeyDictionary[Any, dict[Hashable, V]] = weakref.WeakKeyDictionary()
        self._locks: weakref.WeakKeyDictionary[Any, threading.RLock] = weakref.WeakKeyDictionary()
        self._guard = threading.Lock()

    def get(self, owner: Any, compute: Callable[[], V], part: Hashable = None) -> V:
        """The value for (owner, part), computed by ``compute`` the first time it is asked for."""
        values = self._values.get(owner)
        if values is not None and part in values:
            return values[part]
        with self._guard:
            lock = self._locks.setdefault(owner, threading.RLock())  # re-entrant: a value may ask for another
            values = self._values.setdefault(owner, {})
        with lock:  # a second thread asking for the same owner waits here, then finds the value
            if part not in values:
                values[part] = compute()
            return values[part]
