"""Is the interaction linear? The binning estimator of Hainmueller, Mummolo & Xu (2019).

The moderator W is cut into bins (terciles by default); x_j is the median of W in bin j
and G_j its indicator. With D the focal predictor and Z the model's other covariates,

    y = Σ_j G_j [μ_j + α_j D + η_j (W − x_j) + β_j (W − x_j) D] + Zγ + ε,

so α_j is the conditional slope of D at W = x_j, estimated from bin j alone (HC3
intervals). The linear-interaction model predicts that slope as b_D + b_DW·x_j; it is
nested in the binning model (μ_j and α_j linear in x_j, η_j and β_j equal across bins:
4(J − 1) restrictions for J bins), so a Wald test of those restrictions checks linearity.
The test is run as: the user's model matrix augmented by the binning columns it does not
span, HC3 covariance, joint F test that the added coefficients are zero. The fits come from
the streaming kernel :func:`robustmod.kernels.binning.binning_fits`, here with the in-memory
rows in chunks of at most 65,536 (:func:`robustmod.kernels.chunks.in_memory_rows`) and the design's sorted moderator. For the plain
model y ~ D * W + Z this is exactly the nested test.

Common support: a bin with few rows, or in which the focal predictor barely varies, gives
a slope that rests on extrapolation; both are flagged.
"""
from __future__ import annotations

from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, fields
from typing import Any

import numpy as np

from .backends.base import WaldFit
from .backends.ols import design_fit
from .design import Design
from .errors import InputError, option_error
from .jsonvalues import num as _num
from .kernels.accumulate import GroupGrams
from .kernels.binning import BinSummary, binning_fits
from .kernels.chunks import DEFAULT_BUDGET, array_chunks, in_memory_rows
from .tables import Column, Table, format_df, format_number, format_p, make_table

#: Default number of quantile bins (terciles, as Hainmueller, Mummolo & Xu 2019 use).
DEFAULT_BINS = 3
#: A bin with fewer rows than this is flagged as thin (common practice, no source).
MIN_BIN_ROWS = 20
#: A bin whose focal SD is below this share of the overall focal SD is flagged
#: as lacking common support (our rule of thumb).
MIN_FOCAL_SPREAD = 0.25


@dataclass(frozen=True)
class BinningCheck(Mapping[str, Any]):
    """The binning check of one design along one moderator (raw scale), at level 1 − alpha.

    Reads as a mapping with the keys of the results (``to_dict()`` gives the dict); ``wald`` and
    ``nonlinear`` are None when no test was possible, and ``notes`` say why.
    """

    moderator: str
    cut_points: list[float]
    bins: list[dict[str, Any]]
    wald: dict[str, Any] | None
    nonlinear: bool | None
    alpha: float
    notes: tuple[str, ...]
    thin_bins: bool = False
    low_focal_variation: bool = False
    method: str = "binning estimator (Hainmueller, Mummolo & Xu 2019), HC3"
    source: str = "linearity"

    def to_dict(self) -> dict[str, Any]:
        return {k: self[k] for k in self}

    def __getitem__(self, key: str) -> Any:
        if key == "source" or key not in self.__dataclass_fields__:
            raise KeyError(key)
        return list(self.notes) if key == "notes" else getattr(self, key)

    def __iter__(self) -> Iterator[str]:
        return (f.name for f in fields(self) if f.name != "source")

    def __len__(self) -> int:
        return len(fields(self)) - 1

    def table(self) -> Table:
        return linearity_table(self)


def _covariate_columns(design: Design, moderator: str) -> list[int]:
    """Columns of the model matrix not involving the focal predictor, this moderator or the intercept."""
    return design.columns_without({design.focal, moderator})


def _linear_slopes(design: Design, moderator: str, med: np.ndarray, alpha: float) -> Any:
    """HC3 conditional slopes of the linear-interaction model at the bin medians (None if unavailable)."""
    fit_lin = design_fit(design, "hc3")  # the design's own HC3 fit, shared with the back-end
    est_lin = None
    if isinstance(fit_lin, WaldFit):
        fixed = {m: info.mean for m, info in design.moderators.items() if m != moderator and not info.categorical}
        est_lin = fit_lin.estimate(design.slope_rows_along(moderator, med, fixed), alpha)

    return est_lin


def _bin_rows(s: BinSummary, est_bin: Any, est_lin: Any, min_bin_rows: int, min_focal_spread: float
              ) -> tuple[list[dict[str, Any]], bool, bool]:
    """One entry per bin (range, rows, focal spread, its slope and the linear model's), and whether
    any bin is thin or has too little focal variation."""
    bin_rows: list[dict[str, Any]] = []
    sd_all = s.focal_sd_all
    thin_any = False
    sparse_any = False
    for pos in range(s.present.size):
        thin = bool(s.counts[pos] < min_bin_rows)
        sparse = bool(sd_all > 0 and s.focal_sd[pos] < min_focal_spread * sd_all) or not s.focal_varies[pos]
        thin_any |= thin
        sparse_any |= sparse
        row: dict[str, Any] = {
            "range": [float(s.lows[pos]), float(s.highs[pos])], "n": int(s.counts[pos]), "median": float(s.medians[pos]),
            "focal_sd": _num(s.focal_sd[pos]), "thin": thin, "low_focal_variation": bool(sparse),
            "estimate": None, "se": None, "ci": [None, None],
            "linear_prediction": None, "linear_ci": [None, None], "outside": None,
        }
        if est_bin is not None:
            row.update(estimate=_num(est_bin.estimate[pos]), se=_num(est_bin.se[pos]),
                       ci=[_num(est_bin.lower[pos]), _num(est_bin.upper[pos])])
        if est_lin is not None:
            row.update(linear_prediction=_num(est_lin.estimate[pos]),
                       linear_ci=[_num(est_lin.lower[pos]), _num(est_lin.upper[pos])])
        if est_bin is not None and est_lin is not None:
            row["outside"] = bool(est_lin.estimate[pos] < est_bin.lower[pos] or est_lin.estimate[pos] > est_bin.upper[pos])
        bin_rows.append(row)
    return bin_rows, thin_any, sparse_any


def binning_check(design: Design, *, moderator: str | None = None, bins: int | Sequence[float] = DEFAULT_BINS,
                  alpha: float = 0.05, min_bin_rows: int = MIN_BIN_ROWS,
                  min_focal_spread: float = MIN_FOCAL_SPREAD) -> BinningCheck | None:
    """Binning estimator and Wald test of linearity (Hainmueller, Mummolo & Xu 2019).

    Parameters
    ----------
    design : Design
    moderator : str, optional
        Default: the first continuous moderator.
    bins : int or list of float, default=3
        Number of quantile bins, or interior cut points.
    alpha : float, default=0.05
    min_bin_rows : int
        Bins with fewer rows are flagged as thin.
    min_focal_spread : float
        A bin whose focal SD is below this share of the overall SD is flagged (common support).

    Returns
    -------
    BinningCheck or None
        None when the model has no continuous moderator. ``nonlinear`` is True when the Wald
        test rejects linearity at ``alpha``.

    Notes
    -----
    Each bin j gets its own intercept, focal slope, centred-moderator slope and product term
    (centred at the bin median); the per-bin focal slopes carry HC3 intervals and are compared with
    the linear model's conditional slope at the bin medians. The Wald test sets the binning columns
    the linear model lacks to zero, 4(J − 1) restrictions, with the HC3 covariance.
    """
    return binning_check_sharing(design, moderator=moderator, bins=bins, alpha=alpha, min_bin_rows=min_bin_rows,
                                 min_focal_spread=min_focal_spread)[0]


def binning_check_sharing(design: Design, *, moderator: str | None = None, bins: int | Sequence[float] = DEFAULT_BINS,
                          alpha: float = 0.05, min_bin_rows: int = MIN_BIN_ROWS, min_focal_spread: float = MIN_FOCAL_SPREAD,
                          side_groups: Mapping[str, tuple[float, float]] | None = None
                          ) -> tuple[BinningCheck | None, GroupGrams | None]:
    """:func:`binning_check`, and the cross-products of [X y] and row counts of ``side_groups`` (closed
    intervals of the moderator's values) summed in its first pass; None in their place when that pass
    did not run."""
    if not (isinstance(alpha, (int, float)) and not isinstance(alpha, bool) and 0 < alpha < 1):
        raise option_error("alpha", "a number in (0, 1)", alpha)
    conts = design.continuous_moderators
    if moderator is None:
        if not conts:
            return None, None
        moderator = conts[0]
    elif moderator not in conts:
        raise InputError(
            f"The binning check needs a continuous moderator; {moderator!r} is not one "
            f"(continuous moderators: {list(conts) or 'none'})."
        )
    info = design.moderators[moderator]
    w = np.asarray(info.values, dtype=float)
    d = design.data.frame[design.focal].to_numpy(dtype=float)
    cov_cols = _covariate_columns(design, moderator)
    chunks = array_chunks(design.X, design.y, chunk_rows=in_memory_rows(DEFAULT_BUDGET, design.n_params + 4),
                          columns={design.focal: d, moderator: w})
    fits = binning_fits(chunks, focal=design.focal, moderator=moderator, covariate_columns=cov_cols, bins=bins,
                        alpha=alpha, sorted_values=info.sorted_values, side_groups=side_groups)
    s = fits.summary
    notes = list(fits.notes)
    if s.present.size < 2:
        return BinningCheck(moderator=moderator, cut_points=[float(c) for c in s.cuts], bins=[], wald=None,
                            nonlinear=None, alpha=float(alpha),
                            notes=(*notes, "Fewer than two non-empty bins; no check possible.")), fits.side
    est_lin = _linear_slopes(design, moderator, s.medians, alpha)
    bin_rows, thin_any, sparse_any = _bin_rows(s, fits.bin_slopes, est_lin, min_bin_rows, min_focal_spread)
    if thin_any:
        notes.append(f"At least one bin has fewer than {min_bin_rows} rows; its slope is imprecise.")
    if sparse_any:
        notes.append(f"In at least one bin the focal predictor {design.focal!r} barely varies (lack of common support); "
                     "effects there rest on extrapolation.")
    if not design.focal_linear:
        notes.append(f"The bins use {design.focal!r} on its raw scale, while the model transforms it.")

    jt = fits.wald
    wald: dict[str, Any] | None = None if jt is None else {
        "statistic": _num(jt.statistic), "df": [int(jt.df_num), _num(jt.df_den)], "p": _num(jt.p),
        "method": f"HC3 {jt.method}: binning columns beyond the model are zero"}
    nonlinear = None if wald is None or wald["p"] is None else bool(wald["p"] < alpha)
    check = BinningCheck(moderator=moderator, cut_points=[float(c) for c in s.cuts], bins=bin_rows, wald=wald,
                         nonlinear=nonlinear, alpha=float(alpha), notes=tuple(notes), thin_bins=thin_any,
                         low_focal_variation=sparse_any)
    return check, fits.side


def linearity_table(lin: Mapping[str, Any]) -> Table:
    """The binning check as a table: each bin's own slope beside the linear model's slope there."""
    rows = []
    for b in lin.get("bins") or []:
        flags = [name for name, key in (("few rows", "thin"), ("focal barely varies", "low_focal_variation"),
                                        ("linear slope outside the bin's interval", "outside")) if b.get(key)]
        r, ci, lci = b.get("range") or [None, None], b.get("ci") or [None, None], b.get("linear_ci") or [None, None]
        rows.append((r[0], r[1], b.get("n"), b.get("median"), b.get("estimate"), ci[0], ci[1],
                     b.get("linear_prediction"), lci[0], lci[1], "; ".join(flags) or "none"))
    level = 1 - float(lin.get("alpha", 0.05))
    lv = f"{100 * level:g}%"
    cols = (Column("low", "moderator range", pair="high"), Column("high", "to"), Column("n", "rows", "integer"),
            Column("median", "median"), Column("estimate", "slope in bin"),
            Column("ci_low", f"{lv} interval", pair="ci_high", level=level), Column("ci_high", "to"),
            Column("linear_prediction", "linear model's slope"),
            Column("linear_ci_low", f"its {lv} interval", pair="linear_ci_high", level=level),
            Column("linear_ci_high", "to"), Column("flags", "flags", "text"))
    w = lin.get("wald") or {}
    if w:
        df = w.get("df") or [None, None]
        test = (f"Test that the bins add nothing ({w.get('method', '')}): statistic {format_number(w.get('statistic'))}, "
                f"df {format_df(df[0])} and {format_df(df[1])}, p {format_p(w.get('p'))}.")
    else:
        test = "No test that the bins add nothing was possible."
    notes = (str(lin.get("method", "")) + ".", test, *[str(n) for n in lin.get("notes") or []])
    return make_table("linearity", f"Binning check of the linear interaction along {lin.get('moderator')}", cols, rows,
                      source="linearity", level=level, scale="raw scale of the moderator and the focal predictor",
                      notes=notes)
