"""The one place that knows every back-end by id.

Entries name the module and class so that heavy back-ends (PyMC) import only when used.
"""
from __future__ import annotations

import importlib
from typing import Any

from ..errors import InputError

#: id → (module, class name, constructor keyword arguments fixed by the id)
REGISTRY: dict[str, tuple[str, str, dict[str, Any]]] = {
    "ols": ("robustmod.backends.ols", "OLSBackend", {"id": "ols"}),
    "hc0": ("robustmod.backends.ols", "OLSBackend", {"id": "hc0"}),
    "hc1": ("robustmod.backends.ols", "OLSBackend", {"id": "hc1"}),
    "hc2": ("robustmod.backends.ols", "OLSBackend", {"id": "hc2"}),
    "hc3": ("robustmod.backends.ols", "OLSBackend", {"id": "hc3"}),
    "hc4": ("robustmod.backends.ols", "OLSBackend", {"id": "hc4"}),
    "hc4m": ("robustmod.backends.ols", "OLSBackend", {"id": "hc4m"}),
    "hc5": ("robustmod.backends.ols", "OLSBackend", {"id": "hc5"}),
    "cr0": ("robustmod.backends.cluster", "ClusterBackend", {"id": "cr0"}),
    "cr1": ("robustmod.backends.cluster", "ClusterBackend", {"id": "cr1"}),
    "cr2": ("robustmod.backends.cluster", "ClusterBackend", {"id": "cr2"}),
    "cr3": ("robustmod.backends.cluster", "ClusterBackend", {"id": "cr3"}),
    "wild": ("robustmod.backends.wild", "WildBootstrapBackend", {}),
    "wls": ("robustmod.backends.wls", "WLSBackend", {}),
    "bayes": ("robustmod.backends.bayes", "BayesBackend", {}),
}

#: Back-ends whose standard errors assume constant variance (the summary does not let them
#: decide whether a finding survives non-constant variance).
CONSTANT_VARIANCE = frozenset({"ols"})

#: The back-end whose fitted variance model the calibration simulates from.
SIMULATION_BACKEND = "wls"

#: Back-ends run when the user names none.
DEFAULT_BACKENDS: tuple[str, ...] = ("ols", "hc3", "wild", "wls", "bayes")


def available_ids() -> list[str]:
    return list(REGISTRY)


def check_ids(ids: list[str] | tuple[str, ...]) -> list[str]:
    """Normalise and validate a list of back-end ids (case-insensitive, no repeats)."""
    out: list[str] = []
    for raw in ids:
        bid = str(raw).strip().lower()
        if bid not in REGISTRY:
            raise InputError(f"Unknown back-end {raw!r}; valid ids: {', '.join(REGISTRY)}.")
        if bid not in out:
            out.append(bid)
    if not out:
        raise InputError(f"No back-end given; valid ids: {', '.join(REGISTRY)}.")
    return out


def backend_class(backend_id: str) -> type:
    """The class registered under ``backend_id`` (imported on first use)."""
    (bid,) = check_ids([backend_id])
    module, cls, _ = REGISTRY[bid]
    try:
        return getattr(importlib.import_module(module), cls)
    except (ImportError, AttributeError) as exc:
        raise InputError(f"Back-end {bid!r} cannot be loaded ({exc}); reinstall robustmod with its dependencies.") from None


def make_backend(backend_id: str, **options: Any) -> Any:
    """Construct the back-end registered under ``backend_id`` with user options."""
    (bid,) = check_ids([backend_id])
    klass = backend_class(bid)
    fixed = REGISTRY[bid][2]
    try:
        return klass(**fixed, **options)
    except TypeError as exc:
        raise InputError(f"Bad option for back-end {bid!r}: {exc}.") from None
