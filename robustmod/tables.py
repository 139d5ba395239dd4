"""Typed, labelled result tables: the one source every display renders from.

A :class:`Table` holds typed cells (floats, ints, text, flags, or :class:`NotApplicable`
carrying the reason a quantity does not apply) and :class:`Column` descriptions with a
human label, a machine key, a kind that tells renderers how to format the cell, and the
level and scale the numbers are on. Renderers (terminal, Jupyter HTML, appendix HTML,
Markdown, LaTeX, CSV, JSON) format cells by column kind and never recompute statistics.

Back-ends contribute tables of their own (e.g. the WLS variance model) through the
``report_tables()`` hook of the back-end contract; the tables' ``source`` names the
back-end, so no display module has to.
"""
from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Literal

if TYPE_CHECKING:  # pragma: no cover
    import pandas as pd

#: Keys whose values need four decimals to be read (an R-hat of 1.004 is not "1").
FINE_KEYS = frozenset({"rhat", "max_rhat", "r_hat"})

#: How a renderer formats a column's cells.
#: text: as is; number: 3 significant digits; integer: whole number; p: "< 0.001" or 3 decimals;
#: prob: a probability from draws ("> 0.999" / "< 0.001" at the ends); flag: yes/no;
#: df: degrees of freedom (whole number when whole, else 1 decimal).
#: code: an identifier or formula (code span in Markdown, monospace in HTML).
ColumnKind = Literal["text", "code", "number", "integer", "p", "prob", "flag", "df"]


@dataclass(frozen=True)
class NotApplicable:
    """A cell whose quantity does not apply or could not be computed, with the reason."""

    reason: str

    def __str__(self) -> str:
        return "—"


@dataclass(frozen=True)
class Column:
    """One column: machine ``key`` (CSV/JSON), human ``label``, the ``kind`` of its cells.

    ``level`` (e.g. 0.95) and ``scale`` (e.g. "raw scale of w") describe the numbers when
    they are intervals or on a transformed scale; renderers may show them in a note.
    """

    key: str
    label: str
    kind: ColumnKind = "number"
    level: float | None = None
    scale: str | None = None
    #: Key of a second column shown together with this one as "[low, high]" (an interval);
    #: CSV and JSON keep the two ends as separate numeric columns.
    pair: str | None = None
    #: Kept for CSV/JSON and frames but not shown (e.g. numeric twins of a worded column).
    hidden: bool = False


Cell = float | int | str | bool | NotApplicable | None


@dataclass(frozen=True)
class Table:
    """A titled table of typed rows.

    ``key`` is a stable machine name ("product_term", "wls.variance_model"); ``source`` is
    the back-end id or the module ("diagnostics") that produced it; ``notes`` are sentences
    that belong under the table in every display.
    """

    key: str
    title: str
    columns: tuple[Column, ...]
    rows: tuple[tuple[Cell, ...], ...]
    notes: tuple[str, ...] = ()
    source: str | None = None
    level: float | None = None
    scale: str | None = None
    meta: dict[str, Any] = field(default_factory=dict, compare=False)

    def __post_init__(self) -> None:
        width = len(self.columns)
        for i, row in enumerate(self.rows):
            if len(row) != width:
                raise ValueError(f"table {self.key!r}: row {i} has {len(row)} cells for {width} columns")

    @property
    def keys(self) -> tuple[str, ...]:
        return tuple(c.key for c in self.columns)

    def column(self, key: str) -> list[Cell]:
        j = self.keys.index(key)
        return [row[j] for row in self.rows]

    def records(self) -> list[dict[str, Cell]]:
        """Rows as dicts keyed by column key (NotApplicable kept as is)."""
        return [dict(zip(self.keys, row, strict=False)) for row in self.rows]

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON: columns with their labels, kinds, level and scale; rows keyed by column;
        a cell that does not apply is null and its reason is listed under ``not_applicable``."""
        reasons = [{"row": i, "column": k, "reason": c.reason}
                   for i, row in enumerate(self.rows) for k, c in zip(self.keys, row, strict=False) if isinstance(c, NotApplicable)]
        return {
            "key": self.key, "title": self.title, "source": self.source, "level": self.level, "scale": self.scale,
            "columns": [{"key": c.key, "label": c.label, "kind": c.kind, "level": c.level, "scale": c.scale,
                         "pair": c.pair, "hidden": c.hidden} for c in self.columns],
            "rows": [{k: (None if isinstance(c, NotApplicable) else c) for k, c in zip(self.keys, row, strict=False)}
                     for row in self.rows],
            "not_applicable": reasons, "notes": list(self.notes),
        }

    def to_frame(self) -> pd.DataFrame:
        """A pandas DataFrame with machine keys as columns; NotApplicable becomes None."""
        import pandas as pd

        data = [[None if isinstance(c, NotApplicable) else c for c in row] for row in self.rows]
        return pd.DataFrame(data, columns=list(self.keys))


def make_table(key: str, title: str, columns: Sequence[Column], rows: Iterable[Sequence[Cell]], *,
               notes: Sequence[str] = (), source: str | None = None, level: float | None = None,
               scale: str | None = None, meta: dict[str, Any] | None = None) -> Table:
    """Build a Table from any sequences (tuples are made here, so callers may pass lists)."""
    return Table(key, title, tuple(columns), tuple(tuple(r) for r in rows), tuple(notes), source, level, scale,
                 dict(meta or {}))


# ---- cell formatting shared by every text renderer ---------------------------------------

MINUS = "\u2212"


def format_number(x: Any, digits: int = 3) -> str:  # noqa: PLR0911 - one return per display rule, read top to bottom
    """Three significant digits; scientific notation outside [1e-3, 1e5); '—' for missing."""
    if x is None or isinstance(x, NotApplicable):
        return "—"
    if isinstance(x, bool):
        return "yes" if x else "no"
    if isinstance(x, int):
        return str(x)
    x = float(x)
    if not math.isfinite(x):
        return "—"
    if x == 0:
        return "0"
    if abs(x) >= 1e5 or abs(x) < 1e-3:
        return f"{x:.{digits - 1}e}"
    if abs(x) >= 10 ** digits:  # 1234.5 reads "1235", not "1.23e+03"
        return f"{x:.0f}"
    return f"{x:.{digits}g}"


def format_p(p: Any) -> str:
    if p is None or isinstance(p, NotApplicable):
        return "—"
    return "< 0.001" if p < 0.001 else f"{p:.3f}"


def format_prob(p: Any, n_draws: int | None = None) -> str:
    """A probability estimated from draws: never '1' or '0' for finitely many draws."""
    if p is None or isinstance(p, NotApplicable):
        return "—"
    if p >= 0.999:
        return "> 0.999"
    if p <= 0.001:
        return "< 0.001"
    return f"{p:.3f}"


def format_df(df: Any) -> str:
    if df is None or isinstance(df, NotApplicable):
        return "—"
    df = float(df)
    return f"{df:.0f}" if abs(df - round(df)) < 1e-9 else f"{df:.1f}"


def format_cell(cell: Cell, kind: ColumnKind, *, unicode_minus: bool = False) -> str:
    """The text of one cell for a column of ``kind``."""
    if kind in ("text", "code"):
        out = "—" if cell is None or isinstance(cell, NotApplicable) else str(cell)
        return out
    if kind == "flag":
        out = "—" if cell is None or isinstance(cell, NotApplicable) else ("yes" if cell else "no")
        return out
    if kind == "p":
        out = format_p(cell)
    elif kind == "prob":
        out = format_prob(cell)
    elif kind == "df":
        out = format_df(cell)
    elif kind == "fine":
        out = "—" if not isinstance(cell, (int, float)) or not math.isfinite(cell) else f"{float(cell):.4f}"
    elif kind == "integer":
        out = "—" if cell is None or isinstance(cell, NotApplicable) else str(int(cell))
    else:
        out = format_number(cell)
    if unicode_minus:
        out = out.replace("-", MINUS)
    return out


NUMERIC_KINDS = frozenset({"number", "integer", "p", "prob", "df", "fine"})


@dataclass(frozen=True)
class DisplayColumn:
    """A column as displays show it: one table column, or an interval made of two."""

    label: str
    kind: ColumnKind
    keys: tuple[str, ...]

    @property
    def numeric(self) -> bool:
        return self.kind in NUMERIC_KINDS


def display_columns(table: Table) -> list[DisplayColumn]:
    """The columns a display shows: a column with ``pair`` absorbs its partner."""
    partners = {c.pair for c in table.columns if c.pair}
    out = []
    for j, c in enumerate(table.columns):
        if c.key in partners or c.hidden:
            continue
        if table.rows and all(isinstance(r[j], NotApplicable) for r in table.rows) and c.kind != "text":
            continue  # a quantity no row has (e.g. a posterior SD with no posterior): CSV/JSON keep it
        out.append(DisplayColumn(c.label, c.kind, (c.key, c.pair) if c.pair else (c.key,)))
    return out


def display_cell(table: Table, row: Sequence[Cell], col: DisplayColumn, *, unicode_minus: bool = True) -> str:
    """The text of one display cell; an interval reads "[low, high]"."""
    cells = [row[table.keys.index(k)] for k in col.keys]
    if len(cells) == 2:
        if all(c is None or isinstance(c, NotApplicable) for c in cells):
            return "—"
        lo, hi = (format_cell(c, col.kind, unicode_minus=unicode_minus) for c in cells)
        return f"[{lo}, {hi}]"
    return format_cell(cells[0], col.kind, unicode_minus=unicode_minus)


def display_rows(table: Table, *, unicode_minus: bool = True) -> tuple[list[DisplayColumn], list[list[str]]]:
    """Display columns and the formatted text of every row."""
    cols = display_columns(table)
    return cols, [[display_cell(table, r, c, unicode_minus=unicode_minus) for c in cols] for r in table.rows]


def render_text(table: Table) -> str:
    """The table as aligned plain text for a terminal: title, header, rule, rows, notes."""
    cols, rows = display_rows(table)
    header = [c.label for c in cols]
    widths = [max(len(x) for x in col) for col in zip(header, *rows, strict=False)]
    fmt = [(str.rjust if c.numeric else str.ljust) for c in cols]
    lines = [table.title]
    lines.append("  " + "  ".join(h.ljust(w) for h, w in zip(header, widths, strict=False)))
    lines.append("  " + "  ".join("-" * w for w in widths))
    lines += ["  " + "  ".join(f(x, w) for f, x, w in zip(fmt, r, widths, strict=False)).rstrip() for r in rows]
    lines += [f"  Note: {n}" for n in table.notes]
    return "\n".join(lines)


def _json_cell(cell: Cell) -> str:
    import json

    return json.dumps(None if isinstance(cell, NotApplicable) else cell, allow_nan=False)


def render_html(table: Table, *, heading: str = "h3") -> str:
    """The table as an HTML fragment (every text escaped).

    Numeric cells carry ``data-field`` (the table's ``meta["field"]`` prefix, or its key, and
    the column key), ``data-value`` (the exact JSON value) and, when the table has a
    ``backend`` column, ``data-backend``.
    """
    import html

    esc = html.escape
    cols, rows = display_rows(table)
    prefix = table.meta.get("field", table.key)
    has_backend = "backend" in table.keys
    head = "".join(f"<th>{esc(c.label)}</th>" for c in cols)
    body = []
    for raw, shown in zip(table.rows, rows, strict=False):
        who = f' data-backend="{esc(str(raw[table.keys.index("backend")]))}"' if has_backend else ""
        cells = []
        for col, text in zip(cols, shown, strict=False):
            if col.numeric:
                vals = [raw[table.keys.index(k)] for k in col.keys]
                value = _json_cell(vals[0]) if len(vals) == 1 else "[" + ", ".join(_json_cell(v) for v in vals) + "]"
                cells.append(f'<td class="num" data-field="{esc(prefix)}-{esc(col.keys[0].removesuffix("_low"))}"'
                             f'{who} data-value="{esc(value)}">{esc(text)}</td>')
            elif col.kind == "code":
                cells.append(f"<td><code>{esc(text)}</code></td>")
            else:
                cells.append(f"<td>{esc(text)}</td>")
        row_class = table.meta.get("row_classes", {}).get(raw[table.keys.index("backend")] if has_backend else None)
        cls = f' class="{esc(row_class)}"' if row_class else ""
        body.append(f"<tr{cls}{who}>" + "".join(cells) + "</tr>")
    notes = "".join(f'<p class="note">{esc(n)}</p>' for n in table.notes)
    return (f'<{heading} id="table-{esc(table.key)}">{esc(table.title)}</{heading}>\n'
            f'<table data-table="{esc(table.key)}"><thead><tr>{head}</tr></thead><tbody>\n'
            + "\n".join(body) + f"\n</tbody></table>\n{notes}")


# ---- words ---------------------------------------------------------------------------------

def signed(x: Any) -> str:
    """:func:`format_number` with a true minus sign."""
    return format_number(x).replace("-", MINUS)


def _piece(lo: Any, hi: Any, name: str) -> str:
    f = signed
    if lo is None and hi is None:
        return f"for every value of {name}"
    if lo is None:
        return f"where {name} < {f(hi)}"
    if hi is None:
        return f"where {name} > {f(lo)}"
    return f"between {f(lo)} and {f(hi)}"


def _overlaps(lo: Any, hi: Any, obs: Sequence[Any]) -> bool:
    if obs[0] is None or obs[1] is None:
        return True
    return (lo is None or lo <= obs[1]) and (hi is None or hi >= obs[0])


def _join(pieces: list[str], name: str) -> str:
    if len(pieces) == 2 and pieces[0].startswith(f"where {name} <") and pieces[1].startswith(f"where {name} >"):
        return f"where {name} < {pieces[0].rsplit(' ', 1)[1]} or > {pieces[1].rsplit(' ', 1)[1]}"
    return " and ".join(pieces)


def region_words(region: Mapping[str, Any] | None) -> str:
    """A significance region in words: "significant where w > 13.9", "significant between 2.58
    and 5.64", "significant where w < 2.1 or > 8.3"; parts and boundaries outside the observed
    range are said to be extrapolation."""
    if region is None:
        return "no region (no continuous moderator)"
    name = str(region.get("moderator", "the moderator"))
    obs = list(region.get("observed_range") or [None, None])
    spans = [(lo, hi) for lo, hi in region.get("significant_intervals") or []]
    if not spans:
        return "significant nowhere in the range searched"
    inside = [_piece(lo, hi, name) for lo, hi in spans if _overlaps(lo, hi, obs)]
    outside = [_piece(lo, hi, name) for lo, hi in spans if not _overlaps(lo, hi, obs)]
    where = f"the observed range {signed(obs[0])} to {signed(obs[1])}"
    text = ("significant " + _join(inside, name)) if inside else f"significant nowhere in {where}"
    far = [b for lo, hi in spans if _overlaps(lo, hi, obs) for b in (lo, hi)
           if b is not None and obs[0] is not None and not obs[0] <= b <= obs[1]]
    if far:
        text += (f" (boundar{'y' if len(far) == 1 else 'ies'} {', '.join(signed(b) for b in far)} outside {where}: "
                 "extrapolation)")
    if outside:
        text += f"; also {_join(outside, name)}, outside {where} (extrapolation)"
    return text


#: Human labels of keys that results dictionaries use (displays never show a raw key).
LABELS = {
    "mc_se": "Monte Carlo SE", "nominal_mc_se": "Monte Carlo SE of a rate at the nominal level",
    "simulated_from": "simulated from", "target_accept": "target acceptance rate", "n_draws": "number of draws",
    "draws": "draws per chain", "tune": "tuning steps per chain", "chains": "chains", "rhat": "R-hat",
    "max_rhat": "largest R-hat", "min_ess_bulk": "smallest bulk ESS", "min_ess_tail": "smallest tail ESS",
    "ess_bulk": "bulk ESS", "ess_tail": "tail ESS", "elpd_loo": "elpd (PSIS-LOO)", "p_loo": "effective parameters (p_loo)",
    "loo": "PSIS-LOO comparison of the variance models", "diagnostics": "convergence (R-hat, ESS, divergences)",
    "se": "SE", "sd": "SD", "ci": "interval", "n": "rows", "df": "df", "p": "p", "n_datasets": "simulated datasets",
    "rate": "rate", "failed": "failed fits", "product_term_under_power": "product term under the power scenario",
    "methods": "how each back-end was run", "unavailable": "not calibrated", "seed": "seed",
    "variance_model": "variance model", "prior_sensitivity": "prior sensitivity", "predictive_check": "predictive check",
    "sampler": "sampler settings", "likelihood": "likelihood", "prior_scale": "prior scale",
    "sigma": "residual SD (σ̂)", "df_resid": "residual df", "r_squared": "R²", "max_leverage": "largest leverage",
    "loglik": "log-likelihood", "loglik_constant": "log-likelihood with constant variance", "aic": "AIC",
    "aic_constant": "AIC with constant variance", "z_terms": "terms of the variance model",
    "weight_ratio": "largest / smallest weight", "scale_s2": "scale factor s²", "lr_test":
    "likelihood-ratio test of constant variance", "gamma": "coefficients of the variance model (log scale)",
    "se_type": "SE type", "source_column": "source column", "zero_residuals_raised": "zero residuals raised",
    "divergences": "divergent transitions", "per_term": "per coefficient", "thresholds": "thresholds",
    "elpd_difference": "elpd difference (modelled − constant variance)", "elpd_difference_se": "SE of the elpd difference",
    "max_shift_in_posterior_sd": "largest shift of the posterior mean (in posterior SDs)",
    "heteroscedastic": "modelled variance", "constant_variance": "constant variance",
}


def human_label(key: str) -> str:
    """A readable label for a results key ("nominal_mc_se" → "Monte Carlo SE of a rate …")."""
    if key in LABELS:
        return LABELS[key]
    words = [LABELS.get(w, w) if w in ("se", "sd", "ci", "df", "rhat") else w for w in str(key).split("_")]
    return " ".join(words).replace("pareto k above 0.7", "rows with Pareto k above 0.7")


def join_notes(notes: Iterable[str]) -> str:
    """Notes as one paragraph of sentences (never a Python list)."""
    out = []
    for note in notes:
        n = str(note).strip()
        if n:
            out.append(n if n.endswith((".", "!", "?", ")")) else n + ".")
    return " ".join(out)
