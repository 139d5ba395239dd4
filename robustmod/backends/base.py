"""The common interface of every back-end: a Backend fits a Design and returns a Fit.

Every Fit answers one question — the distribution of L·β for rows L of the mean-model
coefficients — in one of three ways (see docs/methods.md):

* :class:`WaldFit`      L·β̂, sqrt(L V Lᵀ), t with the fit's df (OLS, HC0–HC5, WLS);
* bootstrap fits        subclass :class:`Fit` and answer with bootstrap-t quantiles;
* :class:`PosteriorFit` draws of L·β from the posterior.

Effects, regions and the comparison only call :meth:`Fit.estimate`,
:meth:`Fit.joint_test`, :meth:`Fit.test_coefficients` and :meth:`Fit.margin`, so a new back-end needs nothing else.
"""
from __future__ import annotations

import difflib
import functools
import os
from abc import ABC, abstractmethod
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal

import numpy as np
from scipy import linalg, stats

from ..errors import OptionError, option_error
from .kernels import wald_test

if TYPE_CHECKING:  # pragma: no cover
    from ..design import Design
    from ..stream import StreamData
    from ..tables import Table


@dataclass(frozen=True)
class Estimates:
    """Answers for the m rows of an L matrix at one level.

    ``p`` is None for a back-end that has no p-value (a posterior). ``extra`` holds
    back-end specific arrays of length m (e.g. ``prob_positive``).
    """

    estimate: np.ndarray
    se: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    p: np.ndarray | None
    level: float
    interval: str  # e.g. "t (df 196)", "bootstrap-t", "equal-tailed posterior"
    extra: dict[str, np.ndarray] = field(default_factory=dict)

    @property
    def significant(self) -> np.ndarray:
        """True where the interval excludes zero."""
        return (self.lower > 0) | (self.upper < 0)


@dataclass(frozen=True)
class JointTest:
    """A test that several linear combinations are all zero (e.g. a multi-df interaction)."""

    statistic: float
    df_num: int
    df_den: float | None
    p: float | None
    method: str
    supported: bool


@dataclass(frozen=True)
class Unavailable:
    """A back-end that could not give an answer on this design, with the reason."""

    backend_id: str
    label: str
    reason: str
    warnings: tuple[str, ...] = ()
    available: bool = False
    reliable: bool = False


class Fit(ABC):
    """Common core every fit fills: point estimates of β, term names, warnings, extras."""

    kind: str = "abstract"
    available: bool = True

    def __init__(
        self,
        backend_id: str,
        label: str,
        term_names: tuple[str, ...],
        params: np.ndarray,
        *,
        warnings: tuple[str, ...] = (),
        reliable: bool = True,
        extras: dict[str, Any] | None = None,
        se_label: str = "",
    ) -> None:
        self.backend_id = backend_id
        self.label = label
        self.term_names = tuple(term_names)
        self.params = np.asarray(params, dtype=float)
        self.params.setflags(write=False)
        self.warnings = tuple(warnings)
        self.reliable = bool(reliable)
        self.extras = dict(extras or {})
        self.se_label = se_label

    @abstractmethod
    def estimate(self, L: np.ndarray, alpha: float, *, simultaneous: bool = False) -> Estimates:
        """Estimates, SEs, (1 − alpha) intervals and p-values of the rows of L.

        With ``simultaneous=True`` the intervals hold jointly over all rows of L
        (a confidence band), not one at a time.
        """

    @abstractmethod
    def joint_test(self, L: np.ndarray, alpha: float) -> JointTest:
        """Test of H0: L·β = 0 for all rows of L at once."""

    def test_coefficients(self, columns: Sequence[int], alpha: float) -> JointTest:
        """Test of H0: β_j = 0 for every j in ``columns`` — the caller names the hypothesis.

        One column: the fit's own test of that coefficient (its t test, or for a posterior the
        (1 − alpha) interval); several: :meth:`joint_test` of the unit rows. A back-end that can
        impose the null (the wild bootstrap) overrides this; :meth:`estimate` never guesses it.
        """
        cols = [int(c) for c in columns]
        if not cols:
            raise ValueError("test_coefficients needs at least one column")
        L = np.zeros((len(cols), self.params.size))
        L[np.arange(len(cols)), cols] = 1.0
        if len(cols) > 1:
            return self.joint_test(L, alpha)
        est = self.estimate(L, alpha)
        p = None if est.p is None else float(est.p[0])
        stat = est.extra.get("statistic")
        supported = bool(p < alpha) if p is not None else bool(est.significant[0])
        if stat is None:
            stat = np.array([est.estimate[0] / est.se[0] if est.se[0] > 0 else 0.0])
        return JointTest(float(stat[0]), 1, None, p, est.interval, supported)

    def margin(self, L: np.ndarray, alpha: float) -> np.ndarray:
        """max(lower, −upper): positive exactly where the interval excludes zero.

        Continuous in the moderator, so significance-region boundaries are its roots.
        """
        est = self.estimate(L, alpha)
        return np.maximum(est.lower, -est.upper)

    def along(self, L0: np.ndarray, L1: np.ndarray) -> Line:
        """Answers for the rows L(w) = L0 + w·L1 as w runs (a slope linear in a moderator).

        The default builds the rows and asks :meth:`estimate`; a back-end whose answers are
        costly per row (the wild bootstrap) overrides this to reuse work across every w.
        """
        return Line(self, L0, L1)

    def report_tables(self) -> tuple[Table, ...]:
        """Tables this back-end contributes to every display (its own settings, checks, models).

        The default contributes none; a back-end overrides this, and the displays render the
        tables without knowing which back-end made them (``Table.source`` says).
        """
        return ()

    def coefficients(self, alpha: float) -> Estimates:
        """Estimates for every coefficient (L = identity)."""
        return self.estimate(np.eye(self.params.size), alpha)

    def __repr__(self) -> str:
        return f"<{type(self).__name__} {self.backend_id}: {len(self.term_names)} terms>"


class Line:
    """The answers of a fit along L(w) = L0 + w·L1: :meth:`estimate` and :meth:`margin` at values w."""

    def __init__(self, fit: Fit, L0: np.ndarray, L1: np.ndarray) -> None:
        self.fit = fit
        self.L0 = np.asarray(L0, dtype=float)
        self.L1 = np.asarray(L1, dtype=float)

    def rows(self, w: np.ndarray) -> np.ndarray:
        """The L rows at the values w (len(w) × k)."""
        return self.L0[None, :] + np.asarray(w, dtype=float)[:, None] * self.L1[None, :]

    def estimate(self, w: np.ndarray, alpha: float, *, simultaneous: bool = False) -> Estimates:
        """As :meth:`Fit.estimate` for the rows L(w)."""
        return self.fit.estimate(self.rows(w), alpha, simultaneous=simultaneous)

    def margin(self, w: np.ndarray, alpha: float) -> np.ndarray:
        """max(lower, −upper) at each w: positive exactly where the interval excludes zero."""
        est = self.estimate(w, alpha)
        return np.maximum(est.lower, -est.upper)


def _as_rows(L: np.ndarray, k: int) -> np.ndarray:
    L = np.atleast_2d(np.asarray(L, dtype=float))
    if L.shape[1] != k:
        raise ValueError(f"L has {L.shape[1]} columns but the model has {k} coefficients")
    return L


def quadratic_forms(L: np.ndarray, cov: np.ndarray) -> np.ndarray:
    """diag(L V Lᵀ) without forming the m×m matrix."""
    return np.einsum("ij,jk,ik->i", L, cov, L)


@functools.lru_cache(maxsize=1024)
def _critical_value(alpha: float, rank: int, df: float | None) -> float:
    """:meth:`WaldFit.critical_value`, kept per (α, rank, df): many fits share their df (a grid, a size study)."""
    if rank <= 1:  # the distributions' own ppf: building a frozen distribution costs more than the quantile
        q = 1 - alpha / 2
        return float(stats.norm.ppf(q) if df is None else stats.t.ppf(q, df))
    if df is None:
        return float(np.sqrt(stats.chi2.ppf(1 - alpha, rank)))
    return float(np.sqrt(rank * stats.f.ppf(1 - alpha, rank, df)))


class WaldFit(Fit):
    """L·β̂ with SE sqrt(L V Lᵀ); t reference with ``df`` (normal when df is None)."""

    kind = "wald"

    def __init__(self, backend_id: str, label: str, term_names: tuple[str, ...], params: np.ndarray,
                 cov: np.ndarray, df: float | None, **kwargs: Any) -> None:
        super().__init__(backend_id, label, term_names, params, **kwargs)
        self.cov = np.asarray(cov, dtype=float)
        self.cov.setflags(write=False)
        self.df = df

    def critical_value(self, alpha: float, rank: int = 1) -> float:
        """t_{1−α/2, df} pointwise; Scheffé sqrt(r·F_{r, df; 1−α}) for a band of rank r (Potthoff 1964)."""
        return _critical_value(float(alpha), int(rank), None if self.df is None else float(self.df))

    def estimate(self, L: np.ndarray, alpha: float, *, simultaneous: bool = False) -> Estimates:
        L = _as_rows(L, self.params.size)
        est = L @ self.params
        var = quadratic_forms(L, self.cov)
        se = np.sqrt(np.maximum(var, 0.0))
        rank = int(np.linalg.matrix_rank(L)) if simultaneous else 1
        crit = self.critical_value(alpha, rank)
        t, p = wald_test(est[:, None], var[:, None, None], self.df)  # each row its own t test
        ref = "normal" if self.df is None else f"t (df {self.df:g})"
        kind = f"Scheffé band, rank {rank}" if simultaneous and rank > 1 else ref
        return Estimates(est, se, est - crit * se, est + crit * se, p, 1 - alpha, kind, {"statistic": t})

    def joint_test(self, L: np.ndarray, alpha: float) -> JointTest:
        """Wald F = (Lβ)ᵀ (L V Lᵀ)⁻¹ (Lβ) / q, solved with Cholesky; χ²/q when df is None."""
        L = _as_rows(L, self.params.size)
        q = L.shape[0]
        stat, p_arr = wald_test((L @ self.params)[None, :], (L @ self.cov @ L.T)[None], self.df)
        F = float(stat[0]) ** 2 if q == 1 else float(stat[0])  # t² = F(1, df) for one row
        p = float(p_arr[0])
        method = f"Wald chi-square ({q} df)" if self.df is None else f"Wald F ({q}, {self.df:g})"
        return JointTest(F, q, self.df, p, method, bool(p < alpha))


class PosteriorFit(Fit):
    """Answers from posterior draws of β (shape S × k); no p-values."""

    kind = "posterior"

    def __init__(self, backend_id: str, label: str, term_names: tuple[str, ...], draws: np.ndarray,
                 **kwargs: Any) -> None:
        draws = np.asarray(draws, dtype=float)
        super().__init__(backend_id, label, term_names, draws.mean(axis=0), **kwargs)
        self.draws = draws
        self.draws.setflags(write=False)

    def estimate(self, L: np.ndarray, alpha: float, *, simultaneous: bool = False) -> Estimates:
        L = _as_rows(L, self.params.size)
        d = self.draws @ L.T  # S × m
        mean = d.mean(axis=0)
        sd = d.std(axis=0, ddof=1)
        if simultaneous and L.shape[0] > 1:
            # Band from the (1 − α) quantile of the largest standardised deviation over rows.
            with np.errstate(divide="ignore", invalid="ignore"):
                z = np.max(np.abs((d - mean) / np.where(sd > 0, sd, 1.0)), axis=1)
            c = float(np.quantile(z, 1 - alpha))
            lo, hi, kind = mean - c * sd, mean + c * sd, "simultaneous posterior band"
        else:
            lo, hi = np.quantile(d, [alpha / 2, 1 - alpha / 2], axis=0)
            kind = "equal-tailed posterior"
        return Estimates(mean, sd, lo, hi, None, 1 - alpha, kind, {"prob_positive": (d > 0).mean(axis=0)})

    def joint_test(self, L: np.ndarray, alpha: float) -> JointTest:
        """Posterior tail share beyond the origin's Mahalanobis distance (not a p-value).

        supported when fewer than alpha of the draws lie farther from the posterior mean
        than zero does, i.e. zero falls outside the (1 − alpha) ellipsoidal region.
        """
        L = _as_rows(L, self.params.size)
        d = self.draws @ L.T
        mean = d.mean(axis=0)
        S = np.atleast_2d(np.cov(d, rowvar=False))
        c = linalg.cho_factor(S + 1e-12 * np.trace(S) * np.eye(S.shape[0]), check_finite=False)
        dev = d - mean
        dist = np.einsum("ij,ij->i", dev, linalg.cho_solve(c, dev.T, check_finite=False).T)
        origin = float(mean @ linalg.cho_solve(c, mean, check_finite=False))
        tail = float((dist >= origin).mean())
        return JointTest(origin / L.shape[0], L.shape[0], None, None,
                         f"posterior tail share beyond zero = {tail:.3f}", bool(tail < alpha))



# ---------------------------------------------------------------------------------------
# The declared back-end contract
# ---------------------------------------------------------------------------------------
OptionType = Literal["integer", "number", "flag", "text", "names", "path"]
Cost = Literal["cheap", "moderate", "costly"]
COSTS: tuple[str, ...] = ("cheap", "moderate", "costly")


def _bound(x: float) -> str:
    """1000000 → '10^6' (a power of ten from 10^4 up), 0.5 → '0.5', 99 → '99'."""
    if x >= 1e4 and float(np.log10(x)).is_integer():
        return f"10^{int(np.log10(x))}"
    return f"{x:g}"


@dataclass(frozen=True)
class Option:
    """One declared option of a back-end: its type, default and allowed values.

    ``type`` is 'integer' (a whole number; a whole float such as 1e4 is accepted), 'number',
    'flag' (True/False), 'text' (free or one of ``choices``), 'names' (column names, a list or
    one comma-separated string; stored as a tuple) or 'path' (a file in an existing folder).
    ``low``/``high`` bound a number, each end closed unless ``low_open``/``high_open``.
    ``case`` 'insensitive' matches ``choices`` in any case and stores the declared spelling.
    A default of None means "unset" and None is then always accepted.
    """

    name: str
    type: OptionType
    default: Any
    help: str
    low: float | None = None
    high: float | None = None
    low_open: bool = False
    high_open: bool = False
    choices: tuple[str, ...] | None = None
    case: Literal["exact", "insensitive"] = "exact"

    @property
    def requirement(self) -> str:
        """The allowed values in words: "a whole number in [99, 10^6]", "one of 'a', 'b'"."""
        noun = {"integer": "a whole number", "number": "a number", "flag": "true or false",
                "text": "a non-empty text", "names": "a list of column names (or one comma-separated text)",
                "path": "a file path in an existing folder"}[self.type]
        if self.choices is not None:
            noun = "one of " + ", ".join(repr(c) for c in self.choices)
            noun += " (any case)" if self.case == "insensitive" else ""
        if self.low is not None and self.high is not None:
            noun += (f" in {'(' if self.low_open else '['}{_bound(self.low)}, "
                     f"{_bound(self.high)}{')' if self.high_open else ']'}")
        elif self.low is not None:
            noun += f" {'greater than' if self.low_open else 'of at least'} {_bound(self.low)}"
        elif self.high is not None:
            noun += f" {'less than' if self.high_open else 'of at most'} {_bound(self.high)}"
        return noun + (", or left unset" if self.default is None else "")

    def describe(self) -> str:
        """One line of help: "replications: a whole number in [99, 10^6] (default 9999). Bootstrap replicates."."""
        default = "unset" if self.default is None else repr(self.default)
        return f"{self.name}: {self.requirement} (default {default}). {self.help}"

    def check(self, value: Any, backend_id: str) -> Any:
        """The validated value (converted to its stored form), or an OptionError with the shared template."""
        if value is None and self.default is None:
            return None
        out = _CONVERTERS[self.type](self, value)
        if out is _BAD:
            raise self.error(value, backend_id)
        return out

    def error(self, value: Any, backend_id: str) -> OptionError:
        return option_error(self.name, self.requirement, value, backend_id)

    def _in_range(self, x: float) -> bool:
        lo_ok = self.low is None or (x > self.low if self.low_open else x >= self.low)
        hi_ok = self.high is None or (x < self.high if self.high_open else x <= self.high)
        return bool(lo_ok and hi_ok)


_BAD = object()


def _to_integer(opt: Option, v: Any) -> Any:
    if isinstance(v, (bool, np.bool_)) or not isinstance(v, (int, np.integer, float, np.floating)):
        return _BAD
    if not np.isfinite(v) or float(v) != round(float(v)):
        return _BAD
    return int(v) if opt._in_range(float(v)) else _BAD


def _to_number(opt: Option, v: Any) -> Any:
    if isinstance(v, (bool, np.bool_)) or not isinstance(v, (int, np.integer, float, np.floating)):
        return _BAD
    return float(v) if np.isfinite(v) and opt._in_range(float(v)) else _BAD


def _to_flag(opt: Option, v: Any) -> Any:
    return bool(v) if isinstance(v, (bool, np.bool_)) else _BAD


def _to_text(opt: Option, v: Any) -> Any:
    if not isinstance(v, str) or not v.strip():
        return _BAD
    text = v.strip()
    if opt.choices is None:
        return text
    if opt.case == "insensitive":
        found = {c.lower(): c for c in opt.choices}.get(text.lower())
        return _BAD if found is None else found
    return text if text in opt.choices else _BAD


def _to_names(opt: Option, v: Any) -> Any:
    if isinstance(v, str):
        items = [p.strip() for p in v.split(",")]
    elif isinstance(v, (list, tuple)) and all(isinstance(p, str) for p in v):
        items = [p.strip() for p in v]
    else:
        return _BAD
    items = [p for p in items if p]
    return tuple(dict.fromkeys(items)) if items else _BAD


def _to_path(opt: Option, v: Any) -> Any:
    if not isinstance(v, (str, os.PathLike)) or not str(v).strip():
        return _BAD
    return str(v) if Path(v).parent.is_dir() else _BAD


_CONVERTERS = {"integer": _to_integer, "number": _to_number, "flag": _to_flag, "text": _to_text,
               "names": _to_names, "path": _to_path}


def validate_options(backend_id: str, declared: tuple[Option, ...], given: Mapping[str, Any]) -> dict[str, Any]:
    """Every declared option's value (given, else its default), checked; an unknown name is an OptionError
    that lists the valid names and suggests the closest."""
    by_name = {o.name: o for o in declared}
    for name in given:
        if name not in by_name:
            raise unknown_option(backend_id, str(name), [o.name for o in declared])
    return {o.name: o.check(given[o.name], backend_id) if o.name in given else o.default for o in declared}


def unknown_option(backend_id: str, name: str, valid: list[str]) -> OptionError:
    """"The back-end 'wild' has no option 'replicatons'; valid options: …; did you mean 'replications'?"."""
    if not valid:
        return OptionError(f"The back-end '{backend_id}' has no option {name!r}; it takes no options (remove the setting).")
    close = difflib.get_close_matches(name, valid, n=1, cutoff=0.6)
    hint = f"; did you mean {close[0]!r}?" if close else "."
    return OptionError(f"The back-end '{backend_id}' has no option {name!r}; valid options: "
                       f"{', '.join(valid)}{hint}")


class _CostlyFlag:
    """``costly`` read on the class or an instance: True when ``cost == "costly"``."""

    def __get__(self, obj: Any, owner: type) -> bool:
        return getattr(owner, "cost", "cheap") == "costly"


class Backend(ABC):
    """A back-end: declared facts as class attributes, validated options, ``fit(design) -> Fit``.

    Subclasses declare ``id``, ``label``, ``assumes_constant_variance``, ``assumes_independent_rows``,
    ``cost`` and ``options`` (a tuple of :class:`Option`); the calibration reads
    ``calibration_options`` (options forced per simulated dataset), ``calibration_note`` and, when a
    subclass defines it, ``reject_many(design, Y, alpha, *, seed)`` (a batched decision). The
    constructor only validates and stores the options as attributes (scikit-learn style); rules that
    tie several options together, and values derived from them such as the label, go in
    :meth:`finish_options`.
    """

    id: str = ""
    label: str = ""
    assumes_constant_variance: bool = False
    assumes_independent_rows: bool = True
    cost: Cost = "cheap"
    options: tuple[Option, ...] = ()
    calibration_options: Mapping[str, Any] = {}
    calibration_note: str = ""
    costly = _CostlyFlag()
    #: Whether :meth:`fit_stream` fits data read in chunks (the registry entry records the same fact).
    streams: bool = False
    #: Why a back-end that does not stream cannot fit data read in chunks, and the fix.
    stream_reason: str = ("it needs the whole design in memory; read the data into memory instead "
                          "(--no-stream, stream=False) on a machine with enough memory")

    def __init_subclass__(cls, **kwargs: Any) -> None:
        super().__init_subclass__(**kwargs)
        if cls.cost not in COSTS:
            raise TypeError(f"{cls.__name__}.cost must be one of {COSTS}")
        names = [o.name for o in cls.options]
        if len(set(names)) != len(names):
            raise TypeError(f"{cls.__name__} declares an option twice")
        if not set(cls.calibration_options) <= set(names):
            raise TypeError(f"{cls.__name__}.calibration_options names undeclared options")

    def __init__(self, **options: Any) -> None:
        values = validate_options(self.message_id(options), type(self).options, options)
        for name, value in values.items():
            setattr(self, name, value)
        self.finish_options()

    def message_id(self, options: Mapping[str, Any]) -> str:
        """The id that option messages name (the class's ``id``)."""
        return type(self).id

    def finish_options(self) -> None:  # noqa: B027 - an optional hook: a back-end without cross-option rules keeps this no-op
        """Checks across options and derived settings; the default has none."""

    def get_options(self) -> dict[str, Any]:
        """The stored value of every declared option."""
        return {o.name: getattr(self, o.name) for o in type(self).options}

    @abstractmethod
    def fit(self, design: Design, *, seed: int, progress: bool = False) -> Fit | Unavailable:
        """Fit the moderation model on ``design``; an Unavailable says why no answer is possible."""

    def shared_ols_kinds(self) -> tuple[str, ...]:
        """Covariance kinds ('ols', 'hc0' … 'hc5') this back-end takes from the shared OLS passes over
        data read in chunks (they are computed once for every back-end that asks)."""
        return ()

    def fit_stream(self, data: StreamData, *, seed: int, progress: bool = False) -> Fit | Unavailable:
        """Fit on data read in chunks (:class:`robustmod.stream.StreamData`); a back-end with
        ``streams = True`` overrides this. The default says why it cannot, and the fix."""
        return Unavailable(self.id, self.label, f"{self.label} cannot fit data read in chunks: {self.stream_reason}.")

    def __repr__(self) -> str:
        shown = ", ".join(f"{k}={v!r}" for k, v in self.get_options().items())
        return f"{type(self).__name__}({shown})"


class FamilyBackend(Backend):
    """One class that serves several registry ids (hc0 … hc5, cr0 … cr3): the registry fixes the
    ``id`` option, and the label follows it from ``labels``."""

    labels: Mapping[str, str] = {}

    def message_id(self, options: Mapping[str, Any]) -> str:
        given = options.get("id")
        return given.lower() if isinstance(given, str) and given.lower() in self.labels else type(self).id

    def finish_options(self) -> None:
        self.label = self.labels[self.id]


def one_row_table(key: str, title: str, source: str, cells: Sequence[tuple[str, str, str, Any]],
                  notes: Sequence[str] = ()) -> Table:
    """A report table of one row from (machine key, human label, column kind, value) cells;
    a value of None becomes a NotApplicable saying it was not computed."""
    from ..tables import Column, NotApplicable, make_table  # noqa: PLC0415

    columns = [Column(k, lab, kind) for k, lab, kind, _ in cells]  # type: ignore[arg-type]
    row = [NotApplicable("not computed for this fit") if v is None else v for *_, v in cells]
    return make_table(key, title, columns, [row], notes=notes, source=source)
