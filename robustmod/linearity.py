"""Is the interaction linear? The binning estimator of Hainmueller, Mummolo & Xu (2019).

The moderator W is cut into bins (terciles by default); x_j is the median of W in bin j
and G_j its indicator. With D the focal predictor and Z the model's other covariates,

    y = Σ_j G_j [μ_j + α_j D + η_j (W − x_j) + β_j (W − x_j) D] + Zγ + ε,

so α_j is the conditional slope of D at W = x_j, estimated from bin j alone (HC3
intervals). The linear-interaction model predicts that slope as b_D + b_DW·x_j; it is
nested in the binning model (μ_j and α_j linear in x_j, η_j and β_j equal across bins:
4(J − 1) restrictions for J bins), so a Wald test of those restrictions checks linearity.
The test is run as: the user's model matrix augmented by the binning columns it does not
span, HC3 covariance, joint F test that the added coefficients are zero. For the plain
model y ~ D * W + Z this is exactly the nested test.

Common support: a bin with few rows, or in which the focal predictor barely varies, gives
a slope that rests on extrapolation; both are flagged.
"""
from __future__ import annotations

from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, fields
from typing import Any

import numpy as np
from scipy import linalg

from .backends.base import WaldFit
from .backends.ols import ols_fit
from .design import Design
from .errors import InputError, option_error
from .jsonvalues import num as _num
from .tables import Column, Table, format_df, format_number, format_p, make_table

#: Default number of quantile bins (terciles, as Hainmueller, Mummolo & Xu 2019 use).
DEFAULT_BINS = 3
#: A bin with fewer rows than this is flagged as thin (common practice, no source).
MIN_BIN_ROWS = 20
#: A bin whose focal SD is below this share of the overall focal SD is flagged
#: as lacking common support (our rule of thumb).
MIN_FOCAL_SPREAD = 0.25
#: Relative size below which a residualised column counts as spanned by the model.
SPAN_TOL = 1e-8


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


def _bin_index(w: np.ndarray, bins: int | Sequence[float], moderator: str) -> tuple[np.ndarray, np.ndarray]:
    """Bin number of each row and the interior cut points."""
    if isinstance(bins, (bool, np.bool_)):
        raise option_error("bins", "a whole number ≥ 2 or a list of interior cut points", bins)
    if isinstance(bins, (int, np.integer)):
        if bins < 2:
            raise option_error("bins", "a whole number ≥ 2 or a list of interior cut points", bins)
        cuts = np.quantile(w, np.arange(1, bins) / bins)
    else:
        try:
            cuts = np.asarray(list(bins), dtype=float)
        except (TypeError, ValueError):
            raise option_error("bins", "a whole number ≥ 2 or a list of interior cut points", bins) from None
        if cuts.ndim != 1 or cuts.size == 0 or not np.all(np.isfinite(cuts)) or np.any(np.diff(cuts) <= 0):
            raise option_error("bins", "cut points as a strictly increasing list of finite numbers", list(bins))
        if cuts[0] <= w.min() or cuts[-1] >= w.max():
            raise InputError(
                f"The bin cut points {list(cuts)} must lie inside the observed range of {moderator!r} "
                f"({w.min():g} to {w.max():g}); move them inside it."
            )
    # Rows at a cut point go to the lower bin (right-closed bins, as pandas.cut).
    return np.searchsorted(cuts, w, side="left"), cuts


def _added_columns(X: np.ndarray, B: np.ndarray) -> np.ndarray:
    """Indices of B's columns that add to span(X) (pivoted QR of B residualised on X)."""
    Q, _ = np.linalg.qr(X, mode="reduced")
    Res = B - Q @ (Q.T @ B)
    norms = np.linalg.norm(B, axis=0)
    rel = np.linalg.norm(Res, axis=0) / np.where(norms > 0, norms, 1.0)
    cand = np.flatnonzero(rel > SPAN_TOL)
    if cand.size == 0:
        return cand
    Rs = Res[:, cand] / np.linalg.norm(Res[:, cand], axis=0)
    _, R, piv = linalg.qr(Rs, mode="economic", pivoting=True)
    d = np.abs(np.diag(R))
    rank = int((d > SPAN_TOL * max(d[0], 1e-300)).sum())
    return np.sort(cand[piv[:rank]])


def _covariate_columns(design: Design, moderator: str) -> list[int]:
    """Columns of the model matrix not involving the focal predictor, this moderator or the intercept."""
    return design.columns_without({design.focal, moderator})


def _bin_slopes(Xbin: np.ndarray, y: np.ndarray, J: int, alpha: float, notes: list[str]) -> Any:
    """HC3 estimates of the J per-bin focal slopes from the binning model alone (None if it cannot be fitted)."""
    n = y.size
    est_bin = None
    if Xbin.shape[0] <= Xbin.shape[1] + 1:
        notes.append(f"Too few rows ({n}) for the {Xbin.shape[1]} columns of the binning model; "
                     "per-bin slopes cannot be estimated.")
        rdiag = np.zeros(0)
    else:
        Q, R = np.linalg.qr(Xbin, mode="reduced")
        rdiag = np.abs(np.diag(R)) / np.maximum(np.linalg.norm(Xbin, axis=0), 1e-300)
    if rdiag.size == 0:
        pass
    elif np.all(rdiag > 1e-10):
        fit_bin = ols_fit("hc3", Q, R, y, tuple(f"c{i}" for i in range(Xbin.shape[1])))
        if isinstance(fit_bin, WaldFit):
            est_bin = fit_bin.estimate(np.eye(Xbin.shape[1])[J:2 * J], alpha)
        else:
            notes.append(f"Per-bin HC3 slopes unavailable: {fit_bin.reason}")
    else:
        notes.append("The binning model is rank-deficient (a bin has too few distinct rows or no focal variation); "
                     "per-bin slopes cannot be estimated.")

    return est_bin


def _linear_slopes(design: Design, moderator: str, med: np.ndarray, alpha: float) -> Any:
    """HC3 conditional slopes of the linear-interaction model at the bin medians (None if unavailable)."""
    y = design.y
    Qu, Ru = design.qr
    fit_lin = ols_fit("hc3", Qu, Ru, y, design.term_names)
    est_lin = None
    if isinstance(fit_lin, WaldFit):
        fixed = {m: info.mean for m, info in design.moderators.items() if m != moderator and not info.categorical}
        est_lin = fit_lin.estimate(design.slope_rows_along(moderator, med, fixed), alpha)

    return est_lin


def _linearity_wald(design: Design, Xbin: np.ndarray, alpha: float, notes: list[str]) -> dict[str, Any] | None:
    """HC3 Wald test that the binning columns the linear model lacks are zero."""
    y = design.y
    wald: dict[str, Any] | None = None
    added = _added_columns(design.X, Xbin)
    if added.size:
        Xa = np.column_stack([design.X, Xbin[:, added]])
        if Xa.shape[0] > Xa.shape[1] + 1:
            Qa, Ra = np.linalg.qr(Xa, mode="reduced")
            fit_a = ols_fit("hc3", Qa, Ra, y, tuple(f"c{i}" for i in range(Xa.shape[1])))
            if isinstance(fit_a, WaldFit):
                L = np.zeros((added.size, Xa.shape[1]))
                L[np.arange(added.size), design.n_params + np.arange(added.size)] = 1.0
                jt = fit_a.joint_test(L, alpha)
                wald = {"statistic": _num(jt.statistic), "df": [int(jt.df_num), _num(jt.df_den)], "p": _num(jt.p),
                        "method": f"HC3 {jt.method}: binning columns beyond the model are zero"}
            else:
                notes.append(f"Wald test unavailable: {fit_a.reason}")
    else:
        notes.append("The model already spans the binning model; nothing to test.")
    return wald


def _bin_rows(G: np.ndarray, w: np.ndarray, d: np.ndarray, idx: np.ndarray, present: np.ndarray, med: np.ndarray,
              est_bin: Any, est_lin: Any, min_bin_rows: int, min_focal_spread: float
              ) -> tuple[list[dict[str, Any]], bool, bool]:
    """One entry per bin (range, rows, focal spread, its slope and the linear model's), and whether
    any bin is thin or has too little focal variation."""
    n, J = G.shape
    bin_rows: list[dict[str, Any]] = []
    sd_all = float(np.std(d, ddof=1)) if n > 1 else 0.0
    counts = G.sum(axis=0)
    means = (G * d[:, None]).sum(axis=0) / counts
    ss = (G * (d[:, None] - means) ** 2).sum(axis=0)
    focal_sd = np.sqrt(ss / np.maximum(counts - 1, 1))
    lows = np.array([w[idx == j].min() for j in present])
    highs = np.array([w[idx == j].max() for j in present])

    thin_any = False
    sparse_any = False
    for pos in range(J):
        thin = bool(counts[pos] < min_bin_rows)
        sparse = bool(sd_all > 0 and focal_sd[pos] < min_focal_spread * sd_all) or \
            np.unique(d[idx == present[pos]]).size < 2
        thin_any |= thin
        sparse_any |= sparse
        row: dict[str, Any] = {
            "range": [float(lows[pos]), float(highs[pos])], "n": int(counts[pos]), "median": float(med[pos]),
            "focal_sd": _num(focal_sd[pos]), "thin": thin, "low_focal_variation": bool(sparse),
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
    if not (isinstance(alpha, (int, float)) and not isinstance(alpha, bool) and 0 < alpha < 1):
        raise option_error("alpha", "a number in (0, 1)", alpha)
    conts = design.continuous_moderators
    if moderator is None:
        if not conts:
            return None
        moderator = conts[0]
    elif moderator not in conts:
        raise InputError(
            f"The binning check needs a continuous moderator; {moderator!r} is not one "
            f"(continuous moderators: {list(conts) or 'none'})."
        )
    w = np.asarray(design.moderators[moderator].values, dtype=float)
    d = design.data.frame[design.focal].to_numpy(dtype=float)
    y = design.y
    idx, cuts = _bin_index(w, bins, moderator)
    notes: list[str] = []
    present = np.unique(idx)
    if present.size < idx.max() + 1:
        notes.append("Some bins are empty (many tied moderator values); they were left out.")
    J = present.size
    if J < 2:
        return BinningCheck(moderator=moderator, cut_points=[float(c) for c in cuts], bins=[], wald=None,
                            nonlinear=None, alpha=float(alpha),
                            notes=(*notes, "Fewer than two non-empty bins; no check possible."))

    G = (idx[:, None] == present[None, :]).astype(float)  # n × J
    med = np.array([np.median(w[idx == j]) for j in present])  # J bins, not rows
    Wc = w[:, None] - med[None, :]
    blocks = np.column_stack([G, G * d[:, None], G * Wc, G * Wc * d[:, None]])
    cov_cols = _covariate_columns(design, moderator)
    Xbin = np.column_stack([blocks, design.X[:, cov_cols]])

    est_bin = _bin_slopes(Xbin, y, J, alpha, notes)

    est_lin = _linear_slopes(design, moderator, med, alpha)

    bin_rows, thin_any, sparse_any = _bin_rows(G, w, d, idx, present, med, est_bin, est_lin,
                                               min_bin_rows, min_focal_spread)
    if thin_any:
        notes.append(f"At least one bin has fewer than {min_bin_rows} rows; its slope is imprecise.")
    if sparse_any:
        notes.append(f"In at least one bin the focal predictor {design.focal!r} barely varies (lack of common support); "
                     "effects there rest on extrapolation.")
    if not design.focal_linear:
        notes.append(f"The bins use {design.focal!r} on its raw scale, while the model transforms it.")

    wald = _linearity_wald(design, Xbin, alpha, notes)
    nonlinear = None if wald is None or wald["p"] is None else bool(wald["p"] < alpha)
    return BinningCheck(moderator=moderator, cut_points=[float(c) for c in cuts], bins=bin_rows, wald=wald,
                        nonlinear=nonlinear, alpha=float(alpha), notes=tuple(notes), thin_bins=thin_any,
                        low_focal_variation=sparse_any)


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
