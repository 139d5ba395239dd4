"""Specification grid: does the moderation finding survive the other reasonable analysis choices?

A grid crosses the choices a reviewer asks about — which optional covariates are adjusted for,
a transformation of the outcome, an outlier rule — and fits every combination with the chosen
back-ends (a specification curve, Simonsohn, Simmons & Nelson 2020; the set of analyses is a
"multiverse" in Steegen et al. 2016). Its inferential test generates data under no moderation
that keep each specification's fitted variance pattern and compares the share of supported
specifications and the median estimate with their null distributions.

The grid is for transparency, not for choosing the significant specification: the primary
specification is fixed before the grid is run.
"""
from __future__ import annotations

import itertools
import time
import warnings
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy import special, stats

from .backends.base import Unavailable
from .backends.registry import check_ids, make_backend
from .defaults import ALPHA, SEED
from .design import Design, build_design
from .errors import InputError, close_matches, option_error
from .spec import ModelSpec

#: Outcome transformations a grid may cross.
OUTCOME_RULES = ("none", "log", "log1p", "inverse-normal")
#: Outlier rules, each computed on the OLS fit of that specification.
OUTLIER_RULES = ("none", "studentized-3", "cooks-4n")
#: More specifications than this are refused (a grid that large is a search, not a check).
MAX_SPECIFICATIONS = 10_000
#: Default number of null resamples of the inferential test (Simonsohn et al. use 500).
NULL_RESAMPLES = 500
#: Back-ends of a grid when the user names none.
GRID_BACKENDS = ("ols", "hc3", "wls")
#: The back-end whose tests make up the inferential test (cheap enough to run per resample).
NULL_TEST_BACKEND = "hc3"

GRID_CAUTIONS = (
    "The grid is for transparency, not for choosing the significant specification: the primary specification "
    "was fixed before the grid was run, and it is the one to report.",
    "Specifications with a transformed outcome estimate the product term on another scale; compare their signs "
    "and support, not their sizes.",
)


# ---- the plan ------------------------------------------------------------------------------
@dataclass(frozen=True)
class Specification:
    """One combination of choices: the optional covariates included, the outcome rule, the outlier rule."""

    index: int
    covariates: tuple[str, ...]
    outcome: str
    outliers: str

    def choices(self) -> dict[str, Any]:
        return {"covariates": list(self.covariates), "outcome": self.outcome, "outliers": self.outliers}


@dataclass(frozen=True)
class GridPlan:
    """The base model, the choices to cross, the back-ends and the primary specification."""

    base: ModelSpec
    optional: tuple[str, ...]
    outcomes: tuple[str, ...]
    outliers: tuple[str, ...]
    backends: tuple[str, ...]
    primary: Specification
    lhs: str
    fixed_terms: tuple[str, ...]
    options: Mapping[str, Mapping[str, Any]] = field(default_factory=dict)

    @property
    def count(self) -> int:
        """2^(optional covariates) × outcome rules × outlier rules."""
        return (2 ** len(self.optional)) * len(self.outcomes) * len(self.outliers)

    def specifications(self) -> list[Specification]:
        subsets = [tuple(c for c, keep in zip(self.optional, mask, strict=False) if keep)
                   for mask in itertools.product((True, False), repeat=len(self.optional))]
        combos = itertools.product(subsets, self.outcomes, self.outliers)
        return [Specification(i, cov, out, rule) for i, (cov, out, rule) in enumerate(combos)]

    def formula(self, s: Specification) -> str:
        return f"{self.lhs} ~ " + " + ".join([*self.fixed_terms, *s.covariates])


def split_terms(formula: str) -> tuple[str, list[str]]:
    """('y', ['x * w', 'age']) for 'y ~ x * w + age': the top-level '+' terms of the right side."""
    lhs, sep, rhs = formula.partition("~")
    if not sep:
        raise InputError(f"The formula {formula!r} needs a '~' between the outcome and the terms.")
    terms, depth, quoted, start = [], 0, False, 0
    for i, ch in enumerate(rhs):
        if ch == "`":
            quoted = not quoted
        elif not quoted and ch == "(":
            depth += 1
        elif not quoted and ch == ")":
            depth -= 1
        elif not quoted and depth == 0 and ch == "+":
            terms.append(rhs[start:i].strip())
            start = i + 1
    terms.append(rhs[start:].strip())
    return lhs.strip(), [t for t in terms if t]


def _rules(value: Any, valid: tuple[str, ...], key: str) -> tuple[str, ...]:
    items = [value] if isinstance(value, str) else list(value)
    out: list[str] = []
    for v in items:
        low = str(v).strip().lower()
        if low not in valid:
            raise InputError(f"The grid's '{key}' choice {v!r} is not known; valid: {', '.join(valid)}."
                             + close_matches(str(v), valid))
        if low not in out:
            out.append(low)
    if not out:
        raise InputError(f"The grid's '{key}' choice is empty; give at least one of {', '.join(valid)}.")
    return tuple(out)


GRID_KEYS = ("covariates", "outcome", "outliers", "backends", "primary", "resamples")


def make_plan(spec: ModelSpec, choices: Mapping[str, Any], *, backends: Sequence[str] | None = None,
              options: Mapping[str, Mapping[str, Any]] | None = None) -> GridPlan:
    """Check the grid's choices against the model and build the plan.

    ``choices`` has the keys of the TOML ``[grid]`` table: ``covariates`` (optional covariates, each
    in or out), ``outcome`` (rules of OUTCOME_RULES), ``outliers`` (rules of OUTLIER_RULES),
    ``backends`` and ``primary`` (a mapping with the same keys as a specification's choices).
    """
    for key in choices:
        if key not in GRID_KEYS:
            raise InputError(f"The grid has no choice {key!r}; valid: {', '.join(GRID_KEYS)}."
                             + close_matches(str(key), GRID_KEYS))
    lhs, terms = split_terms(spec.formula)
    optional = tuple(str(c).strip() for c in choices.get("covariates", ()))
    for c in optional:
        if c not in terms:
            raise InputError(f"The grid covariate {c!r} is not a term of the formula {spec.formula!r}; its terms: "
                             f"{', '.join(terms)}." + close_matches(c, terms))
        if c in (spec.focal, *spec.moderators) or any(v in c for v in (spec.focal, *spec.moderators)):
            raise InputError(f"The grid covariate {c!r} involves the focal predictor or a moderator; only other "
                             "covariates can be left in or out.")
    outcomes = _rules(choices.get("outcome", ("none",)), OUTCOME_RULES, "outcome")
    if outcomes != ("none",) and lhs != spec.response:
        raise InputError(f"Outcome transformations need a plain outcome column; the formula's outcome is {lhs!r}. "
                         "Transform it in the grid instead of the formula.")
    outliers = _rules(choices.get("outliers", ("none",)), OUTLIER_RULES, "outliers")
    ids = tuple(check_ids(list(choices.get("backends") or backends or GRID_BACKENDS)))
    fixed = tuple(t for t in terms if t not in optional)
    prim = dict(choices.get("primary") or {})
    primary = Specification(-1, tuple(prim.get("covariates", optional)), str(prim.get("outcome", "none")).lower(),
                            str(prim.get("outliers", "none")).lower())
    if primary.outcome not in outcomes or primary.outliers not in outliers or set(primary.covariates) - set(optional):
        raise InputError("The grid's primary specification must be one of its specifications (its covariates among "
                         "the optional ones, its outcome and outlier rules among the choices).")
    plan = GridPlan(spec, optional, outcomes, outliers, ids, primary, lhs, fixed, dict(options or {}))
    if plan.count > MAX_SPECIFICATIONS:
        raise InputError(f"The grid has {plan.count:,} specifications; at most {MAX_SPECIFICATIONS:,} are allowed. "
                         "Cross fewer optional covariates (each doubles the count) or fewer rules.")
    return plan


# ---- one specification -----------------------------------------------------------------------
def transform_outcome(y: np.ndarray, rule: str, name: str) -> np.ndarray:
    """none; log (y > 0); log1p (y > −1); inverse-normal: Φ⁻¹((r − 3/8)/(n + 1/4)), r the average rank (Blom 1958).

    ``y`` is one outcome (n) or several (n × R, each column transformed on its own).
    """
    if rule == "none":
        return y
    if rule == "log":
        bad = int(np.sum(y <= 0))
        if bad:
            raise InputError(f"The outcome rule 'log' needs {name} > 0, but {bad} of {y.size} rows are 0 or below; "
                             "use 'log1p' or leave 'log' out of the grid.")
        return np.log(y)
    if rule == "log1p":
        bad = int(np.sum(y <= -1))
        if bad:
            raise InputError(f"The outcome rule 'log1p' needs {name} > −1, but {bad} of {y.size} rows are −1 or below.")
        return np.log1p(y)
    return blom_scores(y)


def blom_scores(y: np.ndarray) -> np.ndarray:
    """Φ⁻¹((r − 3/8)/(n + 1/4)) with r the average rank of each value down axis 0 (Blom 1958).

    One sort per column (ties share their average rank, so their order in the sort does not
    matter), the scores looked up in a table of the 2n − 1 possible ranks 1, 1.5, …, n: R null
    outcomes cost about one sort of n × R values.
    """
    Y = np.ascontiguousarray(y.reshape(y.shape[0], -1).T)  # one row per column of y: sorts along rows
    n = Y.shape[1]
    order = np.argsort(Y, axis=1)
    srt = np.take_along_axis(Y, order, axis=1)
    idx = np.broadcast_to(np.arange(n), Y.shape)
    starts = np.ones(Y.shape, dtype=bool)  # where a run of equal values begins
    starts[:, 1:] = srt[:, 1:] != srt[:, :-1]
    if starts.all():  # no ties: the rank is the place in the sort
        twice = 2 * idx
    else:  # 0-based first + last place of the run = 2r − 2 for the run's average rank r
        ends = np.ones(Y.shape, dtype=bool)
        ends[:, :-1] = starts[:, 1:]
        first = np.maximum.accumulate(np.where(starts, idx, 0), axis=1)
        last = np.minimum.accumulate(np.where(ends, idx, n - 1)[:, ::-1], axis=1)[:, ::-1]
        twice = first + last
    table = special.ndtri((np.arange(2, 2 * n + 1) / 2 - 0.375) / (n + 0.25))
    out = np.empty(Y.shape)
    np.put_along_axis(out, order, table[twice], axis=1)
    return out.T.reshape(y.shape)


def _ols_parts(design: Design) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Residuals, leverages and the coefficient-extraction rows A = R⁻¹Qᵀ (k × n) from the shared QR."""
    from scipy import linalg  # noqa: PLC0415

    Q, R = design.qr
    e = design.y - Q @ (Q.T @ design.y)
    h = np.einsum("ij,ij->i", Q, Q)
    A = linalg.solve_triangular(R, Q.T, check_finite=False)
    return e, h, A


def outlier_mask(design: Design, rule: str) -> np.ndarray:
    """Rows flagged on the OLS fit: |externally studentized residual| > 3, or Cook's distance > 4/n
    (the formulas are those of :func:`flag_rows`)."""
    if rule == "none":
        return np.zeros(design.n_obs, dtype=bool)
    e, h, _ = _ols_parts(design)
    return flag_rows(e[:, None], h, design.n_params, rule)[:, 0]


def flag_rows(E: np.ndarray, h: np.ndarray, k: int, rule: str) -> np.ndarray:
    """Outlier flags (n × R) for R outcomes fitted by OLS on one n × k model matrix: residuals E, leverages h.

    t_i = e_i / (s_(i) √(1 − h_i)), s_(i)² = ((n − k)s² − e_i²/(1 − h_i)) / (n − k − 1);
    D_i = e_i² h_i / (k s² (1 − h_i)²) (Cook 1977; Belsley, Kuh & Welsch 1980).
    The observed data and every null dataset are flagged by this one function.
    """
    n = E.shape[0]
    if rule == "none":
        return np.zeros(E.shape, dtype=bool)
    e2 = E**2
    s2 = e2.sum(axis=0) / (n - k)
    one_minus_h = np.maximum(1.0 - h, 1e-15)[:, None]
    if rule == "studentized-3":
        s2_i = np.maximum(((n - k) * s2 - e2 / one_minus_h) / (n - k - 1), 1e-300)
        return np.abs(E) / np.sqrt(s2_i * one_minus_h) > 3.0
    with np.errstate(divide="ignore", invalid="ignore"):
        return (e2 * h[:, None] / (k * s2 * one_minus_h**2)) > 4.0 / n


def _design_for(frame: pd.DataFrame, plan: GridPlan, s: Specification, base: Design) -> tuple[Design, Design]:
    """The specification's design (outcome transformed, outliers removed) and its design before the
    outlier rule (outcome transformed, every row).

    ``base`` is the design of the same covariates with no outcome or outlier rule: the rules only
    change y (same X, same QR) or drop rows (a new design on the kept rows).
    """
    design = base
    if s.outcome != "none":
        design = replace(base, y=transform_outcome(base.y, s.outcome, plan.base.response))  # same X, same QR
    before = design
    flagged = outlier_mask(design, s.outliers)
    if flagged.any():
        sub = frame.iloc[design.data.frame.index.to_numpy()[~flagged]].copy()
        if s.outcome != "none":
            sub[plan.base.response] = design.y[~flagged]
        design = build_design(sub, base.spec)
    return design, before


def _linear(design: Design, cache: dict[int, tuple[np.ndarray, Any]]) -> tuple[Any]:
    """``(design.slope_is_linear_in(first continuous moderator),)``, computed once per model matrix:
    the back-ends of a specification, and its outcome rules, share one X (kept in the cache, so that
    an id is never reused while its entry lives)."""
    hit = cache.get(id(design.X))
    if hit is None or hit[0] is not design.X:
        conts = design.continuous_moderators
        hit = (design.X, design.slope_is_linear_in(conts[0], {}) if conts else None)
        cache[id(design.X)] = hit
    return (hit[1],)


def _answer(design: Design, bid: str, options: Mapping[str, Any], seed: int, alpha: float,
            linear: tuple[Any]) -> dict[str, Any]:
    from . import effects  # noqa: PLC0415

    fit = make_backend(bid, **dict(options)).fit(design, seed=seed, progress=False)
    if isinstance(fit, Unavailable):
        return {"estimate": None, "se": None, "ci": None, "p": None, "supported": None, "boundaries": [],
                "reason": fit.reason}
    it = effects.interaction(fit, design, alpha)
    reg = effects.significance_region(fit, design, alpha, linear=linear)
    inside: list[float] = []
    if reg is not None:
        lo, hi = reg["observed_range"]
        inside = [b for b in reg["boundaries"] if b is not None and lo <= b <= hi]
    return {"estimate": it.get("estimate"), "se": it.get("se"), "ci": it.get("ci"), "p": it.get("p"),
            "supported": bool(it["supported"]) if fit.reliable else None, "boundaries": inside,
            "reason": None if fit.reliable else "failed its own diagnostics"}


def null_outcomes(design: Design, v: np.ndarray, outcome: str) -> tuple[np.ndarray, np.ndarray]:
    """R null outcomes Y* (n × R) of one specification before its outlier rule, and their OLS residuals.

    y* = μ̂₀ + ê/(1 − h) ⊙ v: μ̂₀ is the fit without the product term(s) and ê the full model's
    residuals (the specification's variance pattern, a wild null with Rademacher signs v, n × R).
    Dividing by 1 − hᵢ makes the null spread of each estimate, Σ aᵢ² êᵢ²/(1 − hᵢ)², its HC3 variance;
    raw residuals are shrunk towards zero and made the null too narrow (validation/grid_null.py).
    ``design`` carries the transformed outcome; log and log1p are undone and redone exactly, so y* is
    their outcome, but the inverse-normal rule is ranks, so y* is ranked again as the observed outcome was.
    """
    from scipy import linalg  # noqa: PLC0415

    keep = [j for j in range(design.X.shape[1]) if j not in design.interaction_columns]
    X0 = design.X[:, keep]
    mu0 = X0 @ linalg.lstsq(X0, design.y, check_finite=False)[0]
    e, h, _ = _ols_parts(design)
    Ystar = mu0[:, None] + (e / np.maximum(1.0 - h, 1e-15))[:, None] * v
    if outcome == "inverse-normal":
        # Rows with equal covariates and outcome give equal y* up to rounding (~1e-14 on this unit scale);
        # rounding first keeps them tied, as the observed outcome's ranks tie them.
        Ystar = transform_outcome(np.round(Ystar, 10), outcome, "")
    Q, _ = design.qr
    return Ystar, Ystar - Q @ (Q.T @ Ystar)


def hc3_product(design: Design, Ystar: np.ndarray, Estar: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """HC3 estimate, SE and residual df of the product term for R outcomes on every row of ``design``."""
    e, h, A = _ols_parts(design)
    a = A[design.interaction_columns[0]]
    n, k = design.X.shape
    se = np.sqrt(((a / np.maximum(1.0 - h, 1e-15)) ** 2) @ (Estar**2))
    return a @ Ystar, se, np.full(Ystar.shape[1], float(n - k))


#: Null outcomes per block of the weighted fits (bounds the R × k × k and n × block temporaries).
NULL_BLOCK = 128
#: Smallest Cholesky pivot of Qᵀ W Q for a kept-row design counted as full rank.
RANK_TOL = 1e-8


def hc3_product_kept(design: Design, Ystar: np.ndarray, kept: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """HC3 estimate, SE and residual df of the product term for R outcomes, each on its own kept rows.

    ``kept`` (n × R, 0/1) are row weights W_r. In the basis of the thin QR X = QR the fit on the kept
    rows is G_r = Qᵀ W_r Q = L_r L_rᵀ (Cholesky; G_r is the identity less the dropped rows' qᵢqᵢᵀ, so it
    is well conditioned, and no inverse of XᵀWX is formed), S_r = L_r⁻ᵀ L_r⁻¹ (triangular solves),
    γ_r = S_r Qᵀ W_r y_r, leverages h_ri = q_iᵀ S_r q_i, coefficient rows a_r = W_r Q S_r R⁻ᵀ e_c and
    the HC3 variance Σᵢ w_ri a_ri² e_ri² / (1 − h_ri)² (MacKinnon & White 1985) with e_r = y_r − Q γ_r.
    A resample whose kept rows leave the design rank-deficient gets NaN (it is not used).
    """
    from scipy import linalg  # noqa: PLC0415

    Q, Rfac = design.qr
    n, k = Q.shape
    QQ = (Q[:, :, None] * Q[:, None, :]).reshape(n, k * k)
    unit = np.zeros(k)
    unit[design.interaction_columns[0]] = 1.0
    g = linalg.solve_triangular(Rfac, unit, trans="T", check_finite=False)  # R⁻ᵀ e_c
    R_all = Ystar.shape[1]
    est, se, df = np.full(R_all, np.nan), np.full(R_all, np.nan), np.full(R_all, np.nan)
    eye = np.eye(k)
    for start in range(0, R_all, NULL_BLOCK):
        cols = slice(start, start + NULL_BLOCK)
        W = kept[:, cols].astype(float)
        Y = Ystar[:, cols]
        m = W.shape[1]
        G = (QQ.T @ W).T.reshape(m, k, k)
        ok = np.ones(m, dtype=bool)
        L = np.empty_like(G)
        try:
            L[:] = np.linalg.cholesky(G)
        except np.linalg.LinAlgError:  # a rank-deficient resample fails the batch: factor one by one
            for r in range(m):
                try:
                    L[r] = np.linalg.cholesky(G[r])
                except np.linalg.LinAlgError:
                    ok[r], L[r] = False, eye
        # The kept rows' Q has singular values in [0, 1]; one near 0 is a direction of X the kept rows lost
        # (e.g. a dummy whose 1s were all dropped), which rounding can let through the factorisation.
        ok &= np.diagonal(L, axis1=1, axis2=2).min(axis=1) > RANK_TOL
        L[~ok] = eye
        Linv = lower_inverses(L)
        S = np.einsum("rjk,rjl->rkl", Linv, Linv)  # L⁻ᵀ L⁻¹
        h = QQ @ S.reshape(m, k * k).T  # n × m
        gamma = np.einsum("rkl,lr->rk", S, Q.T @ (W * Y))
        E = Y - Q @ gamma.T
        a = W * (Q @ np.einsum("rkl,l->kr", S, g))
        est[cols] = np.sum(a * Y, axis=0)
        se[cols] = np.sqrt(np.sum((a * E / np.maximum(1.0 - h, 1e-15)) ** 2, axis=0))
        df[cols] = W.sum(axis=0) - k
        bad = ~ok | (df[cols] < 1)
        est[cols][bad] = np.nan
        se[cols][bad] = np.nan
    return est, se, df


def lower_inverses(L: np.ndarray) -> np.ndarray:
    """L_r⁻¹ for a stack of lower-triangular L_r (m × k × k): ``scipy.linalg.solve_triangular(L, I,
    lower=True)`` matrix by matrix (the same digits, laid out as it lays them out), without its
    validation of every matrix of the stack, which costs more than the solve at k ≈ 10."""
    from .backends.kernels import solve_triangular_2d  # noqa: PLC0415

    m, k, _ = L.shape
    eye = np.eye(k)
    out = np.empty((m, k, k))  # out[r] holds X_rᵀ: solve_triangular stacks Fortran-ordered solutions
    for r in range(m):
        out[r] = solve_triangular_2d(L[r], eye, lower=True).T
    return out.transpose(0, 2, 1)


def _null_draws(base: Design, outcome: str, rule: str, v: np.ndarray, alpha: float,
                cache: dict[str, tuple[np.ndarray, np.ndarray]]) -> tuple[np.ndarray, np.ndarray]:
    """HC3 estimates and rejections of the product term in R null datasets of one specification.

    ``base`` is the specification before its outlier rule (its outcome transformed, every row); the
    null outcomes (:func:`null_outcomes`) are drawn once per outcome rule and shared by the outlier
    rules, and each outlier rule is applied anew in every null dataset (:func:`flag_rows` on the OLS
    fit of that dataset), as it was on the observed data.
    """
    if outcome not in cache:
        cache[outcome] = null_outcomes(base, v, outcome)
    Ystar, Estar = cache[outcome]
    if rule == "none":
        est, se, df = hc3_product(base, Ystar, Estar)
    else:
        _, h, _ = _ols_parts(base)
        est, se, df = hc3_product_kept(base, Ystar, ~flag_rows(Estar, h, base.n_params, rule))
    with np.errstate(divide="ignore", invalid="ignore"):
        p = 2 * stats.t.sf(np.abs(est / se), df)
    return est, p < alpha


def _run_one(state: dict[str, Any], s: Specification, base: Design | InputError, seed: int,
             v: np.ndarray | None, cache: dict[int, tuple[np.ndarray, Any]],
             nulls: dict[str, tuple[np.ndarray, np.ndarray]]) -> dict[str, Any]:
    plan: GridPlan = state["plan"]
    out: dict[str, Any] = {"index": s.index, "choices": s.choices()}
    try:
        if isinstance(base, InputError):
            raise base
        design, before = _design_for(state["frame"], plan, s, base)
    except InputError as exc:
        out.update(rows_used=0, reason=str(exc), backends={b: None for b in plan.backends})
        return out
    seeds = np.random.SeedSequence(seed).generate_state(len(plan.backends))
    out["rows_used"] = design.n_obs
    linear = _linear(design, cache)
    out["backends"] = {b: _answer(design, b, plan.options.get(b, {}), int(sd), plan.base.alpha, linear)
                       for b, sd in zip(plan.backends, seeds, strict=False)}
    if len(design.interaction_columns) == 1 and v is not None:
        signs = v[before.data.frame.index.to_numpy()]  # one sign per source row
        est, rej = _null_draws(before, s.outcome, s.outliers, signs, plan.base.alpha, nulls)
        out["null"] = {"estimate": est, "rejected": rej}
    return out


def run_group(state: dict[str, Any], covariates: tuple[str, ...], members: tuple[int, ...],
              seeds: tuple[int, ...]) -> list[dict[str, Any]]:
    """The specifications that share one set of covariates (one model matrix): an engine task.

    Runs on one BLAS thread: its matrices are small (n × k), where a second thread costs more in
    synchronisation than it gains, and the engine already fills the cores with tasks.
    """
    with _one_blas_thread():
        return _run_group(state, covariates, members, seeds)


@contextmanager
def _one_blas_thread() -> Iterator[None]:
    try:
        from threadpoolctl import threadpool_limits  # noqa: PLC0415
    except ImportError:  # pragma: no cover
        yield
        return
    with threadpool_limits(1):
        yield


def _run_group(state: dict[str, Any], covariates: tuple[str, ...], members: tuple[int, ...],
               seeds: tuple[int, ...]) -> list[dict[str, Any]]:
    plan: GridPlan = state["plan"]
    base: Design | InputError
    try:
        base = build_design(state["frame"], replace(plan.base, formula=plan.formula(state["specs"][members[0]])))
    except InputError as exc:
        base = exc
    v = None
    if state["resamples"]:  # the same null signs for every specification: one draw per source row
        v = null_signs(state["null_seed"], state["n_source"], state["resamples"])
    cache: dict[int, tuple[np.ndarray, Any]] = {}
    nulls: dict[str, tuple[np.ndarray, np.ndarray]] = {}  # null outcomes per outcome rule, shared by the outlier rules
    return [_run_one(state, state["specs"][i], base, sd, v, cache, nulls)
            for i, sd in zip(members, seeds, strict=False)]


#: The null signs of the last grid this process worked on: (seed, rows, resamples) → signs (read-only).
_SIGNS: dict[tuple[int, int, int], np.ndarray] = {}


def null_signs(seed: int, n: int, resamples: int) -> np.ndarray:
    """Rademacher signs (n × resamples) of the null datasets, drawn once per process and grid (every
    group of the grid uses the same signs; a worker runs many groups)."""
    key = (int(seed), int(n), int(resamples))
    v = _SIGNS.get(key)
    if v is None:
        rng = np.random.default_rng(seed)
        v = rng.choice(np.array([-1.0, 1.0]), size=(n, resamples))
        v.setflags(write=False)
        _SIGNS.clear()  # only the current grid's signs are kept
        _SIGNS[key] = v
    return v


# ---- summaries ---------------------------------------------------------------------------
def _share(values: list[bool]) -> float | None:
    return float(np.mean(values)) if values else None


def _by_choice(plan: GridPlan, specs: list[dict[str, Any]], bid: str) -> list[dict[str, Any]]:
    """Share supported with each choice on against off (covariate in vs out; rule vs the others)."""
    rows = []
    keyed = [("covariate", c) for c in plan.optional]
    keyed += [("outcome", r) for r in plan.outcomes if len(plan.outcomes) > 1]
    keyed += [("outliers", r) for r in plan.outliers if len(plan.outliers) > 1]
    for kind, value in keyed:
        sup_on = [bool(sp["backends"][bid]["supported"]) for sp in specs if _usable(sp, bid) and _choice_on(sp, kind, value)]
        sup_off = [bool(sp["backends"][bid]["supported"]) for sp in specs if _usable(sp, bid) and not _choice_on(sp, kind, value)]
        rows.append({"choice": kind, "value": value, "share_supported_on": _share(sup_on),
                     "share_supported_off": _share(sup_off), "n_on": len(sup_on), "n_off": len(sup_off)})
    return rows


def _choice_on(sp: dict[str, Any], kind: str, value: str) -> bool:
    """Whether specification ``sp`` made this choice: the covariate is in, or the outcome/outlier rule is this one."""
    if kind == "covariate":
        return value in sp["choices"]["covariates"]
    return bool(sp["choices"][kind] == value)


def _usable(sp: dict[str, Any], bid: str) -> bool:
    r = (sp.get("backends") or {}).get(bid)
    if not r:
        return False
    return r.get("supported") is not None


def _backend_summary(plan: GridPlan, specs: list[dict[str, Any]], bid: str) -> dict[str, Any]:
    use = [sp for sp in specs if _usable(sp, bid)]
    ests = [sp["backends"][bid]["estimate"] for sp in use if sp["backends"][bid]["estimate"] is not None]
    bounds = [b for sp in use for b in sp["backends"][bid]["boundaries"]]
    return {"n_specifications": len(use), "n_unavailable": len(specs) - len(use),
            "share_supported": _share([bool(sp["backends"][bid]["supported"]) for sp in use]),
            "estimate_range": [min(ests), max(ests)] if ests else None,
            "boundary_range_within_observed": [min(bounds), max(bounds)] if bounds else None,
            "by_choice": _by_choice(plan, specs, bid)}


def inferential_test(specs: list[dict[str, Any]], alpha: float) -> dict[str, Any] | None:
    """Simonsohn, Simmons & Nelson (2020): the share of specifications supported in the dominant direction
    and the median estimate, against their distributions over null datasets.

    The dominant direction is the sign of the median estimate, found anew in every null dataset so that
    observed and null statistics are chosen alike; p = (1 + #{null ≥ observed}) / (1 + R), ties counted,
    the median compared in absolute value (two-sided). A null dataset in which no specification could be
    fitted (an outlier rule leaving a rank-deficient design everywhere) counts as at least as extreme.
    """
    have = [sp for sp in specs if "null" in sp and _usable(sp, NULL_TEST_BACKEND)]
    if not have:
        return None
    obs_est = np.array([sp["backends"][NULL_TEST_BACKEND]["estimate"] for sp in have], dtype=float)
    obs_sup = np.array([bool(sp["backends"][NULL_TEST_BACKEND]["supported"]) for sp in have])
    med_obs = float(np.median(obs_est))
    sign = 1.0 if med_obs >= 0 else -1.0
    share_obs = float(np.mean(obs_sup & (np.sign(obs_est) == sign)))
    null_est = np.vstack([sp["null"]["estimate"] for sp in have])  # specs × R
    null_rej = np.vstack([sp["null"]["rejected"] for sp in have])
    with warnings.catch_warnings():  # a null dataset where every specification failed has no median
        warnings.simplefilter("ignore", RuntimeWarning)
        med_null = np.nanmedian(null_est, axis=0)
    null_sign = np.where(med_null >= 0, 1.0, -1.0)
    share_null = np.mean(null_rej & (np.sign(null_est) == null_sign), axis=0)
    R = null_est.shape[1]
    return {
        "backend": NULL_TEST_BACKEND, "resamples": int(R), "n_specifications": len(have),
        "direction": "positive" if sign > 0 else "negative",
        "share_supported": share_obs, "share_supported_null_median": float(np.median(share_null)),
        "share_supported_p": float((1 + np.sum(share_null >= share_obs)) / (1 + R)),
        "median_estimate": med_obs, "median_estimate_null_median": float(np.median(med_null)),
        "median_estimate_p": float((1 + np.sum(~(np.abs(med_null) < abs(med_obs)))) / (1 + R)),
        "alpha": alpha,
        "method": ("null datasets y* = fit without the product term + residual / (1 − leverage) × Rademacher sign "
                   "per row, the same signs for every specification, drawn on every row before the outlier rule, "
                   "which is applied anew in each null dataset (inverse-normal outcomes ranked anew); HC3 test per "
                   "specification"),
    }


# ---- the entry point ---------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class GridResult:
    plan: GridPlan
    specifications: list[dict[str, Any]]
    summary: dict[str, Any]
    test: dict[str, Any] | None
    seconds_estimate: float | None

    def primary_index(self) -> int | None:
        p = self.plan.primary
        for sp in self.specifications:
            c = sp["choices"]
            if set(c["covariates"]) == set(p.covariates) and c["outcome"] == p.outcome and c["outliers"] == p.outliers:
                return int(sp["index"])
        return None

    def to_dict(self) -> dict[str, Any]:
        from .jsonvalues import jsonable  # noqa: PLC0415

        specs = [{k: v for k, v in sp.items() if k != "null"} for sp in self.specifications]
        return jsonable({
            "n_specifications": len(specs), "backends": list(self.plan.backends),
            "choices": {"covariates": list(self.plan.optional), "outcome": list(self.plan.outcomes),
                        "outliers": list(self.plan.outliers)},
            "primary": {**self.plan.primary.choices(), "index": self.primary_index()},
            "specifications": specs, "summary": self.summary, "inferential_test": self.test,
            "cautions": list(GRID_CAUTIONS),
        })


def grid(data: pd.DataFrame | str | Path, formula: str, focal: str, moderator: str | Sequence[str],
         choices: Mapping[str, Any], *, backends: Sequence[str] | None = None,
         options: Mapping[str, Mapping[str, Any]] | None = None, engine: Any = None, resamples: int | None = None,
         probe: Any = None, alpha: float = ALPHA, seed: int = SEED, center: bool = False,
         na_values: Any = None, on_progress: Callable[[int, int], None] | None = None,
         announce: Callable[[str], None] | None = None) -> GridResult:
    """The specification grid of one moderation model (``robustmod.grid``).

    Parameters
    ----------
    data : DataFrame or path
        The data (read as :func:`robustmod.compare` reads them); never modified.
    formula, focal, moderator : str
        The primary model: its formula, focal predictor and moderator(s), as for ``compare``.
    choices : mapping
        The grid, with the keys of the TOML ``[grid]`` table: ``covariates`` (terms of the formula
        each left in or out), ``outcome``, ``outliers``, ``backends``, ``primary``, ``resamples``.
    backends : list of str, optional
        Back-end ids (default: ``choices["backends"]``, else ols, hc3, wls).
    engine : robustmod.engines.Engine, optional
        Where the groups of specifications run (default: local processes on the available cores).
    resamples : int, optional
        Null datasets of the inferential test (0: no test; default ``choices["resamples"]``, else 500).
    on_progress, announce : callable, optional
        ``on_progress(done, total)`` as groups finish; ``announce(line)`` with the count and the
        projected time after the first group.

    Returns
    -------
    GridResult
        ``to_dict()`` is the ``grid`` key of results.json.

    Examples
    --------
    >>> from robustmod.demo import demo_data
    >>> g = grid(demo_data(300), "grain_yield ~ fertiliser * soil_moisture + field_slope", "fertiliser",
    ...          "soil_moisture", {"covariates": ["field_slope"], "outliers": ["none", "cooks-4n"]}, resamples=0)
    >>> len(g.specifications)
    4
    """
    from .data import load_data  # noqa: PLC0415

    frame, _ = load_data(data, na_values=na_values)
    mods = (moderator,) if isinstance(moderator, str) else tuple(moderator)
    spec = ModelSpec(formula=formula, focal=focal, moderators=mods, probe=probe if probe is not None else {},
                     alpha=alpha, seed=seed, center=center)
    return run_grid(frame, spec, choices, backends=backends, options=options, engine=engine, resamples=resamples,
                    on_progress=on_progress, announce=announce)


def run_grid(data: pd.DataFrame, spec: ModelSpec, choices: Mapping[str, Any], *,
             backends: Sequence[str] | None = None, options: Mapping[str, Mapping[str, Any]] | None = None,
             engine: Any = None, resamples: int | None = None, on_progress: Callable[[int, int], None] | None = None,
             announce: Callable[[str], None] | None = None) -> GridResult:
    """Fit every specification of the grid; summarise support per back-end and run the inferential test.

    ``engine`` is a robustmod.engines Engine (default: local, this process's cores). The first
    specification is timed in this process and the projected time of the rest is announced.
    """
    plan = make_plan(spec, choices, backends=backends, options=options)
    R = int(choices.get("resamples", NULL_RESAMPLES) if resamples is None else resamples)
    if isinstance(R, bool) or R < 0 or (0 < R < 100) or R > 100_000:
        raise option_error("resamples", "0 (no inferential test) or a whole number in [100, 100000]", R)
    specs = plan.specifications()
    seeds = np.random.SeedSequence(spec.seed).generate_state(len(specs) + 1)
    state = {"plan": plan, "specs": specs, "frame": data, "resamples": R, "null_seed": int(seeds[-1]),
             "n_source": len(data)}
    groups: dict[tuple[str, ...], list[int]] = {}
    for s in specs:
        groups.setdefault(s.covariates, []).append(s.index)
    tasks = [(cov, tuple(m), tuple(int(seeds[i]) for i in m)) for cov, m in groups.items()]
    t0 = time.perf_counter()
    first = run_group(state, *tasks[0])
    one = time.perf_counter() - t0
    if engine is None:
        from .engines import make_engine  # noqa: PLC0415

        engine = make_engine("local")
    workers = max(1, engine.workers)
    estimate = one * (len(tasks) - 1) / workers
    if announce is not None:
        announce(f"{len(specs):,} specifications × {len(plan.backends)} back-end(s) in {len(tasks)} group(s) of "
                 f"shared covariates; the first group took {one:.2f} s, so the rest should take about "
                 f"{_duration(estimate)} on {workers} worker(s).")
    done = [len(first)]

    def tick(i: int) -> None:
        done[0] += len(tasks[1 + i][1])
        if on_progress is not None:
            on_progress(done[0], len(specs))

    rest = engine.map(run_group, tasks[1:], state, on_done=tick)
    results = sorted([r for part in (first, *rest) for r in part], key=lambda r: r["index"])
    summary = {b: _backend_summary(plan, results, b) for b in plan.backends}
    test = inferential_test(results, spec.alpha) if R else None
    return GridResult(plan, results, summary, test, estimate)


def _duration(seconds: float) -> str:
    if seconds < 90:
        return f"{seconds:.0f} s"
    return f"{seconds / 60:.1f} min" if seconds < 5400 else f"{seconds / 3600:.1f} h"


__all__ = ["GRID_CAUTIONS", "blom_scores", "GridPlan", "GridResult", "OUTCOME_RULES", "OUTLIER_RULES", "Specification", "grid",
           "inferential_test", "make_plan", "run_grid"]
