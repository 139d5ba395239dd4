"""Write the sensitivity appendix folder.

``write_appendix`` builds everything in a temporary folder beside the target (same
file system) and moves it into place with one rename at the end, so a reader never sees
half an appendix and an existing folder is left untouched unless ``force=True`` (then it
is replaced only once the new one is complete).
"""
from __future__ import annotations

import base64
import csv
import io
import json
import math
import os
import platform
import shutil
import sys
import tempfile
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from datetime import UTC, datetime
from importlib import metadata
from pathlib import Path
from typing import TYPE_CHECKING, Any

from ..compare import CAUTIONS
from ..errors import InputError
from ..tables import NotApplicable, Table, signed
from ..tables import render_html as render_table_html
from .latex import latex_escape, render_latex
from .markdown import md_escape, render_markdown

__all__ = ["APPENDIX_FILES", "atomic_folder", "csv_guard", "latex_escape", "md_escape", "render_csv", "render_html", "render_latex",
           "render_markdown", "render_table_csv", "write_appendix"]

if TYPE_CHECKING:  # pragma: no cover
    from ..compare import Comparison
    from ..grid import GridResult
    from .figures import FigureRecord

#: Files every appendix holds (figures come on top, under figures/).
APPENDIX_FILES = ("appendix.html", "appendix.md", "tables.tex", "comparison.csv", "results.json", "provenance.json")
#: Distributions whose versions go into provenance.json.
DEPENDENCIES = ("numpy", "scipy", "pandas", "statsmodels", "formulaic", "pymc", "arviz", "matplotlib", "jinja2")



# ---- escaping -----------------------------------------------------------------------
def csv_guard(cell: Any) -> Any:
    """Prefix a quote to text a spreadsheet would run as a formula (= + - @, tab, CR).

    Only text cells are guarded; numbers stay numbers. Common practice, no source beyond the
    OWASP note on CSV injection.
    """
    if isinstance(cell, str) and cell[:1] in ("=", "+", "-", "@", "\t", "\r"):
        return "'" + cell
    return cell


# ---- the parts --------------------------------------------------------------------
def results_dict(comparison: Comparison, *, record_paths: bool = False) -> tuple[dict[str, Any], dict[str, float]]:
    """The results contract, minus the wall-clock timings (those go to provenance so that
    results.json is byte-identical on a rerun with the same seed); the data source by its file
    name only unless ``record_paths``."""
    res = comparison.to_dict()
    source = res.get("model", {}).get("data_source")
    if source and not record_paths:
        res["model"]["data_source"] = Path(source).name
    timings: dict[str, Any] = {}
    for bid, b in res["backends"].items():
        if "seconds" in b:
            timings[bid] = b.pop("seconds")
        if isinstance(b.get("extras"), dict) and "seconds" in b["extras"]:
            timings[f"{bid} (steps)"] = b["extras"].pop("seconds")
    if isinstance(res.get("calibration"), dict):
        for key in ("seconds", "workers", "engine"):  # how the run went, not what it found
            if key in res["calibration"]:
                timings[f"calibration {key}"] = res["calibration"].pop(key)
    return res, timings


def package_versions() -> dict[str, str]:
    """Installed versions of robustmod and the libraries its numbers depend on."""
    packages = {}
    for name in ("robustmod", *DEPENDENCIES):
        try:
            packages[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            packages[name] = "not installed"
    return packages


def provenance(comparison: Comparison, *, command_line: str | None, data_path: str | Path | None,
               timings: Mapping[str, float], record_paths: bool = False) -> dict[str, Any]:
    """What was run on what: the data file's name and SHA-256 (its full path only with
    ``record_paths``, since folder names can identify people), versions, seed and timings."""
    from ..data import file_sha256  # noqa: PLC0415

    path = data_path if data_path is not None else comparison.data_source
    sha = None
    if path is not None and Path(path).is_file():
        sha = file_sha256(path)
    packages = package_versions()
    out: dict[str, Any] = {
        "created_utc": datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "command_line": command_line,
        "data_file": None if path is None else Path(path).name,
        "data_sha256": sha,
        "formula": comparison.spec.formula,
        "focal": comparison.spec.focal,
        "moderators": list(comparison.spec.moderators),
        "seed": comparison.spec.seed,
        "alpha": comparison.spec.alpha,
        "python": platform.python_version(),
        "platform": platform.platform(),
        "packages": packages,
        "seconds_per_backend": dict(timings),
    }
    if record_paths and path is not None:
        out["data_path"] = str(Path(path).expanduser().resolve())
    return out


#: Which appendix section shows a table, by the table's source; every other source is a
#: back-end contributing its own tables.
SECTION_OF_SOURCE = {"compare": "comparison", "diagnostics": "diagnostics", "linearity": "diagnostics",
                     "calibrate": "calibration"}


def grouped_tables(comparison: Comparison) -> dict[str, list[Table]]:
    """The comparison's tables by appendix section: comparison, diagnostics, calibration, backends."""
    groups: dict[str, list[Table]] = {"comparison": [], "diagnostics": [], "calibration": [], "backends": []}
    for t in comparison.tables():
        groups[SECTION_OF_SOURCE.get(t.source or "", "backends")].append(t)
    return groups


def _shifts(s: Mapping[str, Any]) -> list[dict[str, str]]:
    shifts = []
    for bid in s.get("relative_change_of_estimate") or {}:
        bs = (s.get("boundary_shift") or {}).get(bid) or {}
        shifts.append({"id": bid, "est": signed(s["relative_change_of_estimate"].get(bid)),
                       "width": signed((s.get("relative_change_of_interval_width") or {}).get(bid)),
                       "shift": signed(bs.get("max_shift")) if bs.get("same_shape", True)
                       else "different number of boundaries inside the observed range",
                       "share": signed(bs.get("share_of_observed_range"))})
    return shifts


def _figure_src(rec: FigureRecord) -> str | None:
    if rec.png is None:
        return None
    return "data:image/png;base64," + base64.b64encode(rec.png.read_bytes()).decode("ascii")


def context(comparison: Comparison, res: Mapping[str, Any], prov: Mapping[str, Any],
            figures: Sequence[FigureRecord]) -> dict[str, Any]:
    """Everything the pages need: the model, the summary and the comparison's tables by section
    (user text left raw: each renderer escapes it)."""
    model = res["model"]
    mods = []
    for name, s in model["moderator_summary"].items():
        mods.append({"name": name, "type": "categorical" if s["categorical"] else "continuous",
                     "mean": signed(s["mean"]), "sd": signed(s["sd"]), "min": signed(s["min"]),
                     "max": signed(s["max"]), "levels": ", ".join(str(v) for v in s["levels"]) or "—"})
    data_file = prov.get("data_file")
    s = res["summary"]
    return {
        "version": prov["packages"].get("robustmod", ""), "schema": res["schema"], "model": model, "summary": s,
        "level_pct": f"{100 * (1 - model['alpha']):g}%",
        "probe_points": [", ".join(f"{k} = {v if isinstance(v, str) else signed(v)}" for k, v in pt.items())
                         for pt in model["probe_points"]],
        "data_name": Path(data_file).name if data_file else None, "data_sha": prov.get("data_sha256"),
        "moderator_rows": mods, "warnings": res.get("warnings") or [],
        "backend_warnings": [(bid, w) for bid, bb in res["backends"].items() for w in bb.get("warnings") or []],
        "shifts": _shifts(s), "groups": grouped_tables(comparison),
        "figures": [{"name": f.name, "title": f.title, "caption": f.caption, "skipped": f.skipped,
                     "src": _figure_src(f), "png": f.png, "pdf": f.pdf} for f in figures],
        "cautions": CAUTIONS, "provenance": prov, "data_note": None, "grid": None,
    }


def render_html(ctx: Mapping[str, Any]) -> str:
    import jinja2  # noqa: PLC0415
    from markupsafe import Markup  # noqa: PLC0415

    from .templates import HTML  # noqa: PLC0415

    env = jinja2.Environment(autoescape=True, undefined=jinja2.StrictUndefined, keep_trailing_newline=True)
    sections = {name: Markup("\n".join(render_table_html(t) for t in tables))  # noqa: S704  (escaped by render_table_html)
                for name, tables in ctx["groups"].items()}
    grid_section = Markup("")
    if ctx.get("grid"):
        from .grid_pages import html_section  # noqa: PLC0415

        grid_section = Markup(html_section(ctx["grid"]))  # noqa: S704  (escaped by the grid's own template)
    return env.from_string(HTML).render(**ctx, sections=sections, grid_section=grid_section)


def render_csv(comparison: Comparison) -> str:
    """The comparison table as CSV: numbers as numbers (interval ends and region boundaries in
    columns of their own), only text cells guarded against formula injection."""
    table = comparison.table().reset_index()
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow([csv_guard(str(c)) for c in table.columns])
    for row in table.itertuples(index=False):
        w.writerow(["" if v is None or (isinstance(v, float) and math.isnan(v)) else csv_guard(v) for v in row])
    return buf.getvalue()


def render_table_csv(table: Table) -> str:
    """Any Table as CSV: machine keys as the header, numbers as numbers, a cell that does not apply
    empty, text cells guarded against formula injection."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow([csv_guard(k) for k in table.keys])
    for row in table.rows:
        w.writerow(["" if c is None or isinstance(c, NotApplicable) or (isinstance(c, float) and not math.isfinite(c))
                    else csv_guard(c) for c in row])
    return buf.getvalue()


def _dump(obj: Any) -> str:
    return json.dumps(obj, allow_nan=False, sort_keys=True, indent=2, ensure_ascii=False) + "\n"


# ---- the folder ---------------------------------------------------------------------
def _check_target(out: Path, force: bool) -> None:
    if out.exists() and not out.is_dir():
        raise InputError(f"The output path '{out}' is a file, not a folder; choose another --out.")
    if out.exists() and not force:
        raise InputError(f"The output folder '{out}' already exists and was left untouched; "
                         "pass --force to replace it or choose another --out.")


def write_appendix(comparison: Comparison, out_dir: str | Path, *, force: bool = False,
                   command_line: str | None = None, data_path: str | Path | None = None,
                   progress: bool = False, data_note: str | None = None, record_paths: bool = False,
                   grid: GridResult | None = None) -> Path:
    """Write the appendix folder for ``comparison`` and return its path.

    Parameters
    ----------
    comparison : Comparison
        The result of :func:`robustmod.compare`.
    out_dir : path
        The folder to create. If it exists it is left untouched unless ``force``.
    force : bool, default=False
        Replace an existing folder (only after the new one is complete).
    command_line : str, optional
        Recorded in provenance.json.
    data_path : path, optional
        The data file whose SHA-256 is recorded (default: the comparison's data source).
    progress : bool, default=False
        Print the steps on stderr.
    data_note : str, optional
        A line about the data shown at the top of the page (e.g. that they are invented).
    record_paths : bool, default=False
        Also record the data file's full path in provenance.json (by default only its name and SHA-256).
    grid : GridResult, optional
        A specification grid of the same model: adds its section to the pages, ``grid.csv``,
        the specification-curve figure and the ``grid`` key of results.json.

    Returns
    -------
    Path of the appendix folder.

    Notes
    -----
    Built in a hidden temporary folder beside ``out_dir`` and renamed into place when complete
    (an atomic rename on one filesystem), so a failure leaves nothing half-written.
    """
    from .figures import render_figures  # noqa: PLC0415  (matplotlib only when writing)

    def step(msg: str) -> None:
        if progress:
            sys.stderr.write(f"appendix: {msg}\n")

    with atomic_folder(out_dir, force) as (tmp, out):
        res, timings = results_dict(comparison, record_paths=record_paths)
        prov = provenance(comparison, command_line=command_line, data_path=data_path, timings=timings,
                          record_paths=record_paths)
        step("drawing figures")
        figures = render_figures(comparison, tmp / "figures")
        ctx = context(comparison, res, prov, figures)
        ctx["data_note"] = data_note
        if grid is not None:
            from .grid_pages import grid_context, render_grid_csv  # noqa: PLC0415

            step("writing the specification grid")
            res["grid"] = grid.to_dict()
            ctx["grid"] = grid_context(grid, tmp / "figures")
            (tmp / "grid.csv").write_text(render_grid_csv(grid), encoding="utf-8")
        step("writing pages and tables")
        (tmp / "results.json").write_text(_dump(res), encoding="utf-8")
        (tmp / "provenance.json").write_text(_dump(prov), encoding="utf-8")
        (tmp / "appendix.html").write_text(render_html(ctx), encoding="utf-8")
        (tmp / "appendix.md").write_text(render_markdown(ctx), encoding="utf-8")
        (tmp / "tables.tex").write_text(render_latex(ctx), encoding="utf-8")
        (tmp / "comparison.csv").write_text(render_csv(comparison), encoding="utf-8")
    step(f"written to {out}")
    return out


@contextmanager
def atomic_folder(out_dir: str | Path, force: bool) -> Iterator[tuple[Path, Path]]:
    """(temporary folder to fill, final path): the folder appears at ``out_dir`` in one rename only when
    the block finishes; on any error the temporary folder is removed and ``out_dir`` is left as it was."""
    out = Path(out_dir).expanduser()
    out = out.parent.resolve() / out.name if out.name else out.resolve()
    _check_target(out, force)
    parent = out.parent
    try:
        parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=parent))
    except OSError as exc:
        raise InputError(f"The output folder '{out}' cannot be created ({exc.strerror or exc}); "
                         "choose a writable location with --out.") from None
    try:
        yield tmp, out
        os.chmod(tmp, 0o755)  # mkdtemp makes it private; the appendix is for sharing
        _move_into_place(tmp, out, force)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def _move_into_place(tmp: Path, out: Path, force: bool) -> None:
    """Rename the finished folder onto ``out``; with force the old one goes only afterwards."""
    if not out.exists():
        try:
            os.rename(tmp, out)
        except OSError as exc:
            raise InputError(f"The output folder '{out}' could not be created ({exc.strerror or exc}); "
                             "choose another --out.") from None
        return
    if not force:
        raise InputError(f"The output folder '{out}' appeared while the appendix was being written and was left "
                         "untouched; pass --force to replace it.")
    old = Path(tempfile.mkdtemp(prefix=f".{out.name}.old-", dir=out.parent))
    os.rename(out, old / out.name)
    try:
        os.rename(tmp, out)
    except OSError:
        os.rename(old / out.name, out)  # put the old folder back
        raise
    shutil.rmtree(old, ignore_errors=True)
