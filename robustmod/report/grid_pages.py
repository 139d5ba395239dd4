"""The specification grid on the page: its section of the appendix (HTML, Markdown, LaTeX), its CSV
and figure, and the grid's own folder written by ``robustmod grid``.

Every table is rendered from :func:`~robustmod.report.grid_report.grid_tables` by the renderers
the appendix uses for all its tables; nothing here computes a statistic.
"""
from __future__ import annotations

import platform
from collections.abc import Mapping
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

from ..tables import render_html as render_table_html
from .grid_report import _choice_text, grid_tables, specification_curve_figure, specification_rows
from .latex import latex_escape, table_latex
from .markdown import code, md_escape, table_markdown
from .writers import _dump, atomic_folder, package_versions, render_table_csv

if TYPE_CHECKING:  # pragma: no cover
    from ..grid import GridResult
    from .figures import FigureRecord

#: Files of the grid's own folder (the figure comes on top, under figures/).
GRID_FILES = ("grid.html", "grid.md", "grid.tex", "grid.csv", "results.json", "provenance.json")
FIGURE_NAME = "specification_curve"
FIGURE_TITLE = "Specification curve"
FIGURE_CAPTION = ("The product term of every specification, sorted by its estimate, with its interval (filled: "
                  "supported; open: not); the ringed point is the primary specification, fixed before the grid "
                  "was run. Below, the choices each specification made.")


def render_grid_csv(result: GridResult) -> str:
    """One row per specification and back-end, numbers as numbers."""
    return render_table_csv(specification_rows(result))


def grid_figure(result: GridResult, folder: Path) -> FigureRecord:
    """The specification curve as PNG and PDF in ``folder`` (or the reason it was not drawn)."""
    from .figures import FigureRecord, save_figure  # noqa: PLC0415  (matplotlib only when writing)

    have = any(r and r.get("estimate") is not None for sp in result.specifications
               for r in (sp.get("backends") or {}).values())
    if not have:
        return FigureRecord(FIGURE_NAME, FIGURE_TITLE, FIGURE_CAPTION,
                            skipped="no specification has an estimate of the product term")
    folder.mkdir(parents=True, exist_ok=True)
    png, pdf = save_figure(specification_curve_figure(result), folder / FIGURE_NAME)
    return FigureRecord(FIGURE_NAME, FIGURE_TITLE, FIGURE_CAPTION, png=png, pdf=pdf)


def grid_context(result: GridResult, figures: Path) -> dict[str, Any]:
    """What the pages show of the grid: its tables, figure, primary, counts and cautions."""
    from ..grid import GRID_CAUTIONS  # noqa: PLC0415

    fig = grid_figure(result, figures)
    src = None
    if fig.png is not None:
        import base64  # noqa: PLC0415

        src = "data:image/png;base64," + base64.b64encode(fig.png.read_bytes()).decode("ascii")
    plan = result.plan
    return {
        "n": len(result.specifications), "backends": list(plan.backends), "formula": plan.base.formula,
        "primary": _choice_text(plan.primary.choices()), "tables": grid_tables(result),
        "figure": {"name": fig.name, "title": fig.title, "caption": fig.caption, "skipped": fig.skipped,
                   "src": src, "png": fig.png},
        "cautions": list(GRID_CAUTIONS),
    }


# ---- the section in each format ---------------------------------------------------------------
def intro(g: Mapping[str, Any]) -> str:
    return (f"{g['n']:,} specifications, each fitted with {', '.join(g['backends'])}. The primary specification "
            f"({g['primary']}) was fixed before the grid was run; the grid shows how far the finding depends on "
            "the other reasonable choices and is not a menu to choose from.")


def html_section(g: Mapping[str, Any]) -> str:
    """The grid's section as an HTML fragment (tables by the shared table renderer; text escaped)."""
    import jinja2  # noqa: PLC0415
    from markupsafe import Markup  # noqa: PLC0415

    env = jinja2.Environment(autoescape=True, undefined=jinja2.StrictUndefined)
    tables = Markup("\n".join(render_table_html(t) for t in g["tables"]))  # noqa: S704  (escaped by render_table_html)
    return env.from_string(SECTION_HTML).render(g=g, intro=intro(g), tables=tables)


SECTION_HTML = """<p>{{ intro }}</p>
{{ tables }}
{% if g.figure.src %}<figure id="figure-{{ g.figure.name }}"><img src="{{ g.figure.src }}" alt="{{ g.figure.title }}">
<figcaption><b>{{ g.figure.title }}.</b> {{ g.figure.caption }}</figcaption></figure>
{% else %}<p class="skipped" id="figure-{{ g.figure.name }}">{{ g.figure.title }}: not drawn ({{ g.figure.skipped }}).</p>{% endif %}
<ul class="cautions">{% for c in g.cautions %}<li>{{ c }}</li>{% endfor %}</ul>
"""


def markdown_section(g: Mapping[str, Any], heading: str = "##") -> list[str]:
    lines = [f"{heading} Specification grid", "", md_escape(intro(g)), ""]
    for t in g["tables"]:
        lines += table_markdown(t, level=heading + "#")
    f = g["figure"]
    if f["png"] is not None:
        lines += [f"![{md_escape(f['title'])}](figures/{f['name']}.png)", "",
                  f"*{md_escape(f['title'])}.* {md_escape(f['caption'])}", ""]
    else:
        lines += [f"*{md_escape(f['title'])}: not drawn ({md_escape(f['skipped'])}).*", ""]
    return lines + [f"- {md_escape(c)}" for c in g["cautions"]] + [""]


def latex_section(g: Mapping[str, Any]) -> list[str]:
    lines = ["% Specification grid: " + latex_escape(intro(g)), ""]
    for t in g["tables"]:
        lines += table_latex(t)
    return lines


# ---- the grid's own folder -----------------------------------------------------------------------
def _provenance(result: GridResult, command_line: str | None, data_path: str | Path | None) -> dict[str, Any]:
    from ..data import file_sha256  # noqa: PLC0415

    sha = file_sha256(data_path) if data_path is not None and Path(data_path).is_file() else None
    packages = package_versions()
    spec = result.plan.base
    return {"created_utc": datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ"), "command_line": command_line,
            "data_file": None if data_path is None else str(data_path), "data_sha256": sha,
            "formula": spec.formula, "focal": spec.focal, "moderators": list(spec.moderators), "seed": spec.seed,
            "alpha": spec.alpha, "python": platform.python_version(), "platform": platform.platform(),
            "packages": packages, "seconds_estimate": result.seconds_estimate}


def _page(g: Mapping[str, Any], prov: Mapping[str, Any]) -> str:
    import jinja2  # noqa: PLC0415
    from markupsafe import Markup  # noqa: PLC0415

    env = jinja2.Environment(autoescape=True, undefined=jinja2.StrictUndefined, keep_trailing_newline=True)
    return env.from_string(PAGE_HTML).render(g=g, prov=prov, section=Markup(html_section(g)))  # noqa: S704


PAGE_HTML = """<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>Specification grid: {{ g.formula }}</title>
<style>
  html { font-family: "DejaVu Sans", "Liberation Sans", Arial, sans-serif; color: #1d1d1d; line-height: 1.45; }
  body { max-width: 70rem; margin: 0 auto; padding: 1.5rem 1.2rem 3rem; font-size: 15px; }
  table { border-collapse: collapse; margin: .5rem 0 1rem; font-size: .9rem; display: block; overflow-x: auto; }
  th, td { padding: .28rem .6rem; text-align: left; vertical-align: top; }
  thead th { border-bottom: 1.5px solid #1d1d1d; border-top: 1.5px solid #1d1d1d; }
  tbody tr:last-child td { border-bottom: 1.5px solid #1d1d1d; }
  td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
  .note, figcaption { color: #5b5b5b; font-size: .86rem; }
  figure img { max-width: 100%; height: auto; border: 1px solid #d6d6d6; }
  code { font-family: "DejaVu Sans Mono", "Liberation Mono", monospace; font-size: .92em; }
</style>
</head>
<body>
<h1>Specification grid</h1>
<p class="note">Model <code>{{ g.formula }}</code>; seed {{ prov.seed }}; written {{ prov.created_utc }} by
<code>{{ prov.command_line or "a call from Python" }}</code>. Every number is also in <code>results.json</code>
(key <code>grid</code>) and <code>grid.csv</code>.</p>
<section id="grid">
{{ section }}
</section>
</body>
</html>
"""


def write_grid_folder(result: GridResult, out_dir: str | Path, *, force: bool = False,
                      command_line: str | None = None, data_path: str | Path | None = None) -> Path:
    """The grid's own folder: grid.html/.md/.tex, grid.csv, the figure (PNG, PDF), results.json
    (``{"grid": GridResult.to_dict()}``) and provenance.json, written atomically (see
    :func:`~robustmod.report.writers.atomic_folder`)."""
    with atomic_folder(out_dir, force) as (tmp, out):
        g = grid_context(result, tmp / "figures")
        prov = _provenance(result, command_line, data_path)
        (tmp / "results.json").write_text(_dump({"grid": result.to_dict()}), encoding="utf-8")
        (tmp / "provenance.json").write_text(_dump(prov), encoding="utf-8")
        (tmp / "grid.csv").write_text(render_grid_csv(result), encoding="utf-8")
        (tmp / "grid.html").write_text(_page(g, prov), encoding="utf-8")
        md = ["# Specification grid", "", f"Model {code(g['formula'])}; seed {prov['seed']}.", "",
              *markdown_section(g)]
        (tmp / "grid.md").write_text("\n".join(md), encoding="utf-8")
        tex = ["% Specification grid tables. Needs \\usepackage{booktabs} in the preamble.", *latex_section(g)]
        (tmp / "grid.tex").write_text("\n".join(tex), encoding="utf-8")
    return out


__all__ = ["GRID_FILES", "grid_context", "grid_figure", "html_section", "latex_section", "markdown_section",
           "render_grid_csv", "write_grid_folder"]
