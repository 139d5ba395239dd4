"""The appendix tables as LaTeX (booktabs), rendered from the comparison's tables.

Every table fits the text block: its columns are paragraph columns whose widths add up to
``\\linewidth`` (the widths follow each column's content; the font steps down from
footnotesize when the numbers need it), names may break after ``_ : . /``, and numbers use
true minus signs. Needs ``\\usepackage{booktabs}``; nothing else beyond plain LaTeX.
"""
from __future__ import annotations

import re
import unicodedata
from collections.abc import Mapping, Sequence
from typing import Any

from ..tables import Table, display_rows

_LATEX = {"\\": r"\textbackslash{}", "&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#", "_": r"\_", "{": r"\{",
          "}": r"\}", "~": r"\textasciitilde{}", "^": r"\textasciicircum{}", "<": r"$<$", ">": r"$>$",
          "|": r"\textbar{}", "[": "{[}", "]": "{]}", "\n": " ", "\r": " "}
_LATEX_UNICODE = {"–": "--", "—": "---", "±": r"$\pm$", "·": r"$\cdot$", "²": r"$^2$", "≥": r"$\geq$",
                  "≤": r"$\leq$", "α": r"$\alpha$", "√": r"$\surd$", "−": r"$-$", "σ": r"$\sigma$",
                  "χ": r"$\chi$", "β": r"$\beta$", "γ": r"$\gamma$", "μ": r"$\mu$", "×": r"$\times$",
                  "…": r"\dots{}", "≈": r"$\approx$", "\u0302": "", "ᵢ": r"$_i$", "ⱼ": r"$_j$",
                  "ᵀ": r"$^{\top}$", "θ": r"$\theta$", "ε": r"$\varepsilon$", "η": r"$\eta$", "λ": r"$\lambda$",
                  "ν": r"$\nu$", "ρ": r"$\rho$", "τ": r"$\tau$", "φ": r"$\phi$", "ω": r"$\omega$", "Σ": r"$\Sigma$",
                  "Δ": r"$\Delta$", "∞": r"$\infty$", "≠": r"$\neq$", "→": r"$\to$", "∈": r"$\in$", "ψ": r"$\psi$",
                  **{chr(0x2080 + d): f"$_{d}$" for d in range(10)}, **{c: f"$^{d}$" for d, c in enumerate("⁰¹²³⁴⁵⁶⁷⁸⁹")}}
#: Characters after which a long name may break.
_BREAK_AFTER = set("_:./")

#: (font size command, assumed width of one character in pt) from largest to smallest;
#: widths are generous averages of Computer Modern at 8, 7 and 5 pt (common practice, no source).
_SIZES = ((r"\footnotesize", 4.1), (r"\scriptsize", 3.6), (r"\tiny", 2.7))
#: The text width assumed when sharing out columns: article class at 10 pt, 345 pt.
_TEXT_WIDTH = 345.0
_TABCOLSEP = 2.5


def _other(ch: str) -> str:
    """A character without a mapping: Latin letters as they are (LaTeX reads UTF-8 input), anything
    else by its compatibility decomposition to ASCII, so pdflatex never meets a glyph it lacks."""
    if ord(ch) < 0x250:
        return ch
    plain = unicodedata.normalize("NFKD", ch).encode("ascii", "ignore").decode()
    return "".join(_LATEX.get(c, c) for c in plain) if plain else "?"


def latex_escape(text: Any, *, breakable: bool = False) -> str:
    """Escape a string for LaTeX text mode (every special character, one pass).

    Brackets are braced so that a cell starting with '[' after a row end is not read as an
    optional argument. With ``breakable``, a line may break after ``_ : . /``.
    """
    out = []
    for ch in str(text):
        out.append(_LATEX[ch] if ch in _LATEX else _LATEX_UNICODE[ch] if ch in _LATEX_UNICODE else _other(ch))
        if breakable and ch in _BREAK_AFTER:
            out.append(r"\allowbreak{}")
    return "".join(out)


def _natural(header: str, texts: Sequence[str], numeric: bool) -> tuple[float, float]:
    """(wanted, smallest) width of a column in characters. A header word may be hyphenated, so
    it asks for at most six characters of the smallest width."""
    words = lambda t: re.split(r"[\s_:./\-–]", t)  # noqa: E731  (TeX may break after these)
    head = min(max((len(w) for w in words(header)), default=1), 6)
    longest = max([len(t) for t in texts] + [min(len(header), 12)], default=1)
    if numeric:
        half = max((max(len(p) for p in t.split(", ")) for t in texts), default=1)
        return float(longest), float(max(half, head))
    word = max((len(w) for t in texts for w in words(t)), default=1)
    return float(min(longest, 28)), float(max(min(max(word, 4), 12) + 1, head))  # letters run wider than digits


def _shrink(want: list[float], least: list[float], pick: list[bool], room: float) -> list[float]:
    """Shrink the picked columns towards their smallest widths, in proportion, to fit ``room``."""
    spare = sum(w - lo for w, lo, p in zip(want, least, pick, strict=False) if p)
    over = sum(want) - room
    ratio = 0.0 if spare <= 0 else max(0.0, 1 - over / spare)
    return [lo + ratio * (w - lo) if p else w for w, lo, p in zip(want, least, pick, strict=False)]


def column_widths(header: Sequence[str], rows: Sequence[Sequence[str]], numeric: Sequence[bool]) -> tuple[str, list[float]]:
    """The font size and each column's share of the line (the shares add up to at most 1).

    Text columns give way first; numbers keep their full width while they can."""
    wants = [_natural(h, [r[j] for r in rows], num) for j, (h, num) in enumerate(zip(header, numeric, strict=False))]
    text = [not n for n in numeric]
    for size, cw in _SIZES:
        want = [(w + 1) * cw + 2 * _TABCOLSEP for w, _ in wants]  # one character spare: letters vary in width
        least = [(m + 1) * cw + 2 * _TABCOLSEP for _, m in wants]
        if sum(want) <= _TEXT_WIDTH:
            return size, [w / _TEXT_WIDTH for w in want]
        fitted = _shrink(want, least, text, _TEXT_WIDTH)
        if sum(fitted) > _TEXT_WIDTH:
            fitted = _shrink(fitted, least, list(numeric), _TEXT_WIDTH)
        if sum(fitted) <= _TEXT_WIDTH + 1e-9 or size == _SIZES[-1][0]:
            scale = min(1.0, _TEXT_WIDTH / sum(fitted))
            return size, [w * scale / _TEXT_WIDTH for w in fitted]
    raise AssertionError("unreachable")  # pragma: no cover  (the last size always returns)


def _cell(text: str, numeric: bool) -> str:
    align = r"\raggedleft" if numeric else r"\raggedright"
    return rf"{align}\hspace{{0pt}}{latex_escape(text, breakable=not numeric)}"


def table_latex(t: Table) -> list[str]:
    """One table as a booktabs float whose width is at most ``\\linewidth``."""
    cols, rows = display_rows(t)
    header = [c.label for c in cols]
    numeric = [c.numeric for c in cols]
    size, shares = column_widths(header, rows, numeric)
    spec = "".join(rf"p{{\dimexpr {s:.3f}\linewidth-2\tabcolsep\relax}}" for s in shares)
    label = "tab:robustmod-" + re.sub(r"[^a-z0-9]+", "-", t.key.lower()).strip("-")
    out = [r"\begin{table}[htbp]", r"\centering", size, rf"\setlength{{\tabcolsep}}{{{_TABCOLSEP:g}pt}}",
           rf"\caption{{{latex_escape(t.title, breakable=True)}}}", rf"\label{{{label}}}",
           rf"\begin{{tabular}}{{@{{}}{spec}@{{}}}}", r"\toprule",
           " & ".join(_cell(h, n) for h, n in zip(header, numeric, strict=False)) + r" \tabularnewline", r"\midrule"]
    out += [" & ".join(_cell(x, n) for x, n in zip(r, numeric, strict=False)) + r" \tabularnewline" for r in rows]
    out += [r"\bottomrule", r"\end{tabular}"]
    if t.notes:
        notes = " ".join(latex_escape(n, breakable=True) for n in t.notes if n)
        out += [r"\par\smallskip", rf"{{\raggedright {notes}\par}}"]
    return out + [r"\end{table}", ""]


def render_latex(ctx: Mapping[str, Any]) -> str:
    """booktabs tables for a manuscript (needs \\usepackage{booktabs}); every string escaped."""
    m = ctx["model"]
    lines = ["% Sensitivity appendix tables. Needs \\usepackage{booktabs} in the preamble.",
             "% Model: " + latex_escape(m["formula"]) + "; summary: " + latex_escape(ctx["summary"]["sentence"]),
             *("% Warning: " + latex_escape(w) for w in ctx.get("warnings") or []), ""]
    for name in ("comparison", "diagnostics", "calibration", "backends"):
        for t in ctx["groups"][name]:
            lines += table_latex(t)
    if ctx.get("grid"):
        from .grid_pages import latex_section  # noqa: PLC0415

        lines += latex_section(ctx["grid"])
    return "\n".join(lines)
