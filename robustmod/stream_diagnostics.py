"""The default variance diagnostics and the binning check on data read in chunks.

The same results as :func:`robustmod.diagnostics.variance_diagnostics` in memory, from the streaming
kernels: Breusch–Pagan (Koenker) and White and the residual spread ride on the shared OLS residual
pass (:class:`robustmod.kernels.lmtests.AuxiliaryRegression`, :class:`robustmod.kernels.spread.ResidualSpread`);
Goldfeld–Quandt is :func:`robustmod.kernels.gq.goldfeld_quandt` (exact cut values, ties kept
together); the binning check is :func:`robustmod.kernels.binning.binning_fits`, whose first pass also
sums Goldfeld–Quandt's two groups (one pass over the file fewer). The tercile cut points
are computed once (exact streamed quantiles, as ``np.quantile``) and serve the spread table and the
binning check alike.
"""
from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

from .backends.base import WaldFit
from .diagnostics import GQ_DROP, SPREAD_BINS, VarianceDiagnostics, se_gap_of_fits
from .jsonvalues import num
from .kernels.accumulate import GroupGrams
from .kernels.binning import binning_fits
from .kernels.gq import Split, goldfeld_quandt, gq_split
from .kernels.lmtests import AuxiliaryRegression, ols_residual_passes
from .kernels.order import quantiles
from .kernels.spread import ResidualSpread
from .linearity import DEFAULT_BINS, MIN_BIN_ROWS, MIN_FOCAL_SPREAD, BinningCheck
from .tables import NotApplicable

if TYPE_CHECKING:  # pragma: no cover
    from .stream import StreamData


class DiagnosticPasses:
    """Set up before the shared OLS passes (:meth:`before_ols`), read after them (:meth:`result`)."""

    def __init__(self, data: StreamData, *, alpha: float) -> None:
        self.data, self.alpha = data, float(alpha)
        design = data.design
        self.moderator = design.continuous_moderators[0] if design.continuous_moderators else None
        self.bp, self.white = AuxiliaryRegression(white=False), AuxiliaryRegression(white=True)
        self.spread: ResidualSpread | None = None
        self.cuts: dict[int, np.ndarray] = {}

    def before_ols(self) -> None:
        """Tercile (and binning) cut points of the moderator, then hand the residual consumers to the OLS pass."""
        from .stream import _values  # noqa: PLC0415

        d = self.data
        if self.moderator is not None:
            wanted = sorted({SPREAD_BINS, DEFAULT_BINS})
            probs = sorted({j / b for b in wanted for j in range(1, b)})
            with d.stage(f"quantiles of {self.moderator}"):
                got = quantiles(_values(d.chunks, self.moderator), probs)
            at = dict(zip(probs, got, strict=True))
            self.cuts = {b: np.array([at[j / b] for j in range(1, b)]) for b in wanted}
            self.spread = ResidualSpread(self.moderator, self.cuts[SPREAD_BINS])
        d.consumers = [self.bp, self.white] + ([self.spread] if self.spread is not None else [])

    def result(self) -> VarianceDiagnostics:
        d = self.data
        fit = d.ols()
        redo = ols_residual_passes(d.chunks, fit.beta)
        with d.stage("Breusch–Pagan and White"):
            bp = {**self.bp.result(redo), "form": "Koenker (studentized), n·R² of squared residuals on the regressors"}
            wh = {**self.white.result(redo),
                  "form": "n·R² on levels, squares and cross-products (dependent columns dropped)"}
        gq = spread = lin = None
        if self.moderator is not None:
            with d.stage("Goldfeld–Quandt"):  # its cut values; its groups are summed in the binning check's pass 1
                split = gq_split(d.chunks, self.moderator, drop_share=GQ_DROP)
            assert self.spread is not None
            spread = {**self.spread.result(), "form": f"SD of OLS residuals (ddof 1) within moderator bins "
                                                      f"({SPREAD_BINS} quantile bins)"}
            with d.stage("binning check"):
                lin, side = self._binning(None if split is None else split.groups())
            if split is not None:
                with d.stage("Goldfeld–Quandt"):  # a pass of its own only when pass 1 did not run or was not accurate enough
                    gq = self._goldfeld_quandt(split, side)
        tests = [t for t in (bp, wh, gq) if t is not None]
        gap = self._se_gap()
        return VarianceDiagnostics(
            alpha=self.alpha, breusch_pagan=bp, white=wh,
            goldfeld_quandt=gq if gq is not None else NotApplicable("no continuous moderator, or halves too small to fit"),
            residual_spread=spread if spread is not None else NotApplicable("no moderator"),
            se_gap=gap if gap is not None else NotApplicable("a standard error could not be computed (e.g. leverage 1)"),
            linearity=lin if lin is not None else NotApplicable("no continuous moderator"),
            non_constant_variance=any(t["p"] is not None and t["p"] < self.alpha for t in tests),
        )

    def _goldfeld_quandt(self, split: Split, side: GroupGrams | None) -> dict[str, Any] | None:
        """As :func:`robustmod.diagnostics.goldfeld_quandt`, the form saying whether ties moved the cut;
        ``side``: the groups' cross-products from the binning check's first pass, when it ran."""
        assert self.moderator is not None
        out = goldfeld_quandt(self.data.chunks, self.moderator, drop_share=GQ_DROP, split=split, gathered=side)
        if out is None:
            return None
        n = self.data.design.n_obs
        tied = "" if out["group_sizes"]["low"] == out["group_sizes"]["high"] == (n - round(GQ_DROP * n)) // 2 \
            else ", rows tied at a cut kept in one group"
        return {**out, "form": f"sorted by {self.moderator}, middle {int(100 * GQ_DROP)}% dropped{tied}, "
                               "F = s²(high)/s²(low), two-sided"}

    def _se_gap(self) -> dict[str, Any] | None:
        """Classical vs HC3 SE of each product-term coefficient (King & Roberts 2015), as in memory."""
        d = self.data
        return se_gap_of_fits(d.design, [d.ols_fit(kind) for kind in ("ols", "hc3")])

    def _binning(self, side_groups: dict[str, tuple[float, float]] | None  # noqa: PLR0914 - mirrors linearity.binning_check field by field
                 ) -> tuple[BinningCheck, GroupGrams | None]:
        """As :func:`robustmod.linearity.binning_check` with its defaults, from the streamed bins, and the
        cross-products of ``side_groups`` summed in its first pass (None when that pass did not run)."""
        d, design, moderator = self.data, self.data.design, self.moderator
        assert moderator is not None
        info = design.moderators[moderator]
        cuts = self.cuts[DEFAULT_BINS]
        inside = bool(np.all(np.diff(cuts) > 0) and cuts[0] > info.minimum and cuts[-1] < info.maximum)
        bins: Any = [float(c) for c in cuts] if inside else DEFAULT_BINS  # the kernel recomputes the same cuts
        fits = binning_fits(d.chunks, focal=design.focal, moderator=moderator,
                            covariate_columns=design.columns_without({design.focal, moderator}), bins=bins,
                            alpha=self.alpha, side_groups=side_groups)
        s = fits.summary
        if s.present.size < 2:
            return BinningCheck(moderator=moderator, cut_points=[float(c) for c in s.cuts], bins=[], wald=None,
                                nonlinear=None, alpha=self.alpha,
                                notes=(*fits.notes, "Fewer than two non-empty bins; no check possible.")), fits.side
        notes = list(fits.notes)
        est_bin = fits.bin_slopes
        fit_lin = d.ols_fit("hc3")
        est_lin = None
        if isinstance(fit_lin, WaldFit):
            fixed = {m: i.mean for m, i in design.moderators.items() if m != moderator and not i.categorical}
            est_lin = fit_lin.estimate(design.slope_rows_along(moderator, s.medians, fixed), self.alpha)
        rows, thin_any, sparse_any = [], False, False
        for pos in range(s.present.size):
            thin = bool(s.counts[pos] < MIN_BIN_ROWS)
            sparse = bool(s.focal_sd_all > 0 and s.focal_sd[pos] < MIN_FOCAL_SPREAD * s.focal_sd_all) \
                or not bool(s.focal_varies[pos])
            thin_any |= thin
            sparse_any |= sparse
            row: dict[str, Any] = {
                "range": [float(s.lows[pos]), float(s.highs[pos])], "n": int(s.counts[pos]),
                "median": float(s.medians[pos]), "focal_sd": num(s.focal_sd[pos]), "thin": thin,
                "low_focal_variation": bool(sparse), "estimate": None, "se": None, "ci": [None, None],
                "linear_prediction": None, "linear_ci": [None, None], "outside": None,
            }
            if est_bin is not None:
                row.update(estimate=num(est_bin.estimate[pos]), se=num(est_bin.se[pos]),
                           ci=[num(est_bin.lower[pos]), num(est_bin.upper[pos])])
            if est_lin is not None:
                row.update(linear_prediction=num(est_lin.estimate[pos]),
                           linear_ci=[num(est_lin.lower[pos]), num(est_lin.upper[pos])])
            if est_bin is not None and est_lin is not None:
                row["outside"] = bool(est_lin.estimate[pos] < est_bin.lower[pos]
                                      or est_lin.estimate[pos] > est_bin.upper[pos])
            rows.append(row)
        if thin_any:
            notes.append(f"At least one bin has fewer than {MIN_BIN_ROWS} rows; its slope is imprecise.")
        if sparse_any:
            notes.append(f"In at least one bin the focal predictor {design.focal!r} barely varies (lack of common "
                         "support); effects there rest on extrapolation.")
        if not design.focal_linear:
            notes.append(f"The bins use {design.focal!r} on its raw scale, while the model transforms it.")
        jt = fits.wald
        wald: dict[str, Any] | None = None if jt is None else {
            "statistic": num(jt.statistic), "df": [int(jt.df_num), num(jt.df_den)], "p": num(jt.p),
            "method": f"HC3 {jt.method}: binning columns beyond the model are zero"}
        nonlinear = None if wald is None or wald["p"] is None else bool(wald["p"] < self.alpha)
        return BinningCheck(moderator=moderator, cut_points=[float(c) for c in s.cuts], bins=rows, wald=wald,
                            nonlinear=nonlinear, alpha=self.alpha, notes=tuple(notes), thin_bins=thin_any,
                            low_focal_variation=sparse_any), fits.side
