"""The Design: validated y and X, term names, the rows used, and a builder of L rows.

A conditional effect of the focal predictor is built from the design itself (docs/methods.md):
L = row of the model matrix at (focal + 1, moderators, covariates at reference) minus the
row at (focal, moderators, covariates at reference). When the focal predictor enters
non-linearly (log(x), I(x**2)) the difference depends on where it is taken, and L is the
central-difference derivative at the focal mean instead. Transforms, centring,
three-way terms and categorical moderators need no special cases.
"""
from __future__ import annotations

import dataclasses
import itertools
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np
import pandas as pd
from formulaic import model_matrix

from .clusters import attach_clusters, moderator_levels
from .data import PreparedData, prepare_data
from .errors import InputError, close_matches
from .lanes import run_parts
from .spec import ModelSpec, parse_probe_rule
from .thin_qr import ThinQR, factor

#: Functions the formula may call, as formulaic evaluates them (C, I, center, scale are formulaic's own).
FORMULA_CONTEXT: dict[str, Any] = {
    "log": np.log, "log1p": np.log1p, "log2": np.log2, "log10": np.log10,
    "exp": np.exp, "sqrt": np.sqrt, "abs": np.abs,
}
#: |R_jj| / ‖X_j‖ below this marks column j as a linear combination of earlier ones.
ALIAS_TOL = 1e-11


@dataclass(frozen=True)
class ModeratorInfo:
    """What the design knows of one moderator, on the user's raw scale."""

    name: str
    categorical: bool
    levels: tuple[Any, ...] = ()
    mean: float | None = None
    sd: float | None = None
    minimum: float | None = None
    maximum: float | None = None
    values: np.ndarray | None = field(default=None, repr=False)  # observed raw values (continuous)

    @cached_property
    def sorted_values(self) -> np.ndarray:
        """The observed raw values in ascending order, sorted once and shared by every order statistic
        of the moderator (quantile bins, Goldfeld–Quandt cuts, bin medians)."""
        if self.values is None:
            raise TypeError(f"The moderator {self.name!r} is categorical; it has no sorted values.")
        out = np.sort(self.values)
        out.setflags(write=False)
        return out

    def observed_range(self) -> tuple[float, float]:
        """(minimum, maximum) of a continuous moderator's observed raw values."""
        if self.minimum is None or self.maximum is None:
            raise TypeError(f"The moderator {self.name!r} is categorical; it has no observed range.")
        return self.minimum, self.maximum


@dataclass(frozen=True, eq=False)
class Design:
    """Validated model matrices and the metadata every back-end and effect needs."""

    spec: ModelSpec
    y: np.ndarray
    X: np.ndarray
    term_names: tuple[str, ...]
    interaction_columns: tuple[int, ...]
    moderators: dict[str, ModeratorInfo]
    probe_points: tuple[dict[str, Any], ...]
    reference: dict[str, Any]
    centering: dict[str, float]
    data: PreparedData
    focal_linear: bool
    focal_mean: float
    warnings: tuple[str, ...]
    qr: ThinQR = field(repr=False)  # thin QR of X, shared by the back-ends (a pair (Q, R) is wrapped)
    _model_spec: Any = field(repr=False)
    _frame: pd.DataFrame = field(repr=False)  # the model-scale frame the matrices came from
    clusters: np.ndarray | None = field(default=None, repr=False)  # codes 0 … G − 1 per used row, or None
    cluster_name: str | None = None
    #: Each model-matrix column as the product of the data columns named (the intercept an empty
    #: product), when the formula has only such terms (:func:`_direct_model_matrices`); else None.
    _products: tuple[tuple[str, ...], ...] | None = field(default=None, repr=False)

    def __post_init__(self) -> None:
        if not isinstance(self.qr, ThinQR):  # a pair (Q, R) of arrays
            Q, R = self.qr
            object.__setattr__(self, "qr", ThinQR(R, Q=Q))

    # ---- basic facts -------------------------------------------------------------
    @property
    def n_obs(self) -> int:
        return int(self.X.shape[0])

    @property
    def n_params(self) -> int:
        return int(self.X.shape[1])

    @property
    def focal(self) -> str:
        return self.spec.focal

    @property
    def interaction_terms(self) -> tuple[str, ...]:
        return tuple(self.term_names[j] for j in self.interaction_columns)

    @property
    def continuous_moderators(self) -> tuple[str, ...]:
        return tuple(m for m, info in self.moderators.items() if not info.categorical)

    @cached_property
    def probe_rows(self) -> np.ndarray:
        """L rows of the conditional effects at the probe points (asked by every back-end)."""
        rows = self._slope_rows(self.probe_points) if self.probe_points else np.zeros((0, self.n_params))
        rows.setflags(write=False)
        return rows

    # ---- L rows ------------------------------------------------------------------
    def interaction_rows(self) -> np.ndarray:
        """Unit rows picking out each product-term coefficient (q × k)."""
        L = np.zeros((len(self.interaction_columns), self.n_params))
        L[np.arange(len(self.interaction_columns)), list(self.interaction_columns)] = 1.0
        return L

    def slope_rows(self, points: list[dict[str, Any]] | tuple[dict[str, Any], ...]) -> np.ndarray:
        """L rows of the conditional effect of the focal predictor at moderator points.

        ``points`` are dicts {moderator: raw-scale value}; moderators not named sit at
        their reference (mean or first level).
        """
        if len(points) == 0:
            return np.zeros((0, self.n_params))
        if tuple(points) == self.probe_points:
            return self.probe_rows.copy()
        return self._slope_rows(points)

    def _slope_rows(self, points: list[dict[str, Any]] | tuple[dict[str, Any], ...]) -> np.ndarray:
        if self.focal_linear:
            at, step = 0.0, 1.0
        else:
            step = 2 * self._focal_step()
            at = self._to_model(self.focal, self.focal_mean) - step / 2
        cols = self._point_columns(points)
        if cols is not None:  # the frame below, its columns as arrays
            m = len(points)
            both = {name: np.r_[c, c] for name, c in cols.items()}
            both[self.focal] = np.r_[np.full(m, at), np.full(m, at + step)]
            M = product_columns(both, self._products or ())
            return (M[m:] - M[:m]) / step
        base = self._points_frame(points)
        m = len(base)
        both = pd.concat([base, base], ignore_index=True)  # one model-matrix call for both points
        both[self.focal] = np.r_[np.full(m, at), np.full(m, at + step)]
        M = self._matrix(both)
        return (M[m:] - M[:m]) / step

    def slope_rows_along(self, moderator: str, values: np.ndarray, fixed: dict[str, Any] | None = None) -> np.ndarray:
        """L rows for the focal slope as ``moderator`` runs over ``values`` (raw scale)."""
        fixed = dict(fixed or {})
        pts = [{**fixed, moderator: float(v)} for v in np.asarray(values, dtype=float)]
        return self.slope_rows(pts)

    def slope_is_linear_in(self, moderator: str, fixed: dict[str, Any] | None = None) -> tuple[np.ndarray, np.ndarray] | None:
        """(L0, L1) with L(w) = L0 + w·L1 exactly, or None if the slope is not linear in w."""
        info = self.moderators[moderator]
        if info.categorical:
            return None
        assert info.minimum is not None and info.maximum is not None  # a continuous moderator has its range
        span = (info.maximum - info.minimum) or 1.0
        w = np.array([info.minimum, info.minimum + 0.37 * span, info.maximum + 0.5 * span])
        Ls = self.slope_rows_along(moderator, w, fixed)
        L1 = (Ls[1] - Ls[0]) / (w[1] - w[0])
        L0 = Ls[0] - w[0] * L1
        scale = np.maximum(np.abs(Ls).max(axis=0), 1.0)
        return (L0, L1) if np.all(np.abs(L0 + w[2] * L1 - Ls[2]) <= 1e-8 * scale) else None

    def model_rows(self, point: dict[str, Any], focal_values: np.ndarray) -> np.ndarray:
        """Rows of the model matrix at one moderator point as the focal predictor runs over
        ``focal_values`` (raw scale), covariates at reference — for fitted lines, x·β̂."""
        focal_values = np.asarray(focal_values, dtype=float)
        frame = self._points_frame([point] * len(focal_values))
        frame[self.focal] = self._to_model(self.focal, focal_values)
        return self._matrix(frame)

    def columns_without(self, variables: set[str] | frozenset[str]) -> list[int]:
        """Model-matrix columns of terms that involve none of ``variables`` (intercept excluded)."""
        ms = self._model_spec
        cols: list[int] = []
        for term, used in ms.term_variables.items():
            if used and not (set(used) & set(variables)):
                cols.extend(ms.term_indices[term])
        return sorted(cols)

    def variance_matrix(self, terms: Sequence[str] | None = None, *, option: str = "variance_terms"
                        ) -> tuple[np.ndarray, tuple[str, ...]]:
        """Z of a log-linear variance model, log σᵢ² = zᵢᵀγ: an intercept plus each named data column
        on its raw scale (numeric as it is, categorical as dummies of every level but the first).
        Default: the focal predictor and the moderators. Shared by every back-end that models the
        variance, so their γ are comparable."""
        names = tuple(terms) if terms is not None else (self.focal, *self.spec.moderators)
        n = self.n_obs
        blocks, labels = [np.ones((n, 1))], ["Intercept"]
        for name in names:
            frame = self.data.frame
            source = self.data.source if self.data.source is not None else frame
            if name not in frame.columns and name not in source.columns:
                raise InputError(f"The {option!r} option names {name!r}, which is not a column of the data."
                                 f"{close_matches(name, list(source.columns))}")
            col = frame[name] if name in frame.columns else self.data.column(name)
            missing = col.isna().to_numpy()
            if missing.any():
                row = int(frame.index[int(np.flatnonzero(missing)[0])]) + 1
                raise InputError(f"Column {name!r} (the {option!r} option) is missing in data row {row}; "
                                 "fill it or drop those rows.")
            if pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col):
                v = col.to_numpy(dtype=float)
                bad = ~np.isfinite(v)
                if bad.any():
                    row = int(frame.index[int(np.flatnonzero(bad)[0])]) + 1
                    raise InputError(f"Column {name!r} (the {option!r} option) is not finite in data row {row}; "
                                     "fix that value.")
                blocks.append(v[:, None])
                labels.append(name)
            else:
                cat = pd.Categorical(col.astype(str))
                blocks.append((cat.codes[:, None] == np.arange(1, len(cat.categories))[None, :]).astype(float))
                labels.extend(f"{name}[T.{lv}]" for lv in list(cat.categories)[1:])  # the mean model's spelling
        Z = np.hstack(blocks)
        R = np.linalg.qr(Z, mode="r")
        norms = np.linalg.norm(Z, axis=0)
        rel = np.abs(np.diag(R)) / np.where(norms > 0, norms, 1.0)
        bad_terms = [labels[j] for j in np.flatnonzero(rel[: len(labels)] < 1e-10)]
        if bad_terms or Z.shape[1] >= n:
            raise InputError(f"The variance terms {', '.join(repr(b) for b in bad_terms) or 'given'} are constant, "
                             f"collinear with the others or too many for {n} rows; change the {option!r} option.")
        return Z, tuple(labels)

    # ---- helpers -----------------------------------------------------------------
    def _to_model(self, name: str, value: Any) -> Any:
        return value - self.centering[name] if name in self.centering else value

    def _focal_step(self) -> float:
        sd = float(np.std(self._frame[self.focal].to_numpy(dtype=float)))
        return 1e-4 * (sd if sd > 0 else 1.0)

    def _point_columns(self, points: list[dict[str, Any]] | tuple[dict[str, Any], ...]) -> dict[str, np.ndarray] | None:
        """For a design of plain products: the columns the products use, as :meth:`_points_frame` would
        hold them (float arrays, one value per point); None for other designs, or when a value is not a
        plain number (the frame is built then)."""
        if self._products is None:
            return None
        names = {f for p in self._products for f in p}
        cols: dict[str, list[Any]] = {name: [] for name in names}
        for pt in points:
            for name in pt:
                if name not in self.moderators:
                    raise InputError(f"{name!r} is not a moderator of this model; moderators: {list(self.moderators)}.")
            for name in names:
                if name not in pt and name not in self.reference:
                    return None
                v = self._to_model(name, pt[name]) if name in pt else self.reference[name]
                if isinstance(v, bool | np.bool_) or not isinstance(v, int | float | np.integer | np.floating):
                    return None
                cols[name].append(v)
        return {name: np.array(v, dtype=float) for name, v in cols.items()}

    def _points_frame(self, points: list[dict[str, Any]] | tuple[dict[str, Any], ...]) -> pd.DataFrame:
        rows = []
        for pt in points:
            row = dict(self.reference)
            for name, value in pt.items():
                if name not in self.moderators:
                    raise InputError(f"{name!r} is not a moderator of this model; moderators: {list(self.moderators)}.")
                row[name] = self._to_model(name, value)
            rows.append(row)
        frame = pd.DataFrame(rows)
        for name in frame.columns:
            src = self._frame[name]
            if isinstance(src.dtype, pd.CategoricalDtype):
                frame[name] = pd.Categorical(frame[name], categories=src.cat.categories)
        return frame

    def _matrix(self, frame: pd.DataFrame) -> np.ndarray:
        if self._products is not None and _plain_dtypes(frame, {f for p in self._products for f in p}):
            # The products formulaic would form, in its order (checked against it when the design was built).
            return product_columns(frame, self._products)
        mm = self._model_spec.get_model_matrix(frame, context=FORMULA_CONTEXT)  # the allow-listed transforms (log1p …)
        return np.asarray(mm, dtype=float)


def build_design(data: pd.DataFrame, spec: ModelSpec) -> Design:
    """Validate the data against the spec and build y, X and the probe points.

    Parameters
    ----------
    data : DataFrame
        The user's data (never modified).
    spec : ModelSpec

    Returns
    -------
    Design

    Notes
    -----
    X comes from the formula (formulaic) after the allow-list check of :mod:`robustmod.spec`;
    one thin QR of X is computed and shared (:func:`robustmod.thin_qr.factor`). A column j with |R_jj| / ‖X_j‖ < 1e-11 is
    aliased and refused. Probe values default to mean ± 1 SD (Aiken & West 1991).
    """
    prepared, clustering = attach_clusters(prepare_data(data, spec), spec)
    frame = prepared.frame
    cats = prepared.categorical_moderators
    if spec.center or any((name in cats and not isinstance(frame[name].dtype, pd.CategoricalDtype))
                          or (name not in cats and not pd.api.types.is_numeric_dtype(frame[name]))
                          for name in frame.columns):
        frame = frame.copy()  # the model-scale frame differs from the prepared one: its own copy
    centering: dict[str, float] = {}
    if spec.center:
        for name in [spec.focal, *spec.moderators]:
            if name not in prepared.categorical_moderators:
                mean = float(frame[name].astype(float).mean())
                centering[name] = mean
                frame[name] = frame[name].astype(float) - mean
    for name in prepared.categorical_moderators:
        if not isinstance(frame[name].dtype, pd.CategoricalDtype):
            frame[name] = pd.Categorical(frame[name].astype(str) if not pd.api.types.is_numeric_dtype(frame[name]) else frame[name])
    # Other text covariates become categories so that L-row frames can name their levels.
    for name in frame.columns:
        if name not in prepared.categorical_moderators and not pd.api.types.is_numeric_dtype(frame[name]):
            frame[name] = pd.Categorical(frame[name].astype(str))
    y, X, term_names, model_spec, products = _model_matrices(spec, frame, prepared.frame.index, check=False)
    n, k = X.shape

    def factored() -> ThinQR:
        if n <= k + 1:
            raise InputError(
                f"The model has {k} coefficients but only {n} complete rows; it needs at least {k + 2} rows "
                "(fewer terms or more data)."
            )
        return factor(X, y)

    def frame_facts() -> tuple[dict[str, ModeratorInfo], dict[str, Any], float]:
        return (_moderator_info(prepared, spec), _reference(frame, spec, prepared),
                _column_mean(prepared.frame[spec.focal]))

    # The QR of X beside the checks of its cells and the facts of the frame (all the frame's work
    # in one part, so pandas is only ever used by one thread); errors come in this order, as before.
    got = run_parts([("finite", lambda: _check_finite_cells(spec, y, X, term_names, prepared.frame.index)),
                     ("qr", factored), ("frame", frame_facts)], n)
    qr = got["qr"]
    moderators, reference, focal_mean = got["frame"]
    _check_rank(X, qr[1], term_names)
    interaction_columns = _interaction_columns(model_spec, spec, term_names)
    warnings = list(prepared.warnings)
    if clustering is not None:
        warnings += [*clustering.notes,
                     *moderator_levels(prepared.frame, clustering.codes, spec.moderators, clustering.name)]
    probe_points = _probe_points(spec, moderators, warnings)
    design = Design(
        spec=spec, y=y, X=X, term_names=term_names, interaction_columns=interaction_columns,
        moderators=moderators, probe_points=probe_points, reference=reference, centering=centering,
        data=prepared, focal_linear=True, focal_mean=focal_mean, warnings=tuple(warnings), qr=qr,
        _model_spec=model_spec, _frame=frame,
        clusters=None if clustering is None else clustering.codes, cluster_name=spec.cluster, _products=products,
    )
    if _focal_enters_linearly(design):
        return design
    return dataclasses.replace(design, focal_linear=False, warnings=design.warnings + (
        f"The focal predictor {spec.focal!r} enters the model non-linearly; its conditional effect is "
        f"the derivative d E[y] / d {spec.focal} at {spec.focal} = {focal_mean:.4g} (its mean).",))


def _focal_enters_linearly(design: Design) -> bool:
    """Do unit differences of the focal predictor give the same model-matrix row at two places?"""
    cols = design._point_columns([{}])
    if cols is not None and design.focal in cols:  # the frames below, their columns as arrays
        rows = []
        for x0 in (0.0, 3.7 * (design._focal_step() * 1e4) + 1.0):
            lo, hi = dict(cols), dict(cols)
            lo[design.focal], hi[design.focal] = np.array([x0]), np.array([x0 + 1.0])
            rows.append(product_columns(hi, design._products or ()) - product_columns(lo, design._products or ()))
        return bool(np.allclose(rows[0], rows[1], rtol=1e-9, atol=1e-12))
    base = design._points_frame([{}])  # the reference point
    diffs = []
    for x0 in (0.0, 3.7 * (design._focal_step() * 1e4) + 1.0):
        lo, hi = base.copy(), base.copy()
        lo[design.focal], hi[design.focal] = x0, x0 + 1.0
        diffs.append(design._matrix(hi) - design._matrix(lo))
    return bool(np.allclose(diffs[0], diffs[1], rtol=1e-9, atol=1e-12))


#: Rows on which formulaic builds the model spec (and the check values) for the direct build.
SPEC_ROWS = 64


def _plain_columns(frame: pd.DataFrame, names: Sequence[str]) -> bool:
    """Are these columns plain numbers (int or float numpy dtypes, not bool, not categories)?"""
    return all(name in frame.columns and isinstance(frame[name].dtype, np.dtype) and frame[name].dtype.kind in "iuf"
               for name in names)


def _plain_dtypes(frame: pd.DataFrame, names: set[str]) -> bool:
    """:func:`_plain_columns` from the frame's dtypes alone (no column is looked up)."""
    kinds = {str(c): t for c, t in zip(frame.columns, frame.dtypes, strict=True)}
    return all(isinstance(kinds.get(n), np.dtype) and kinds[n].kind in "iuf" for n in names)


def _plain_products(mm: Any, frame: pd.DataFrame) -> tuple[str, list[list[str]]] | None:
    """The response column and each model-matrix column as the product of the columns named (the
    intercept an empty product), when every term is that; else None."""
    lhs_terms = mm.lhs.model_spec.terms
    if len(lhs_terms) != 1 or len(lhs_terms[0].factors) != 1:
        return None
    response = lhs_terms[0].factors[0]
    if response.eval_method.value != "lookup" or not _plain_columns(frame, [response.expr]):
        return None
    products: list[list[str]] = []
    for part in mm.rhs.model_spec.structure:
        factors = list(part.term.factors)
        intercept = len(factors) == 1 and factors[0].eval_method.value == "literal" and factors[0].expr == "1"
        plain = bool(factors) and all(f.eval_method.value == "lookup" for f in factors) and \
            _plain_columns(frame, [f.expr for f in factors])
        if len(part.columns) != 1 or not (intercept or plain):
            return None
        products.append([] if intercept else [f.expr for f in factors])
    return (response.expr, products) if len(products) == mm.rhs.shape[1] else None


#: Rows of X filled at a time by :func:`product_columns` (a block of a few columns fits in cache).
PRODUCT_BLOCK_ROWS = 4096


def product_columns(frame: pd.DataFrame | Mapping[str, np.ndarray], products: Sequence[Sequence[str]]) -> np.ndarray:
    """The matrix whose column j is the product of the columns ``products[j]`` of ``frame`` (a frame, or
    columns as arrays), multiplied left to right as formulaic multiplies (an empty product is the
    intercept's 1)."""
    names = {f for p in products for f in p}
    if isinstance(frame, pd.DataFrame):
        values = {name: frame[name].to_numpy(dtype=float) for name in names}
        n = len(frame)
    else:
        values = {name: np.asarray(frame[name], dtype=float) for name in names}
        n = len(next(iter(frame.values()))) if frame else 0
    X = np.empty((n, len(products)))
    # Filled in blocks of rows that stay in cache: a whole column of a row-major X is a strided
    # write over all of X, once per column (at n = 10⁶, k = 7 the blocks take a third of the time).
    with np.errstate(over="ignore", invalid="ignore"):  # an overflow is reported with its row by the caller
        for a in range(0, n, PRODUCT_BLOCK_ROWS):
            b = min(a + PRODUCT_BLOCK_ROWS, n)
            block = X[a:b]
            for j, factors in enumerate(products):
                if not factors:
                    block[:, j] = 1.0
                elif len(factors) == 1:
                    block[:, j] = values[factors[0]][a:b]
                else:
                    col = values[factors[0]][a:b] * values[factors[1]][a:b]
                    for name in factors[2:]:
                        col *= values[name][a:b]
                    block[:, j] = col
    return X


#: Formula plans of the direct build, keyed by the formula and the frame's column types: what
#: formulaic's parse on the head rows gave (response, products, term names, model spec), once checked.
_DIRECT_PLANS: dict[tuple[str, tuple[tuple[str, str], ...]], tuple[str, tuple[tuple[str, ...], ...],
                                                                   tuple[str, ...], Any]] = {}
#: Plans kept at most (a grid has one formula per set of covariates).
DIRECT_PLAN_CACHE = 4096


def _direct_model_matrices(spec: ModelSpec, frame: pd.DataFrame) -> tuple[np.ndarray, np.ndarray, tuple[str, ...], Any] | None:
    """y, X, term names and model spec without formulaic's n-row frames, for a formula whose terms are
    an intercept, plain numeric columns and their products (e.g. ``y ~ x * w + a``); None otherwise.

    formulaic builds the model spec from the first :data:`SPEC_ROWS` rows (plain numeric columns keep
    no state, so it is the spec of all rows), X is filled column by column with the same products in
    the same order, and both must agree exactly on those rows, else None (and formulaic builds all)."""
    parts = _direct_parts(spec, frame)
    return None if parts is None else parts[:4]


def _direct_parts(spec: ModelSpec, frame: pd.DataFrame
                  ) -> tuple[np.ndarray, np.ndarray, tuple[str, ...], Any, tuple[tuple[str, ...], ...]] | None:
    """:func:`_direct_model_matrices` and the products of each column. A formula checked once against
    formulaic on frames with the same column types is not parsed again (the same products of the same
    plain numeric columns: formulaic's spec of them keeps no state of the data)."""
    key = (spec.formula, tuple((str(c), str(t)) for c, t in frame.dtypes.items()))
    hit = _DIRECT_PLANS.get(key)
    if hit is not None:
        response, products, names, model_spec = hit
        return frame[response].to_numpy(dtype=float).copy(), product_columns(frame, products), names, model_spec, products
    head = frame.iloc[:SPEC_ROWS]
    try:
        mm = model_matrix(spec.formula, head, context=FORMULA_CONTEXT, na_action="ignore")
    except Exception:  # noqa: BLE001 - the full build reports the error in the user's terms
        return None
    plan = _plain_products(mm, frame)
    if plan is None:
        return None
    response, product_lists = plan
    products = tuple(tuple(p) for p in product_lists)
    X = product_columns(frame, products)
    y = frame[response].to_numpy(dtype=float).copy()
    m = len(head)
    if not (np.array_equal(X[:m], np.asarray(mm.rhs, dtype=float))
            and np.array_equal(y[:m], np.asarray(mm.lhs, dtype=float)[:, 0])):
        return None
    names = tuple(str(c) for c in mm.rhs.columns)
    if len(_DIRECT_PLANS) >= DIRECT_PLAN_CACHE:
        _DIRECT_PLANS.clear()
    _DIRECT_PLANS[key] = (response, products, names, mm.rhs.model_spec)
    return y, X, names, mm.rhs.model_spec, products


def _model_matrices(spec: ModelSpec, frame: pd.DataFrame, rows: pd.Index, *, check: bool = True
                    ) -> tuple[np.ndarray, np.ndarray, tuple[str, ...], Any, tuple[tuple[str, ...], ...] | None]:
    """y, X, term names, formulaic's model spec and (direct builds) the products of each column from the
    formula; non-finite cells name their data row (``check=False``: the caller checks them).

    Plain numeric terms are built directly (:func:`_direct_parts`), anything else by formulaic."""
    direct = _direct_parts(spec, frame)
    if direct is not None:
        y, X, term_names, _, _ = direct
        if check:
            _check_finite_cells(spec, y, X, term_names, rows)
        return direct
    try:
        mm = model_matrix(spec.formula, frame, context=FORMULA_CONTEXT, na_action="ignore")
    except InputError:
        raise
    except Exception as exc:  # formulaic raises many kinds; report the first line
        msg = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise InputError(f"The formula {spec.formula!r} could not be built on these data: {msg}") from None
    lhs = np.asarray(mm.lhs, dtype=float)
    if lhs.ndim != 2 or lhs.shape[1] != 1:
        raise InputError(f"The outcome side of {spec.formula!r} must give one numeric column; it gave {lhs.shape[1]}.")
    y = lhs[:, 0].copy()
    X = np.ascontiguousarray(np.asarray(mm.rhs, dtype=float))
    term_names = tuple(str(c) for c in mm.rhs.columns)
    if check:
        _check_finite_cells(spec, y, X, term_names, rows)
    return y, X, term_names, mm.rhs.model_spec, None


def _check_finite_cells(spec: ModelSpec, y: np.ndarray, X: np.ndarray, term_names: tuple[str, ...],
                        rows: pd.Index) -> None:
    """A non-finite cell of y or X is an error naming the term and the data row."""
    for arr, names in ((y[:, None], [spec.response]), (X, term_names)):
        if np.isfinite(arr).all():
            continue
        i, j = np.argwhere(~np.isfinite(arr))[0]
        raise InputError(
            f"The term {names[j]!r} is not finite in data row {int(rows[i]) + 1} "
            f"(e.g. log of a value ≤ 0); fix or drop that row, or change the transform."
        )


def _check_rank(X: np.ndarray, R: np.ndarray, names: tuple[str, ...]) -> None:
    """Refuse a rank-deficient X, naming the aliased terms (|R_jj| tiny against ‖X_j‖ = ‖R_j‖, as X = QR)."""
    norms = np.linalg.norm(R, axis=0)
    rel = np.abs(np.diag(R)) / np.where(norms > 0, norms, 1.0)
    aliased = [names[j] for j in np.flatnonzero((rel < ALIAS_TOL) | (norms == 0))]
    if aliased:
        raise InputError(
            f"The design is rank-deficient: {', '.join(repr(a) for a in aliased)} "
            f"{'is a linear combination' if len(aliased) == 1 else 'are linear combinations'} of other terms; "
            "drop or recode the aliased term(s)."
        )


def _interaction_columns(model_spec: Any, spec: ModelSpec, names: tuple[str, ...]) -> tuple[int, ...]:
    """Columns of terms that involve the focal predictor and every moderator."""
    wanted = {spec.focal, *spec.moderators}
    cols: list[int] = []
    for term, variables in model_spec.term_variables.items():
        if wanted <= set(variables):
            cols.extend(model_spec.term_indices[term])
    if not cols:
        mods = " * ".join(spec.moderators)
        raise InputError(
            f"The formula {spec.formula!r} has no product term of {spec.focal!r} and {' and '.join(repr(m) for m in spec.moderators)}; "
            f"write e.g. '{spec.response} ~ {spec.focal} * {mods}'."
        )
    return tuple(sorted(cols))


def _moderator_info(prepared: PreparedData, spec: ModelSpec) -> dict[str, ModeratorInfo]:
    out: dict[str, ModeratorInfo] = {}
    for name in spec.moderators:
        col = prepared.frame[name]
        if name in prepared.categorical_moderators:
            if isinstance(col.dtype, pd.CategoricalDtype):
                levels = tuple(col.cat.categories)
            else:
                levels = tuple(sorted(col.unique(), key=lambda v: (str(type(v)), v)))
            if not pd.api.types.is_numeric_dtype(col):
                levels = tuple(str(v) for v in levels)
            out[name] = ModeratorInfo(name, True, levels=levels)
        else:
            v = col.to_numpy(dtype=float)
            out[name] = ModeratorInfo(name, False, mean=float(v.mean()), sd=float(v.std(ddof=1)),
                                      minimum=float(v.min()), maximum=float(v.max()), values=v)
    return out


def _probe_range_note(name: str, info: ModeratorInfo, values: list[float], kind: str) -> str | None:
    """The warning for probe values outside [min, max] of the moderator, or below zero for a
    moderator that is never negative (mean − 1 SD of a skewed count, say), or None."""
    if info.minimum is None or info.maximum is None:
        return None
    outside = [v for v in values if v < info.minimum or v > info.maximum]
    if not outside:
        return None
    shown = ", ".join(f"{v:g}" for v in outside)
    what = "The default probe value(s)" if kind == "sd" else "Probe value(s)"
    rule = " (mean ± 1 SD)" if kind == "sd" else ""
    negative = info.minimum >= 0 and any(v < 0 for v in outside)
    where = (f"below zero, but {name!r} is never negative (observed range [{info.minimum:g}, {info.maximum:g}])"
             if negative else f"outside its observed range [{info.minimum:g}, {info.maximum:g}]")
    return (f"{what} {shown} of {name!r}{rule} lie {where}; effects there are extrapolations. "
            f"Probe inside the data with --at percentiles (probe={{{name!r}: 'percentiles'}} in Python).")


def _probe_points(spec: ModelSpec, moderators: dict[str, ModeratorInfo], warnings: list[str]) -> tuple[dict[str, Any], ...]:
    per: list[list[Any]] = []
    for name, info in moderators.items():
        kind, vals = parse_probe_rule(spec.probe.get(name), name)
        if info.categorical:
            if kind in ("levels", "values"):
                wanted = [str(v) if isinstance(info.levels[0], str) else v for v in vals]
                unknown = [v for v in wanted if v not in info.levels]
                if unknown:
                    raise InputError(
                        f"Probe level(s) {unknown} are not levels of the moderator {name!r}; levels: {list(info.levels)}."
                    )
                per.append(list(wanted))
            else:
                per.append(list(info.levels))
            continue
        assert info.mean is not None and info.sd is not None and info.minimum is not None and info.maximum is not None
        assert info.values is not None  # set with the range for every continuous moderator
        if kind == "levels":
            raise InputError(f"The probe values for the continuous moderator {name!r} must be numbers; got {list(vals)}.")
        if kind == "sd":
            values = [info.mean - info.sd, info.mean, info.mean + info.sd]
        elif kind == "percentiles":
            values = [float(np.percentile(info.values, q)) for q in vals]
        else:
            values = list(vals)
        if kind != "percentiles" and (note := _probe_range_note(name, info, [float(v) for v in values], kind)):
            warnings.append(note)
        per.append([float(v) for v in values])
    names = list(moderators)
    return tuple(dict(zip(names, combo, strict=False)) for combo in itertools.product(*per))


def _column_mean(col: pd.Series) -> float:
    """Mean of a complete numeric column, read in place (``astype(float)`` would copy it first)."""
    return float(np.mean(col.to_numpy(dtype=float)))


def _reference(frame: pd.DataFrame, spec: ModelSpec, prepared: PreparedData) -> dict[str, Any]:
    """Covariates at their mean (numeric) or first level; moderators likewise (model scale)."""
    ref: dict[str, Any] = {}
    for name in frame.columns:
        if name == spec.response:
            continue
        col = frame[name]
        if isinstance(col.dtype, pd.CategoricalDtype):
            ref[name] = col.cat.categories[0]
        elif pd.api.types.is_bool_dtype(col):
            ref[name] = False
        else:
            ref[name] = _column_mean(col)
    ref[spec.focal] = 0.0
    return ref
