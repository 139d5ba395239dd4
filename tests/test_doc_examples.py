"""The Examples sections of the public docstrings run (numpydoc style, common practice, no source)."""
from __future__ import annotations

import doctest
import importlib

import pytest


@pytest.mark.parametrize("module", ["robustmod.compare", "robustmod.backends.wild", "robustmod.grid"])
def test_docstring_examples_run(module):
    mod = importlib.import_module(module)
    result = doctest.testmod(mod, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    assert result.attempted > 0 and result.failed == 0
