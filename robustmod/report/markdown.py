"""The appendix as Markdown (CommonMark with GitHub tables), rendered from the comparison's tables.

Names, formulas and any word Markdown would read as markup go into code spans; nothing is
written as an HTML entity or with backslash escapes.
"""
from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from typing import Any

from ..tables import Table, display_rows

#: A word Markdown could read as markup: emphasis, code, HTML tags, entities, escapes, strike-through.
_RISKY = re.compile(r"[`*_\\|<>]|&#?\w+;|~~")


def code(text: Any) -> str:
    """An inline code span around ``text`` (backtick fences longer than any run inside)."""
    s = str(text).replace("\r", " ").replace("\n", " ")
    run = max((len(m) for m in re.findall(r"`+", s)), default=0)
    fence = "`" * (run + 1)
    pad = " " if s.startswith("`") or s.endswith("`") or run else ""
    return f"{fence}{pad}{s}{pad}{fence}"


def md_escape(text: Any) -> str:
    """Plain text for Markdown: each word that Markdown could read as markup becomes a code
    span; a lone operator word ("<", ">", "*") is left as it is, as Markdown leaves it."""
    words = str(text).replace("\r", " ").replace("\n", " ").split(" ")
    out = []
    for w in words:
        core = w.rstrip(".,;:)")
        tail = w[len(core):]
        lead = ""
        if core.startswith("(") and len(core) > 1:
            lead, core = "(", core[1:]
        if len(core) > 1 and _RISKY.search(core):
            out.append(lead + code(core) + tail)
        else:
            out.append(w)
    return " ".join(out)


def _cell(text: str, kind: str) -> str:
    s = code(text) if kind == "code" and text != "—" else md_escape(text)
    return s.replace("|", "\\|")  # a pipe ends a table cell even inside a code span (GFM)


def table_markdown(t: Table, level: str = "###") -> list[str]:
    """One table: heading, GFM table, notes."""
    cols, rows = display_rows(t)
    out = [f"{level} {md_escape(t.title)}", ""]
    out.append("| " + " | ".join(_cell(c.label, "text") for c in cols) + " |")
    out.append("|" + "".join("---:|" if c.numeric else "---|" for c in cols))
    out += ["| " + " | ".join(_cell(x, c.kind) for x, c in zip(r, cols, strict=False)) + " |" for r in rows]
    out.append("")
    out += [md_escape(n) for n in t.notes if n] + ([""] if t.notes else [])
    return out


def _header(ctx: Mapping[str, Any]) -> list[str]:
    m, s = ctx["model"], ctx["summary"]
    lines = ["# Sensitivity appendix", ""] + ([md_escape(ctx["data_note"]), ""] if ctx.get("data_note") else [])
    mods = ", ".join(code(x) for x in m["moderators"])
    lines += [f"Model {code(m['formula'])}: focal predictor {code(m['focal'])}, moderator(s) {mods}; "
              f"{m['n_obs']} rows used, {m['n_dropped']} dropped; alpha = {m['alpha']:g}; primary back-end "
              f"{code(s['primary'])}; coefficients on the {md_escape(m['scale'])}.", "",
              "## Robustness summary", "", md_escape(s["sentence"]), ""]
    if ctx.get("warnings"):
        lines += ["## Warnings about the data and model", ""] + [f"- {md_escape(w)}" for w in ctx["warnings"]] + [""]
    return lines


def _section(title: str, tables: Sequence[Table], empty: str) -> list[str]:
    lines = [f"## {title}", ""]
    for t in tables:
        lines += table_markdown(t)
    return lines if tables else lines + [empty, ""]


def render_markdown(ctx: Mapping[str, Any]) -> str:
    """The appendix as Markdown, for pasting into a manuscript's supplement."""
    g = ctx["groups"]
    lines = _header(ctx)
    lines += _section("Comparison of back-ends", g["comparison"], "")
    lines += _section("Variance diagnostics", g["diagnostics"], "No diagnostics in these results.")
    lines += _section("Calibration", g["calibration"], "No calibration was run.")
    lines += _section("Checks and models of each back-end", g["backends"], "No back-end contributed tables of its own.")
    lines += ["## Figures", ""]
    for f in ctx["figures"]:
        if f["png"] is not None:
            lines += [f"![{md_escape(f['title'])}](figures/{f['name']}.png)", "",
                      f"*{md_escape(f['title'])}.* {md_escape(f['caption'])}", ""]
        else:
            lines += [f"*{md_escape(f['title'])}: not drawn ({md_escape(f['skipped'])}).*", ""]
    if ctx.get("grid"):
        from .grid_pages import markdown_section  # noqa: PLC0415

        lines += markdown_section(ctx["grid"])
    lines += ["## Cautions", ""] + [f"- {md_escape(c)}" for c in ctx["cautions"]] + [""]
    p = ctx["provenance"]
    lines += ["## Provenance", "", f"- written: {p['created_utc']}",
              f"- command: {code(p['command_line']) if p['command_line'] else 'called from Python'}",
              f"- data SHA-256: {p['data_sha256'] or 'not a file'}", f"- seed: {p['seed']}",
              "- versions: " + md_escape(", ".join(f"{k} {v}" for k, v in p["packages"].items())), ""]
    return "\n".join(lines)
