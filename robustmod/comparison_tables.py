"""The comparison's own tables: product term, slopes at chosen moderator values, significance
regions, and the tables each back-end contributes.

Every cell is taken from a back-end's answers as they are; nothing here estimates anything.
"""
from __future__ import annotations

from collections.abc import Mapping
from dataclasses import replace
from typing import TYPE_CHECKING, Any

from .tables import (
    FINE_KEYS,
    MINUS,
    Column,
    NotApplicable,
    Table,
    format_number,
    human_label,
    make_table,
    region_words,
    signed,
)

if TYPE_CHECKING:  # pragma: no cover
    from .compare import BackendResult, Comparison


def _level(c: Comparison) -> tuple[float, str]:
    level = 1 - c.spec.alpha
    return level, f"{100 * level:g}%"


def _scale(c: Comparison) -> str:
    d = c.design
    return ("coefficients on the mean-centred scale of " + ", ".join(d.centering) if d.centering
            else "raw (user's) scale")


def _uncertainty(r: BackendResult, point: Mapping[str, Any]) -> tuple[Any, Any, Any, Any]:
    """(SE, posterior SD, p, P(>0)): a posterior has an SD and a probability, not an SE and a p."""
    if r.kind == "posterior":
        return (NotApplicable("a posterior has a posterior SD"), point.get("se"),
                NotApplicable("no p-value for a posterior"), point.get("prob_positive"))
    return point.get("se"), NotApplicable("not a posterior"), point.get("p"), NotApplicable("not a posterior")


#: How a back-end that treats clustered rows as independent is labelled in every display.
ROWWISE = "assumes independent rows"


def _rowwise(c: Comparison) -> list[str]:
    return list(c.summary.get("assumes_independent_rows") or [])


def _label(c: Comparison, r: BackendResult) -> str:
    return f"{r.label} [{ROWWISE}]" if r.id in _rowwise(c) else r.label


def _rowwise_notes(c: Comparison) -> list[str]:
    ids = _rowwise(c)
    if not ids:
        return []
    return [f"{', '.join(ids)}: {ROWWISE}, which the clusters of {c.design.cluster_name!r} are not; shown, "
            "never counted as support."]


def _supported(c: Comparison, r: BackendResult) -> str:
    if not r.available:
        return "unavailable"
    text = "yes" if (r.interaction or {}).get("supported") else "no"
    if r.id in _rowwise(c):
        return text + f" (not counted: {ROWWISE})"
    return text if r.reliable else text + " (not counted: unreliable)"


def product_term_table(c: Comparison) -> Table:
    """One row per back-end: estimate, SE or posterior SD, interval, p or P(>0), support; for a
    joint test of several product terms, the statistic and its df in their own columns."""
    level, lv = _level(c)
    joint = len(c.design.interaction_terms) > 1
    rows, kinds = [], []
    for bid, r in c.results.items():
        it = r.interaction or {}
        if not r.available:
            na = NotApplicable(r.reason or "unavailable")
            cells: list[Any] = [bid, _label(c, r), na, na, na, na, na, na, na]
            cells += [na] * 4 if joint else []
            rows.append(cells + [_supported(c, r)])
            continue
        se, psd, p, pp = _uncertainty(r, it)
        if joint:
            jt = it.get("joint_test") or {}
            na = NotApplicable("a joint test of several product terms has no single estimate")
            cells = [bid, _label(c, r), na, na, na, na, na, p, pp, jt.get("method", ""), jt.get("statistic"),
                     jt.get("df_num"), jt.get("df_den") if jt.get("df_den") is not None else NotApplicable("χ² test")]
        else:
            ci = it.get("ci") or [None, None]
            cells = [bid, _label(c, r), it.get("estimate"), se, psd, ci[0], ci[1], p, pp]
            kinds.append(f"{bid}: {it.get('interval')}")
        rows.append(cells + [_supported(c, r)])
    cols = [Column("backend", "back-end", "code"), Column("label", "method", "text"),
            Column("estimate", "estimate", scale=_scale(c)), Column("se", "SE"), Column("posterior_sd", "posterior SD"),
            Column("ci_low", f"{lv} interval", pair="ci_high", level=level), Column("ci_high", "to", level=level),
            Column("p", "p", "p"), Column("prob_positive", "P(>0)", "prob")]
    if joint:
        cols += [Column("test", "joint test", "text"), Column("statistic", "statistic"), Column("df", "df", "df"),
                 Column("df_denominator", "denominator df", "df")]
    cols.append(Column("supported", "supported", "text"))
    terms = " + ".join(c.design.interaction_terms)
    d = c.design
    notes = [(f"{d.n_obs} rows used, {d.data.n_dropped} dropped; alpha = {c.spec.alpha:g}; {_scale(c)}; "
              f"primary back-end {c.primary} (chosen before looking).")]
    if kinds:
        notes.append("Interval types: " + "; ".join(kinds) + ".")
    notes += _rowwise_notes(c)
    unusable = {b for b in c.results if b in c.summary["unreliable"]}
    classes = {b: " ".join(x for x in ("primary" if b == c.primary else "", "unusable" if b in unusable else "") if x)
               for b in c.results}
    return make_table("product_term", f"Product term {terms} by back-end ({lv} intervals)", cols, rows,
                      notes=notes, source="compare", level=level, scale=_scale(c),
                      meta={"field": "interaction", "row_classes": classes})


def slopes_table(c: Comparison) -> Table:
    """The slope of the focal predictor at each chosen moderator value, per back-end."""
    level, lv = _level(c)
    mods = list(c.spec.moderators)
    rows = []
    for bid, r in c.results.items():
        for ce in r.conditional_effects:
            se, psd, p, pp = _uncertainty(r, ce)
            ci = ce.get("ci") or [None, None]
            at = ", ".join(f"{m} = {v if isinstance(v, str) else signed(v)}" for m, v in ce["at"].items())
            rows.append([bid, at, *[ce["at"].get(m) for m in mods], ce.get("estimate"), se, psd, ci[0], ci[1], p, pp,
                         bool(ce.get("significant")), bool(ce.get("within_observed", True))])
    at_cols = [Column(f"at_{m}", m, "text" if c.design.moderators[m].categorical else "number", hidden=True)
               for m in mods]
    cols = [Column("backend", "back-end", "code"), Column("at", "at", "text"), *at_cols, Column("estimate", "slope"), Column("se", "SE"),
            Column("posterior_sd", "posterior SD"), Column("ci_low", f"{lv} interval", pair="ci_high", level=level),
            Column("ci_high", "to", level=level), Column("p", "p", "p"), Column("prob_positive", "P(>0)", "prob"),
            Column("significant", "interval excludes 0", "flag"),
            Column("within_observed", "within observed range", "flag")]
    title = f"Slope of {c.spec.focal} at chosen values of {' and '.join(mods)} ({lv} intervals)"
    notes = [(f"Slopes per unit of {c.spec.focal} on its raw scale, at moderator values on their raw scale; a "
              "value outside the observed range is extrapolation."), *_rowwise_notes(c)]
    return make_table("slopes", title, cols, rows, notes=notes, source="compare", level=level,
                      scale="raw scale of the focal predictor and the moderators", meta={"field": "slope"})


def regions_table(c: Comparison) -> Table:
    """Johnson–Neyman region of each back-end in words, with its boundaries as numbers."""
    level, lv = _level(c)
    regs = {b: r.significance_region for b, r in c.results.items()}
    width = max((len(g["boundaries"]) for g in regs.values() if g), default=0)
    rows: list[list[Any]] = []
    for bid, g in regs.items():
        if g is None:
            na = NotApplicable(c.results[bid].reason or "no region")
            rows.append([bid, region_words(None) if c.results[bid].available else "unavailable", *[na] * width, na])
            continue
        bounds = list(g["boundaries"]) + [NotApplicable("no further boundary")] * (width - len(g["boundaries"]))
        rows.append([bid, region_words(g), *bounds, g.get("share_of_observed_significant")])
    moderator = next((g["moderator"] for g in regs.values() if g), "the moderator")
    cols = [Column("backend", "back-end", "code"), Column("region", f"where the slope of {c.spec.focal} is significant", "text"),
            *[Column(f"boundary_{i + 1}", f"boundary {i + 1}", scale=f"raw scale of {moderator}") for i in range(width)],
            Column("share_of_observed_significant", "share of observed rows in the region")]
    notes = [(f"Pointwise Johnson–Neyman region at {lv} along {moderator} (raw scale); boundaries outside the "
              "observed range are extrapolation."), *_rowwise_notes(c)]
    return make_table("regions", f"Significance region of the slope of {c.spec.focal} along {moderator}", cols, rows,
                      notes=notes, source="compare", level=level, scale=f"raw scale of {moderator}")


def cluster_table(c: Comparison) -> Table:
    """The clustering of the rows: clusters, their sizes, the residual ICC, the smallest Satterthwaite df."""
    info = c.clustering or {}
    low = info.get("smallest_df")
    cells = [info.get("column"), info.get("n_clusters"), info.get("size_min"), info.get("size_median"),
             info.get("size_max"), info.get("residual_icc"),
             NotApplicable("no back-end with Satterthwaite df was run") if low is None else low["df"],
             NotApplicable("no back-end with Satterthwaite df was run") if low is None else low["backend"]]
    cols = [Column("column", "cluster column", "code"), Column("n_clusters", "clusters", "integer"),
            Column("size_min", "rows per cluster, min", "integer"), Column("size_median", "median"),
            Column("size_max", "max", "integer"), Column("residual_icc", "residual ICC"),
            Column("smallest_df", "smallest Satterthwaite df", "df"), Column("smallest_df_backend", "of", "code")]
    notes = ["Residual ICC: one-way ANOVA intra-class correlation of the OLS residuals, ICC(1) (Shrout & Fleiss "
             "1979). Smallest df: over the product term and the reported slopes."]
    if info.get("few_clusters_caution"):
        notes.append(info["few_clusters_caution"])
    return make_table("clusters", f"Clustered rows ({info.get('column')})", cols, [cells], notes=notes,
                      source="compare")


# ---- tables a back-end contributes --------------------------------------------------------------

def backend_tables(r: BackendResult) -> list[Table]:
    """The back-end's own tables (``fit.report_tables()``). A fit that offers none yet has its
    extras shown generically with human labels — the one fallback, until every back-end
    implements the hook."""
    if r.fit is None:
        return []
    own = list(r.fit.report_tables())
    if own:  # every number names its back-end: the label heads each of its tables
        return [t if t.title.startswith(r.label) else replace(t, title=f"{r.label}: {t.title[:1].lower()}{t.title[1:]}")
                for t in own]
    return extras_tables(r.id, r.label, {k: v for k, v in r.extras.items() if k != "seconds"})


def _cell(v: Any) -> Any:
    if isinstance(v, (bool, int, float, str)) or v is None:
        return v
    if isinstance(v, (list, tuple)):
        if len(v) > 12:
            return f"{len(v)} values"
        return "; ".join(_text(x) for x in v)
    if isinstance(v, Mapping):
        return "; ".join(f"{human_label(str(k))}: {_text(x)}" for k, x in list(v.items())[:12])
    return str(v)


def _column(key: str, values: list[Any]) -> Column:
    plain = [v for v in values if v is not None and not isinstance(v, NotApplicable)]
    if plain and all(isinstance(v, bool) for v in plain):
        kind = "flag"
    elif plain and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in plain):
        kind = "fine" if key in FINE_KEYS else "number"
    else:
        kind = "text"
    return Column(str(key), human_label(str(key)), kind)  # type: ignore[arg-type]


def _mapping_table(key: str, title: str, rows_by: Mapping[str, Mapping[str, Any]], first: str, source: str) -> Table:
    names: list[str] = []
    for x in rows_by.values():
        names += [n for n in x if n not in names]
    raw = [[str(name)] + [_cell(x.get(n)) for n in names] for name, x in rows_by.items()]
    cols = [Column("name", first, "code")] + [_column(n, [row[j + 1] for row in raw]) for j, n in enumerate(names)]
    return make_table(key, title, cols, raw, source=source)


def extras_tables(bid: str, label: str, extras: Mapping[str, Any]) -> list[Table]:
    """Nested results of a back-end as tables: a dict of dicts or a list of dicts becomes a table,
    scalars become a two-column table of settings and values."""
    out, plain = [], []
    for key, value in extras.items():
        title = f"{label}: {human_label(str(key))}"
        if isinstance(value, Mapping) and value and all(isinstance(x, Mapping) for x in value.values()):
            out.append(_mapping_table(f"{bid}.{key}", title, value, "entry", bid))
        elif isinstance(value, Mapping) and value:
            inner = [(k, x) for k, x in value.items() if not isinstance(x, Mapping)]
            nested = {k: x for k, x in value.items() if isinstance(x, Mapping)}
            if inner:
                out.append(make_table(f"{bid}.{key}", title, (Column("quantity", "quantity", "text"), Column("value", "value", "text")),
                                      [(human_label(str(k)), _text(x, str(k))) for k, x in inner], source=bid))
            out += extras_tables(f"{bid}.{key}", title, nested)
        elif isinstance(value, list) and value and all(isinstance(x, Mapping) for x in value) and len(value) <= 50:
            out.append(_mapping_table(f"{bid}.{key}", title, {str(i + 1): x for i, x in enumerate(value)}, "row", bid))
        else:
            plain.append((human_label(str(key)), _text(value, str(key))))
    if plain:
        out.insert(0, make_table(f"{bid}.settings", f"{label}: settings and checks",
                                 (Column("quantity", "quantity", "text"), Column("value", "value", "text")), plain, source=bid))
    return out


def _text(v: Any, key: str = "") -> str:
    c = _cell(v)
    if key in FINE_KEYS and isinstance(c, float):
        return f"{c:.4f}"
    if isinstance(c, bool):
        return "yes" if c else "no"
    if isinstance(c, (int, float)):
        return format_number(c).replace("-", MINUS)
    return "—" if c is None else str(c)
