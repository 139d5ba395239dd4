"""The specification grid in the appendix: its tables and the specification-curve figure.

Both read a finished :class:`~robustmod.grid.GridResult` and compute no statistics.
"""
from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

from ..tables import Column, Table, make_table

if TYPE_CHECKING:  # pragma: no cover
    from matplotlib.figure import Figure

    from ..grid import GridResult


def _choice_text(choices: dict[str, Any]) -> str:
    cov = ", ".join(choices["covariates"]) or "none"
    return f"covariates: {cov}; outcome: {choices['outcome']}; outliers: {choices['outliers']}"


def grid_tables(result: GridResult) -> list[Table]:
    """Support per back-end, how each choice moves support, and the inferential test."""
    plan = result.plan
    level = 1 - plan.base.alpha
    rows = []
    for bid, s in result.summary.items():
        er = s["estimate_range"] or [None, None]
        br = s["boundary_range_within_observed"] or [None, None]
        rows.append([bid, s["n_specifications"], s["share_supported"], er[0], er[1], br[0], br[1], s["n_unavailable"]])
    support = make_table(
        "grid.support", f"Support for the product term across {len(result.specifications):,} specifications",
        [Column("backend", "back-end", "text"), Column("n", "specifications", "integer"),
         Column("share_supported", "share supported", "number"),
         Column("estimate_min", "smallest estimate"), Column("estimate_max", "largest estimate"),
         Column("boundary_min", "lowest boundary inside observed range"),
         Column("boundary_max", "highest boundary inside observed range"),
         Column("n_unavailable", "not available", "integer")],
        rows, source="grid", level=level,
        notes=["Supported: the product term's test rejects at alpha = "
               f"{plan.base.alpha:g} (for a posterior: the {100 * level:g}% interval excludes zero)."])
    moves = []
    for bid, s in result.summary.items():
        for r in s["by_choice"]:
            moves.append([bid, r["choice"], r["value"], r["share_supported_on"], r["n_on"], r["share_supported_off"],
                          r["n_off"]])
    by_choice = make_table(
        "grid.by_choice", "How each choice moves support",
        [Column("backend", "back-end", "text"), Column("choice", "choice", "text"), Column("value", "value", "text"),
         Column("share_on", "share supported with it"), Column("n_on", "specifications with it", "integer"),
         Column("share_off", "share supported without it"), Column("n_off", "specifications without it", "integer")],
        moves, source="grid")
    tables = [support, by_choice]
    t = result.test
    if t is not None:
        tables.append(make_table(
            "grid.inferential_test",
            f"Inferential test of the whole grid ({t['resamples']} datasets generated under no moderation)",
            [Column("statistic", "statistic", "text"), Column("observed", "observed"),
             Column("null_median", "median under no moderation"), Column("p", "p", "p")],
            [[f"share supported ({t['direction']} direction)", t["share_supported"], t["share_supported_null_median"],
              t["share_supported_p"]],
             ["median estimate", t["median_estimate"], t["median_estimate_null_median"], t["median_estimate_p"]]],
            source="grid",
            notes=[f"Simonsohn, Simmons & Nelson (2020); {t['method']}.",
                   "On simulated data without moderation this test rejected at about alpha at n = 150 "
                   "(validation/grid_null.py); its p-value is never a reason to prefer one specification.",
                   "Estimates of specifications with a transformed outcome are on another scale, so the median "
                   "estimate mixes scales when outcome rules are crossed; the share supported does not."]))
    return tables


def specification_rows(result: GridResult) -> Table:
    """One row per specification and back-end (the CSV of the grid)."""
    rows = []
    for sp in result.specifications:
        c = sp["choices"]
        for bid, res in (sp.get("backends") or {}).items():
            r = res or {}
            ci = r.get("ci") or [None, None]
            rows.append([sp["index"], ";".join(c["covariates"]), c["outcome"], c["outliers"], sp.get("rows_used"), bid,
                         r.get("estimate"), r.get("se"), ci[0], ci[1], r.get("p"), r.get("supported"),
                         r.get("reason") or sp.get("reason")])
    return make_table(
        "grid.specifications", "Every specification",
        [Column("specification", "specification", "integer"), Column("covariates", "covariates", "text"),
         Column("outcome", "outcome rule", "text"), Column("outliers", "outlier rule", "text"),
         Column("rows_used", "rows used", "integer"), Column("backend", "back-end", "text"),
         Column("estimate", "estimate"), Column("se", "SE"), Column("ci_low", "interval low"),
         Column("ci_high", "interval high"), Column("p", "p", "p"), Column("supported", "supported", "flag"),
         Column("reason", "note", "text")],
        rows, source="grid", level=1 - result.plan.base.alpha)


def specification_curve_figure(result: GridResult, backend: str | None = None) -> Figure:
    """Estimates sorted with their intervals (filled = supported, open = not; the primary ringed),
    and under them which choice each specification made."""
    from .figures import OKABE_ITO, _style  # noqa: PLC0415

    plan = result.plan
    bid = backend or ("hc3" if "hc3" in plan.backends else plan.backends[0])
    specs = [sp for sp in result.specifications if (sp.get("backends") or {}).get(bid)
             and sp["backends"][bid].get("estimate") is not None]
    order = sorted(specs, key=lambda sp: sp["backends"][bid]["estimate"])
    est = np.array([sp["backends"][bid]["estimate"] for sp in order], dtype=float)
    ci = np.array([sp["backends"][bid].get("ci") or [np.nan, np.nan] for sp in order], dtype=float)
    sup = np.array([bool(sp["backends"][bid]["supported"]) for sp in order])
    labels = ([("covariate", c, f"with {c}") for c in plan.optional]
              + [("outcome", r, f"outcome: {r}") for r in plan.outcomes if len(plan.outcomes) > 1]
              + [("outliers", r, f"outliers: {r}") for r in plan.outliers if len(plan.outliers) > 1])
    prim = result.primary_index()
    with _style() as plt:
        fig, (top, bottom) = plt.subplots(2, 1, figsize=(7.0, 4.2 + 0.18 * len(labels)), sharex=True,
                                          gridspec_kw={"height_ratios": [3, max(1, 0.35 * len(labels))]})
        x = np.arange(len(order))
        top.vlines(x, ci[:, 0], ci[:, 1], color=OKABE_ITO["blue"], linewidth=0.8, alpha=0.7)
        top.scatter(x[sup], est[sup], s=14, color=OKABE_ITO["blue"], label="supported", zorder=3)
        top.scatter(x[~sup], est[~sup], s=14, facecolors="white", edgecolors=OKABE_ITO["blue"],
                    label="not supported", zorder=3)
        where = [i for i, sp in enumerate(order) if sp["index"] == prim]
        if where:
            top.scatter(where, est[where], s=90, facecolors="none", edgecolors=OKABE_ITO["vermillion"], linewidths=1.6,
                        label="primary specification", zorder=4)
        top.axhline(0, color="#444444", linewidth=0.8)
        top.set_ylabel(f"product term ({bid})")
        top.set_title(f"Specification curve: {len(order)} specifications, {100 * (1 - plan.base.alpha):g}% intervals")
        top.legend(loc="upper left")
        for row, (kind, value, _) in enumerate(labels):
            made = [(value in sp["choices"]["covariates"]) if kind == "covariate" else sp["choices"][kind] == value
                    for sp in order]
            bottom.scatter(x[np.array(made, dtype=bool)], np.full(int(np.sum(made)), row), s=6, marker="s",
                           color="#444444")
        bottom.set_yticks(range(len(labels)), [lab for *_, lab in labels])
        bottom.set_ylim(-0.7, len(labels) - 0.3)
        bottom.invert_yaxis()
        bottom.set_xlabel("specifications, sorted by estimate")
        bottom.grid(False)
        fig.tight_layout()
    return fig


__all__ = ["grid_tables", "specification_curve_figure", "specification_rows", "_choice_text"]
