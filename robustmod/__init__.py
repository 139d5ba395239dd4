"""robustmod: is a moderation effect an artifact of non-constant variance?

Fit one moderation model with several back-ends that treat the variance differently
and put the product term, conditional slopes and Johnson–Neyman regions side by side.

The public names load on first use (PEP 562), so ``import robustmod`` and
``robustmod --help`` do not import pandas or scipy.
"""
from __future__ import annotations

import importlib
import sys
import types
from typing import TYPE_CHECKING, Any

from .errors import InputError, RobustmodError

if TYPE_CHECKING:  # pragma: no cover
    from .compare import Comparison, compare
    from .design import Design, build_design
    from .grid import GridResult, grid
    from .spec import ModelSpec

__version__ = "0.1.0"

#: Public name → the module that defines it.
_LAZY = {
    "Comparison": "robustmod.compare",
    "compare": "robustmod.compare",
    "Design": "robustmod.design",
    "build_design": "robustmod.design",
    "grid": "robustmod.grid",
    "GridResult": "robustmod.grid",
    "ModelSpec": "robustmod.spec",
}

__all__ = ["Comparison", "Design", "GridResult", "InputError", "ModelSpec", "RobustmodError", "__version__",
           "build_design", "compare", "grid"]


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        value = getattr(importlib.import_module(_LAZY[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'robustmod' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(__all__)


class _Package(types.ModuleType):
    """Keeps ``robustmod.compare`` and ``robustmod.grid`` the functions.

    Loading the submodule ``robustmod.compare`` (or ``robustmod.grid``) binds the submodule on the
    package under the same name; the function of that name is what the public name means.
    """

    def __setattr__(self, name: str, value: Any) -> None:
        if isinstance(value, types.ModuleType) and _LAZY.get(name) == value.__name__:
            value = getattr(value, name)
        super().__setattr__(name, value)


sys.modules[__name__].__class__ = _Package
