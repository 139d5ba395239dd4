"""The one place that knows every back-end by id: one :class:`BackendEntry` per id.

An entry holds every per-back-end fact the rest of the package asks about (label, colour,
whether the back-end assumes constant variance or independent rows, cost, whether it runs by
default) and names the module and class, so a lookup imports nothing: heavy back-ends (PyMC)
load only when one is built. The contract tests (tests/test_contract.py) check that each entry
agrees with the facts its class declares.
"""
from __future__ import annotations

import importlib
from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any

from ..defaults import BACKENDS
from ..errors import InputError
from .base import unknown_option

#: Okabe & Ito (2008) colour-blind-safe palette.
OKABE_ITO: Mapping[str, str] = MappingProxyType({
    "black": "#000000", "orange": "#E69F00", "sky": "#56B4E9", "green": "#009E73",
    "yellow": "#F0E442", "blue": "#0072B2", "vermillion": "#D55E00", "purple": "#CC79A7",
})


@dataclass(frozen=True)
class BackendEntry:
    """Everything the package knows about one back-end id.

    ``fixed`` holds constructor options set by the id itself (e.g. the HC type of ``hc3``);
    a user cannot override them. ``colour`` is the back-end's colour in every figure (None: a
    palette colour by position in the registry). ``needs_residual_of_each_row``: its standard error
    is built from each row's residual, so it is degenerate where a row has leverage one (that
    residual is zero whatever the variance there). ``streams``: the back-end fits data read in chunks
    (its class declares ``streams = True`` and implements ``fit_stream``); the others are listed as
    unavailable for such data, with the reason their class gives.
    """

    id: str
    module: str
    class_name: str
    label: str
    assumes_constant_variance: bool
    assumes_independent_rows: bool
    cost: str
    fixed: Mapping[str, Any] = field(default_factory=dict)
    colour: str | None = None
    default: bool = False
    needs_residual_of_each_row: bool = False
    streams: bool = False

    def __post_init__(self) -> None:
        object.__setattr__(self, "fixed", MappingProxyType(dict(self.fixed)))

    @property
    def costly(self) -> bool:
        return self.cost == "costly"


def _ols(bid: str, label: str, colour: str) -> BackendEntry:
    return BackendEntry(bid, "robustmod.backends.ols", "OLSBackend", label, assumes_constant_variance=bid == "ols",
                        assumes_independent_rows=True, cost="cheap", fixed={"id": bid}, colour=colour,
                        default=bid in BACKENDS, needs_residual_of_each_row=bid != "ols", streams=True)


def _cluster(bid: str, label: str, colour: str) -> BackendEntry:
    return BackendEntry(bid, "robustmod.backends.cluster", "ClusterBackend", label, assumes_constant_variance=False,
                        assumes_independent_rows=False, cost="cheap", fixed={"id": bid}, colour=colour,
                        default=bid in BACKENDS, needs_residual_of_each_row=True)


_ENTRIES: dict[str, BackendEntry] = {e.id: e for e in (
    _ols("ols", "OLS, classical SE", OKABE_ITO["black"]),
    _ols("hc0", "OLS + HC0", OKABE_ITO["sky"]),
    _ols("hc1", "OLS + HC1", OKABE_ITO["sky"]),
    _ols("hc2", "OLS + HC2", OKABE_ITO["vermillion"]),
    _ols("hc3", "OLS + HC3", OKABE_ITO["blue"]),
    _ols("hc4", "OLS + HC4", OKABE_ITO["vermillion"]),
    _ols("hc4m", "OLS + HC4m", OKABE_ITO["yellow"]),
    _ols("hc5", "OLS + HC5", OKABE_ITO["yellow"]),
    _cluster("cr0", "OLS + CR0 (cluster-robust)", OKABE_ITO["sky"]),
    _cluster("cr1", "OLS + CR1 (cluster-robust)", OKABE_ITO["vermillion"]),
    _cluster("cr2", "OLS + CR2 (bias-reduced, Satterthwaite df)", OKABE_ITO["blue"]),
    _cluster("cr3", "OLS + CR3 (cluster jackknife)", OKABE_ITO["yellow"]),
    BackendEntry("wild", "robustmod.backends.wild", "WildBootstrapBackend", "Wild bootstrap (HC3-t, Rademacher)",
                 assumes_constant_variance=False, assumes_independent_rows=True, cost="moderate",
                 colour=OKABE_ITO["orange"], default="wild" in BACKENDS, needs_residual_of_each_row=True,
                 streams=True),
    BackendEntry("wls", "robustmod.backends.wls", "WLSBackend", "WLS, log-linear variance (ML) + HC3",
                 assumes_constant_variance=False, assumes_independent_rows=True, cost="cheap",
                 colour=OKABE_ITO["green"], default="wls" in BACKENDS, needs_residual_of_each_row=True,
                 streams=True),
    BackendEntry("bayes", "robustmod.backends.bayes", "BayesBackend", "Bayesian location–scale (PyMC)",
                 assumes_constant_variance=False, assumes_independent_rows=True, cost="costly",
                 colour=OKABE_ITO["purple"], default="bayes" in BACKENDS, streams=True),
)}

#: id → entry (read-only view; add entries with :func:`register`).
REGISTRY: Mapping[str, BackendEntry] = MappingProxyType(_ENTRIES)

#: The back-end whose fitted variance model the calibration simulates from.
SIMULATION_BACKEND = "wls"

#: Ids whose SEs assume constant variance, as registered at import (constant_variance_ids()
#: also counts entries added later with register()).
CONSTANT_VARIANCE: frozenset[str] = frozenset(b for b, e in _ENTRIES.items() if e.assumes_constant_variance)

#: Back-ends run when the user names none (robustmod.defaults.BACKENDS).
DEFAULT_BACKENDS: tuple[str, ...] = BACKENDS


def register(new: BackendEntry) -> BackendEntry:
    """Add a back-end at run time (one line per back-end: the module and the class do the rest)."""
    if not isinstance(new, BackendEntry):
        raise TypeError("register() takes a BackendEntry")
    if new.id != new.id.strip().lower() or not new.id:
        raise ValueError(f"back-end ids are lower-case words; got {new.id!r}")
    if new.id in _ENTRIES and _ENTRIES[new.id] != new:
        raise ValueError(f"the back-end id {new.id!r} is already registered")
    _ENTRIES[new.id] = new
    return new


def available_ids() -> list[str]:
    return list(_ENTRIES)


def check_ids(ids: list[str] | tuple[str, ...]) -> list[str]:
    """Normalise and validate a list of back-end ids (case-insensitive, no repeats)."""
    out: list[str] = []
    for raw in ids:
        bid = str(raw).strip().lower()
        if bid not in _ENTRIES:
            raise InputError(f"Unknown back-end {raw!r}; valid ids: {', '.join(_ENTRIES)}.")
        if bid not in out:
            out.append(bid)
    if not out:
        raise InputError(f"No back-end given; valid ids: {', '.join(_ENTRIES)}.")
    return out


def entry(backend_id: str) -> BackendEntry:
    """The entry of ``backend_id`` (any case); an unknown id is an InputError listing the valid ones."""
    (bid,) = check_ids([backend_id])
    return _ENTRIES[bid]


def label(backend_id: str) -> str:
    """The human label of the back-end at its default options."""
    return entry(backend_id).label


def colour(backend_id: str) -> str:
    """The back-end's colour in every figure (an Okabe–Ito colour)."""
    e = entry(backend_id)
    if e.colour is not None:
        return e.colour
    palette = list(OKABE_ITO.values())
    return palette[list(_ENTRIES).index(e.id) % len(palette)]


def constant_variance_ids() -> frozenset[str]:
    """Ids whose standard errors assume constant variance (the summary does not let them decide
    whether a finding survives non-constant variance)."""
    return frozenset(b for b, e in _ENTRIES.items() if e.assumes_constant_variance)


def residual_per_row_ids() -> frozenset[str]:
    """Ids whose standard errors are built from each row's residual (degenerate at leverage one)."""
    return frozenset(b for b, e in _ENTRIES.items() if e.needs_residual_of_each_row)


def streaming_ids() -> frozenset[str]:
    """Ids that fit data read in chunks (files larger than memory)."""
    return frozenset(b for b, e in _ENTRIES.items() if e.streams)


def independent_rows_ids() -> frozenset[str]:
    """Ids that assume independent rows (not valid for clustered data as they stand)."""
    return frozenset(b for b, e in _ENTRIES.items() if e.assumes_independent_rows)


def backend_class(backend_id: str) -> type:
    """The class registered under ``backend_id`` (imported on first use)."""
    e = entry(backend_id)
    try:
        return getattr(importlib.import_module(e.module), e.class_name)
    except (ImportError, AttributeError) as exc:
        raise InputError(f"Back-end {e.id!r} cannot be loaded ({exc}); reinstall robustmod with its "
                         "dependencies.") from None


def option_help(backend_id: str) -> tuple[str, ...]:
    """One line per user option: "replications: a whole number in [99, 10^6] (default 9999). …".

    Options fixed by the id are left out. Imports the back-end's module (not its heavy libraries).
    """
    e = entry(backend_id)
    declared = getattr(backend_class(e.id), "options", ())
    return tuple(o.describe() for o in declared if o.name not in e.fixed)


def make_backend(backend_id: str, **options: Any) -> Any:
    """Construct the back-end registered under ``backend_id`` with user options.

    A user option that the id fixes, or any constructor complaint, becomes a one-line InputError.
    """
    e = entry(backend_id)
    clash = sorted(set(options) & set(e.fixed))
    if clash:
        raise InputError(f"The '{clash[0]}' option of back-end '{e.id}' is set by the back-end id; choose "
                         f"another id instead (valid ids: {', '.join(_ENTRIES)}).")
    klass = backend_class(e.id)
    user = [o.name for o in getattr(klass, "options", ()) if o.name not in e.fixed]
    for name in options:
        if name not in user:
            raise unknown_option(e.id, str(name), user)
    try:
        return klass(**e.fixed, **options)
    except TypeError as exc:
        raise InputError(f"Bad option for back-end {e.id!r} ({exc}); see `robustmod backends` for its "
                         "options.") from None
