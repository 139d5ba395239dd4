"""The common interface of every back-end: a Backend fits a Design and returns a Fit.

Every Fit answers one question — the distribution of L·β for rows L of the mean-model
coefficients — in one of three ways (see DESIGN.md):

* :class:`WaldFit`      L·β̂, sqrt(L V Lᵀ), t with the fit's df (OLS, HC0–HC5, WLS);
* bootstrap fits        subclass :class:`Fit` and answer with bootstrap-t quantiles;
* :class:`PosteriorFit` draws of L·β from the posterior.

Effects, regions and the comparison only call :meth:`Fit.estimate`,
:meth:`Fit.joint_test`, :meth:`Fit.test_coefficients` and :meth:`Fit.margin`, so a new back-end needs nothing else.
"""
from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Protocol

import numpy as np
from scipy import linalg, stats

from .kernels import wald_test

if TYPE_CHECKING:  # pragma: no cover
    from ..design import Design
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

    def report_tables(self) -> tuple["Table", ...]:
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


class WaldFit(Fit):
    """L·β̂ with SE sqrt(L V Lᵀ); t reference with ``df`` (normal when df is None)."""

    kind = "wald"

    def __init__(self, backend_id: str, label: str, term_names: tuple[str, ...], params: np.ndarray,
                 cov: np.ndarray, df: float | None, **kwargs: Any) -> None:
        super().__init__(backend_id, label, term_names, params, **kwargs)
        self.cov = np.asarray(cov, dtype=float)
        self.cov.setflags(write=False)
        self.df = df

    def _dist(self) -> Any:
        return stats.norm if self.df is None else stats.t(self.df)

    def critical_value(self, alpha: float, rank: int = 1) -> float:
        """t_{1−α/2, df} pointwise; Scheffé sqrt(r·F_{r, df; 1−α}) for a band of rank r (Potthoff 1964)."""
        if rank <= 1:
            return float(self._dist().ppf(1 - alpha / 2))
        if self.df is None:
            return float(np.sqrt(stats.chi2.ppf(1 - alpha, rank)))
        return float(np.sqrt(rank * stats.f.ppf(1 - alpha, rank, self.df)))

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


class Backend(Protocol):
    """What the registry hands out: ``fit(design)`` returns a Fit or an Unavailable."""

    id: str
    label: str

    def fit(self, design: "Design", *, seed: int, progress: bool = False) -> Fit | Unavailable:  # pragma: no cover
        ...
