"""Diagnostics of the variance pattern of the OLS residuals, and of the mean model.

* Breusch–Pagan in Koenker's studentized form: LM = n·R² of êᵢ² on the regressors,
  χ² with (rank − 1) df (Breusch & Pagan 1979; Koenker 1981).
* White (1980): the same auxiliary regression on the regressors, their squares and
  cross-products, linearly dependent columns (e.g. squared dummies) dropped.
* Goldfeld–Quandt (1965): rows sorted by the moderator, the middle fifth dropped,
  F = s²(high) / s²(low), two-sided p; rows tied at a cut value stay in one group.
* Spread of the residuals by moderator bins (terciles, or the levels of a categorical one).
* Classical vs HC3 standard error of the product term: a large gap signals a misspecified
  mean model as much as non-constant variance (King & Roberts 2015).
* Linearity of the interaction: the binning check of :mod:`robustmod.linearity`.

Each test is computed once, by the streaming kernel of :mod:`robustmod.kernels`, here over the
in-memory rows in chunks of at most 65,536 rows (:func:`robustmod.kernels.chunks.in_memory_rows`).
On large data the tests run on two threads (:mod:`robustmod.lanes`).
"""
from __future__ import annotations

from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .backends.base import WaldFit
from .backends.ols import design_fit, design_residuals
from .blas_threads import one_blas_thread
from .design import Design
from .errors import option_error
from .jsonvalues import num as _num
from .kernels.accumulate import GroupGrams
from .kernels.chunks import DEFAULT_BUDGET, ChunkSource, array_chunks, in_memory_rows
from .kernels.gq import DROP_SHARE, Split, gq_split
from .kernels.gq import goldfeld_quandt as streamed_gq
from .kernels.lmtests import AuxiliaryRegression, ResidualPasses
from .kernels.spread import ResidualSpread
from .lanes import run_parts
from .linearity import BinningCheck, binning_check, binning_check_sharing
from .tables import Column, NotApplicable, Table, format_number, make_table

#: Share of middle rows the Goldfeld–Quandt split drops (the kernel's value).
GQ_DROP = DROP_SHARE
#: Number of quantile bins of a continuous moderator for the residual-spread table.
SPREAD_BINS = 3
#: Rows whose column means shift the levels of the White auxiliary regression (any shift near the
#: means keeps its cross-products free of cancellation; the test does not change with it).
SHIFT_ROWS = 1024
#: HC3/classical SE ratio beyond which (either way) the gap is called large. Our rule of
#: thumb: King & Roberts (2015) give no threshold, only the advice to look.
SE_GAP_LARGE = 1.5


def _residual_passes(X: np.ndarray, e: np.ndarray, width: int, budget: int) -> ResidualPasses:
    """The in-memory rows as chunks of (X rows, their residuals), as many rows per chunk as the
    budget allows for ``width`` columns per row (one chunk for most data sets)."""
    chunks = array_chunks(X, e, chunk_rows=in_memory_rows(budget, width))
    return lambda: ((c, c.y) for c in chunks())


def _lm_test(resid: np.ndarray, X: np.ndarray, *, white: bool, budget: int) -> dict[str, Any]:
    X = np.asarray(X, dtype=float)
    k = X.shape[1]
    passes = _residual_passes(X, np.asarray(resid, dtype=float), 2 + k + (k * (k + 1) // 2 if white else 0), budget)
    aux = AuxiliaryRegression(white=white)
    for c, e in passes():
        aux.add(c, e)
    return aux.result(passes)


def _constant_column(design: Design) -> int | None:
    """The intercept's column when it is 1 in every row (its White products repeat other columns)."""
    if "Intercept" not in design.term_names:
        return None
    j = design.term_names.index("Intercept")
    return j if bool(np.all(design.X[:, j] == 1.0)) else None


def lm_tests(design: Design, resid: np.ndarray, *, budget: int = DEFAULT_BUDGET) -> tuple[dict[str, Any], dict[str, Any]]:
    """Breusch–Pagan and White from one pass: White's centred cross-products hold Breusch–Pagan's
    (the levels and ê²) as a block, so both come from one accumulation
    (:meth:`robustmod.kernels.lmtests.AuxiliaryRegression.levels_result`)."""
    X = design.X
    k = X.shape[1]
    passes = _residual_passes(X, np.asarray(resid, dtype=float), 2 + k + k * (k + 1) // 2, budget)
    # The levels shifted by the means of the first rows: the products of shifted levels have
    # moderate means, so their cross-products need no centring pass per block (see AuxiliaryRegression).
    aux = AuxiliaryRegression(white=True, constant_column=_constant_column(design),
                              level_shift=X[:SHIFT_ROWS].mean(axis=0))
    for c, e in passes():
        aux.add(c, e)
    if aux.rows == 0:  # no rows: as the separate tests answer
        return breusch_pagan(design, resid), white(design, resid)
    bp = {**aux.levels_result(passes), "form": "Koenker (studentized), n·R² of squared residuals on the regressors"}
    wh = {**aux.result(passes), "form": "n·R² on levels, squares and cross-products (dependent columns dropped)"}
    return bp, wh


def ols_residuals(design: Design) -> np.ndarray:
    """ê = y − Q Qᵀ y from the design's thin QR (computed once per design, read-only)."""
    return design_residuals(design)[1]


def breusch_pagan_lm(resid: np.ndarray, X: np.ndarray, *, budget: int = DEFAULT_BUDGET) -> dict[str, Any]:
    """Koenker's LM = n·R² of ê² on X (plus a constant), χ²(rank − 1); arrays in, dict out.

    Computed by :class:`robustmod.kernels.lmtests.AuxiliaryRegression` over the rows in chunks
    of at most ``budget`` bytes of work space.
    """
    return {**_lm_test(resid, X, white=False, budget=budget),
            "form": "Koenker (studentized), n·R² of squared residuals on the regressors"}


def white_lm(resid: np.ndarray, X: np.ndarray, *, budget: int = DEFAULT_BUDGET) -> dict[str, Any]:
    """White's LM = n·R² of ê² on X, its squares and cross-products (dependent columns dropped).

    The k(k+1)/2 products exist one chunk at a time; their centred cross-products are solved by
    scaled pivoted Cholesky, or by TSQR when ill-conditioned (:mod:`robustmod.kernels.lmtests`).
    """
    return {**_lm_test(resid, X, white=True, budget=budget),
            "form": "n·R² on levels, squares and cross-products (dependent columns dropped)"}


def breusch_pagan(design: Design, resid: np.ndarray | None = None) -> dict[str, Any]:
    """Koenker's studentized Breusch–Pagan test on the model's own regressors."""
    return breusch_pagan_lm(ols_residuals(design) if resid is None else resid, design.X)


def white(design: Design, resid: np.ndarray | None = None) -> dict[str, Any]:
    """White's test: squared residuals on levels, squares and cross-products of the regressors."""
    return white_lm(ols_residuals(design) if resid is None else resid, design.X)


def _design_chunks(design: Design, columns: Mapping[str, np.ndarray], y: np.ndarray | None = None,
                   budget: int = DEFAULT_BUDGET) -> ChunkSource:
    X = design.X
    return array_chunks(X, design.y if y is None else y, chunk_rows=in_memory_rows(budget, X.shape[1] + 1),
                        columns=columns)


def goldfeld_quandt(design: Design, moderator: str | None = None, *, split: Split | None = None,
                    gathered: GroupGrams | None = None) -> dict[str, Any] | None:
    """Split along a continuous moderator; F of residual variances high vs low, two-sided.

    The split is by value, ties never split between a group and the dropped middle (the one
    implementation of :func:`robustmod.kernels.gq.goldfeld_quandt`, here over one in-memory
    chunk), so the result does not depend on the order of the rows. None when the model has no
    continuous moderator, the groups are too small to fit, or so many ties that they would overlap.
    ``split`` and ``gathered``: the cut values and the groups' cross-products when the binning check
    has summed them (see :func:`_linearity_and_gq`).
    """
    conts = design.continuous_moderators
    if moderator is None:
        if not conts:
            return None
        moderator = conts[0]
    info = design.moderators[moderator]
    w = np.asarray(info.values, dtype=float)
    out = streamed_gq(_design_chunks(design, {moderator: w}), moderator, drop_share=GQ_DROP,
                      sorted_values=info.sorted_values, split=split, gathered=gathered)
    if out is None:
        return None
    tied = "" if out["group_sizes"]["low"] == out["group_sizes"]["high"] == (w.size - round(GQ_DROP * w.size)) // 2 \
        else ", rows tied at a cut kept in one group"
    return {**out, "form": f"sorted by {moderator}, middle {int(100 * GQ_DROP)}% dropped{tied}, "
                           "F = s²(high)/s²(low), two-sided"}


def residual_spread(design: Design, resid: np.ndarray | None = None, *, moderator: str | None = None,
                    bins: int = SPREAD_BINS) -> dict[str, Any] | None:
    """SD of the OLS residuals within moderator bins (quantile bins, or levels if categorical).

    ``ratio`` is the largest bin SD over the smallest. Continuous moderators go through
    :class:`robustmod.kernels.spread.ResidualSpread`.
    """
    if isinstance(bins, bool) or not isinstance(bins, (int, np.integer)) or bins < 2:
        raise option_error("bins", "a whole number ≥ 2", bins)
    e = ols_residuals(design) if resid is None else resid
    if moderator is None:
        if not design.moderators:
            return None
        moderator = (design.continuous_moderators or tuple(design.moderators))[0]
    info = design.moderators[moderator]
    form = "SD of OLS residuals (ddof 1) within moderator bins"
    if not info.categorical:
        chunks = _design_chunks(design, {moderator: np.asarray(info.values, dtype=float)}, y=e)
        spread = ResidualSpread.quantile_bins(chunks, moderator, bins, sorted_values=info.sorted_values)
        for c in chunks():
            spread.add(c, c.y)
        return {**spread.result(), "form": f"{form} ({bins} quantile bins)"}
    col = design.data.frame[moderator]
    labels = col.astype(str).to_numpy() if not info.levels or isinstance(info.levels[0], str) else col.to_numpy()
    rows = [{"level": lev if isinstance(lev, str) else _num(lev), "range": None, **_spread(e[labels == lev])}
            for lev in info.levels]
    sds = [r["sd"] for r in rows if r["sd"] is not None]
    ratio = _num(max(sds) / min(sds)) if len(sds) >= 2 and min(sds) > 0 else None
    return {"moderator": moderator, "bins": rows, "ratio": ratio, "form": form}


def _spread(e: np.ndarray) -> dict[str, Any]:
    return {"n": int(e.size), "sd": _num(np.std(e, ddof=1)) if e.size > 1 else None}


def se_gap(design: Design) -> dict[str, Any] | None:
    """Classical vs HC3 SE of each product-term coefficient, and their ratio (King & Roberts 2015)."""
    return se_gap_of_fits(design, [design_fit(design, kind) for kind in ("ols", "hc3")])


def se_gap_of_fits(design: Design, fits: Sequence[Any]) -> dict[str, Any] | None:
    """:func:`se_gap` from given classical and HC3 fits (None unless both are Wald fits); the streamed
    diagnostics pass theirs."""
    fits = [f for f in fits if isinstance(f, WaldFit)]
    if len(fits) < 2:
        return None
    L = design.interaction_rows()
    se_c, se_h = (f.estimate(L, 0.05).se for f in fits)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = se_h / se_c
    finite = ratio[np.isfinite(ratio) & (ratio > 0)]
    worst = float(finite[np.argmax(np.abs(np.log(finite)))]) if finite.size else None
    return {
        "terms": list(design.interaction_terms),
        "classical_se": [_num(v) for v in se_c],
        "hc3_se": [_num(v) for v in se_h],
        "ratio": [_num(v) for v in ratio],
        "largest_ratio": _num(worst),
        "large": None if worst is None else bool(worst > SE_GAP_LARGE or worst < 1 / SE_GAP_LARGE),
        "threshold": SE_GAP_LARGE,
        "note": "A large gap between classical and robust SEs points to a misspecified mean model "
                "as well as to non-constant variance (King & Roberts 2015).",
    }


@dataclass(frozen=True)
class VarianceDiagnostics(Mapping[str, Any]):
    """The variance diagnostics of one design: each test's result, and for a check that does
    not apply (no continuous moderator, too few rows) a :class:`NotApplicable` with the reason.

    Reads as a mapping with the keys of the results contract (``breusch_pagan``, ``white``,
    ``goldfeld_quandt``, ``residual_spread``, ``se_gap``, ``linearity``, ``non_constant_variance``,
    ``alpha``; a check that does not apply is None there); ``to_dict()`` is that mapping as a dict.
    """

    alpha: float
    breusch_pagan: dict[str, Any]
    white: dict[str, Any]
    goldfeld_quandt: dict[str, Any] | NotApplicable
    residual_spread: dict[str, Any] | NotApplicable
    se_gap: dict[str, Any] | NotApplicable
    linearity: BinningCheck | NotApplicable
    non_constant_variance: bool
    source: str = "diagnostics"
    scale: str = "OLS residuals, in outcome units; moderator bins on the raw scale"

    _KEYS = ("alpha", "breusch_pagan", "white", "goldfeld_quandt", "residual_spread", "se_gap", "linearity",
             "non_constant_variance")

    def to_dict(self) -> dict[str, Any]:
        out = {k: None if isinstance(v, NotApplicable) else v for k in self._KEYS for v in (getattr(self, k),)}
        if out["linearity"] is not None:
            out["linearity"] = out["linearity"].to_dict()
        return out

    def __getitem__(self, key: str) -> Any:
        if key not in self._KEYS:
            raise KeyError(key)
        v = getattr(self, key)
        return None if isinstance(v, NotApplicable) else v

    def __iter__(self) -> Iterator[str]:
        return iter(self._KEYS)

    def __len__(self) -> int:
        return len(self._KEYS)

    def tables(self) -> list[Table]:
        """The diagnostics tables, in display order (the linearity check included)."""
        out = diagnostics_tables(self)
        if not isinstance(self.linearity, NotApplicable) and self.linearity.get("bins"):
            out.append(self.linearity.table())
        return out


def _linearity_and_gq(design: Design, alpha: float) -> tuple[Any, dict[str, Any] | None]:
    """The binning check and Goldfeld–Quandt along the first continuous moderator (the default of
    both), the test's group cross-products summed in the binning check's first pass (one pass over
    the rows fewer); the test makes its own passes when that pass does not run."""
    moderator = design.continuous_moderators[0]
    info = design.moderators[moderator]
    split = gq_split(_design_chunks(design, {moderator: np.asarray(info.values, dtype=float)}), moderator,
                     drop_share=GQ_DROP, sorted_values=info.sorted_values)
    check, side = binning_check_sharing(design, alpha=alpha, side_groups=None if split is None else split.groups())
    if split is None:
        return check, None
    return check, goldfeld_quandt(design, moderator, split=split, gathered=side)


def _or_reason(value: Any, reason: str) -> Any:
    return NotApplicable(reason) if value is None else value


def variance_diagnostics(design: Design, alpha: float = 0.05) -> VarianceDiagnostics:
    """All diagnostics of the results contract; every value JSON-ready (finite floats or None).

    Parameters
    ----------
    design : Design
    alpha : float, default=0.05

    Returns
    -------
    VarianceDiagnostics
        A mapping with ``breusch_pagan``, ``white``, ``goldfeld_quandt``, ``residual_spread``,
        ``se_gap``, ``linearity`` and ``non_constant_variance``; ``to_dict()`` gives a plain dict.

    Notes
    -----
    Breusch–Pagan in Koenker's studentized form, LM = n·R² of ê² on the regressors, χ²(k − 1)
    (Breusch & Pagan 1979; Koenker 1981); White (1980) adds squares and cross-products;
    Goldfeld & Quandt (1965) split along the moderator; the SE gap follows King & Roberts (2015).
    """
    parts, assemble = diagnostics_parts(design, alpha)
    with one_blas_thread():
        return assemble(run_parts(parts, design.X.shape[0]))


def diagnostics_parts(design: Design, alpha: float = 0.05) -> tuple[
        list[tuple[str, Callable[[], Any]]], Callable[[Mapping[str, Any]], VarianceDiagnostics]]:
    """The independent parts of :func:`variance_diagnostics`, longest first, and the function that
    makes the diagnostics of their results: for :func:`robustmod.lanes.run_parts`, which may run
    them on two threads beside other work (the shared residuals, leverages and fits of the design
    are computed once, whichever part asks first)."""
    if isinstance(alpha, bool) or not isinstance(alpha, (int, float)) or not 0 < alpha < 1:
        raise option_error("alpha", "a number in (0, 1)", alpha)
    shared = bool(design.continuous_moderators)
    parts: list[tuple[str, Callable[[], Any]]] = [
        ("linearity", (lambda: _linearity_and_gq(design, alpha)) if shared
         else lambda: (binning_check(design, alpha=alpha), goldfeld_quandt(design))),
        ("lm", lambda: lm_tests(design, ols_residuals(design))),
        ("residual_spread", lambda: residual_spread(design, ols_residuals(design))),
    ]

    def assemble(got: Mapping[str, Any]) -> VarianceDiagnostics:
        (bp, wh), (linearity, gq) = got["lm"], got["linearity"]
        tests = [t for t in (bp, wh, gq) if t is not None]
        return VarianceDiagnostics(
            alpha=float(alpha), breusch_pagan=bp, white=wh,
            goldfeld_quandt=_or_reason(gq, "no continuous moderator, or halves too small to fit"),
            residual_spread=_or_reason(got["residual_spread"], "no moderator"),
            se_gap=_or_reason(se_gap(design), "a standard error could not be computed (e.g. leverage 1)"),
            linearity=_or_reason(linearity, "no continuous moderator"),
            non_constant_variance=any(t["p"] is not None and t["p"] < alpha for t in tests),
        )

    return parts, assemble


# ---- the tables every display renders ---------------------------------------------------------

_TESTS = (("breusch_pagan", "Breusch–Pagan (Koenker)"), ("white", "White"), ("goldfeld_quandt", "Goldfeld–Quandt"))


def _dfs(df: Any) -> tuple[Any, Any]:
    if isinstance(df, (list, tuple)):
        return (df[0], df[1]) if len(df) == 2 else (df[0], NotApplicable("one df"))
    return df, NotApplicable("a χ² test has one df")


def variance_tests_table(diag: Mapping[str, Any]) -> Table:
    """Breusch–Pagan, White and Goldfeld–Quandt: statistic, df, p and the form of each test."""
    rows = []
    for key, name in _TESTS:
        t = diag.get(key)
        if t is None:
            na = NotApplicable("not computed for this design (no continuous moderator or too few rows)")
            rows.append((key, name, na, na, na, na, na.reason))
            continue
        df1, df2 = _dfs(t.get("df"))
        rows.append((key, name, t.get("statistic"), df1, df2, t.get("p"), t.get("form", "")))
    cols = (Column("test", "test id", "code", hidden=True), Column("name", "test", "text"), Column("statistic", "statistic"),
            Column("df", "df", "df"), Column("df_denominator", "denominator df", "df"), Column("p", "p", "p"),
            Column("form", "form", "text", hidden=True))
    verdict = ("at least one test rejects constant spread" if diag.get("non_constant_variance")
               else "no test rejects constant spread (which does not prove it constant)")
    forms = [f"{name}: {row[-1]}." for (_, name), row in zip(_TESTS, rows, strict=False)]
    return make_table("variance_tests", "Variance diagnostics of the OLS residuals", cols, rows, source="diagnostics",
                      notes=(f"At alpha = {diag.get('alpha', 0.05):g}, {verdict}.", *forms), meta={"field": "diagnostics"})


def residual_spread_table(spread: Mapping[str, Any]) -> Table:
    """Residual SD within moderator bins (or levels)."""
    rows = []
    for b in spread.get("bins") or []:
        r = b.get("range")
        lo, hi = (r[0], r[1]) if r else (NotApplicable("a level"), NotApplicable("a level"))
        rows.append((str(b["level"]) if b.get("level") is not None else "bin", lo, hi, b.get("n"), b.get("sd")))
    cols = (Column("level", "level or bin", "text"), Column("low", "moderator range", pair="high"), Column("high", "to"),
            Column("n", "rows", "integer"), Column("sd", "residual SD"))
    return make_table("residual_spread", f"Residual spread across {spread.get('moderator')} (raw scale)", cols, rows,
                      source="diagnostics", scale="raw scale of the moderator",
                      notes=(f"Largest over smallest SD: {format_number(spread.get('ratio'))}; {spread.get('form', '')}.",))


def se_gap_table(gap: Mapping[str, Any]) -> Table:
    """Classical against HC3 SE of each product term (King & Roberts 2015)."""
    terms = gap.get("terms") or []
    rows = [(t, gap["classical_se"][i], gap["hc3_se"][i], gap["ratio"][i]) for i, t in enumerate(terms)]
    cols = (Column("term", "product term", "code"), Column("classical_se", "classical SE"),
            Column("hc3_se", "HC3 SE"), Column("ratio", "HC3 / classical"))
    large = "a large gap" if gap.get("large") else "no large gap"
    return make_table("se_gap", "Classical against HC3 standard error of the product term", cols, rows,
                      source="diagnostics",
                      notes=((f"{large.capitalize()} (threshold: a ratio beyond "
                              f"{format_number(gap.get('threshold'))} either way)."), str(gap.get("note", ""))))


def diagnostics_tables(diag: Mapping[str, Any]) -> list[Table]:
    """Every diagnostics table of :func:`variance_diagnostics` output, in display order."""
    out = [variance_tests_table(diag)]
    if diag.get("residual_spread"):
        out.append(residual_spread_table(diag["residual_spread"]))
    if diag.get("se_gap"):
        out.append(se_gap_table(diag["se_gap"]))
    return out
