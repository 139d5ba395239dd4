"""Shared test set-up: robustmod's per-user cache (compiled sampler functions) lives in a temporary
folder for the whole session, so the suite starts from an empty cache, as on a fresh machine, and
writes nothing into the user's cache folder. Subprocesses started by the tests inherit it."""
from __future__ import annotations

import os

import pytest

from robustmod.cachedir import CACHE_ENV


@pytest.fixture(scope="session", autouse=True)
def _empty_cache_folder(tmp_path_factory: pytest.TempPathFactory):
    before = os.environ.get(CACHE_ENV)
    os.environ[CACHE_ENV] = str(tmp_path_factory.mktemp("robustmod-cache"))
    yield
    if before is None:
        os.environ.pop(CACHE_ENV, None)
    else:
        os.environ[CACHE_ENV] = before
