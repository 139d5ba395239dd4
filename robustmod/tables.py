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
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Literal

if TYPE_CHECKING:  # pragma: no cover
    import pandas as pd

#: How a renderer formats a column's cells.
#: text: as is; number: 3 significant digits; integer: whole number; p: "< 0.001" or 3 decimals;
#: prob: a probability from draws ("> 0.999" / "< 0.001" at the ends); flag: yes/no;
#: df: degrees of freedom (whole number when whole, else 1 decimal).
ColumnKind = Literal["text", "number", "integer", "p", "prob", "flag", "df"]


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
        return [dict(zip(self.keys, row)) for row in self.rows]

    def to_frame(self) -> pd.DataFrame:
        """A pandas DataFrame with machine keys as columns; NotApplicable becomes None."""
        import pandas as pd  # noqa: PLC0415  (pandas only when a frame is asked for)

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


def format_number(x: Any, digits: int = 3) -> str:
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
    if kind == "text":
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
    elif kind == "integer":
        out = "—" if cell is None or isinstance(cell, NotApplicable) else str(int(cell))  # type: ignore[arg-type]
    else:
        out = format_number(cell)
    if unicode_minus and out.startswith("-"):
        out = MINUS + out[1:]
    return out
