"""The per-user cache folder of robustmod (compiled sampler functions; safe to delete at any time).

``ROBUSTMOD_CACHE_DIR`` names the folder; otherwise it is the platform's user cache folder
(``~/.cache/robustmod`` on Linux, via platformdirs). Setting ``ROBUSTMOD_CACHE_DIR`` to ``off``
turns the cache off (everything is then compiled in each process).
"""
from __future__ import annotations

import os
import tempfile
from pathlib import Path

#: The environment variable that moves (or, with the value ``off``, disables) the cache.
CACHE_ENV = "ROBUSTMOD_CACHE_DIR"


def cache_dir(sub: str) -> Path | None:
    """The writable folder ``<cache>/<sub>``, created if needed; None when the cache is off or not writable."""
    chosen = os.environ.get(CACHE_ENV)
    if chosen is not None and chosen.strip().lower() == "off":
        return None
    if chosen:
        root = Path(chosen).expanduser()
    else:
        from platformdirs import user_cache_dir  # noqa: PLC0415

        root = Path(user_cache_dir("robustmod", appauthor=False))
    folder = root / sub
    try:
        folder.mkdir(parents=True, exist_ok=True)
        with tempfile.TemporaryFile(dir=folder):  # writable (a read-only home turns the cache off)
            pass
    except OSError:
        return None
    return folder
