"""``robustmod grid``: fit every specification of the config's ``[grid]`` and write the grid's folder.

The model (formula, focal, moderators, alpha, seed, options) comes from ``--config``; the grid's
choices from its ``[grid]`` table. The count and the projected time are printed after the first
group of specifications has been timed; a progress bar shows on a terminal.
"""
from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path
from typing import Any

from .. import defaults
from ..errors import InputError
from .appendix import add_force, refuse_existing
from .options import command_line, stderr_is_terminal

ENGINES = ("local", "dask")


def add_command(subparsers: Any) -> None:
    p = subparsers.add_parser(
        "grid", help="fit the specification grid of the config's [grid] table and write its folder",
        description="Fit the moderation model under every combination of the choices in the [grid] table of "
                    "--config (optional covariates in or out, outcome rules, outlier rules) with each of the "
                    "grid's back-ends, test the whole grid against data generated under no moderation, and "
                    "write the results into their own folder. The primary specification is the config's model "
                    "unless [grid] primary says otherwise; it is fixed before the grid is run.")
    p.add_argument("data", nargs="?", default=None,
                   help="data file: .csv, .tsv, .parquet, .xlsx, .dta or .sav (default: 'data' of --config)")
    p.add_argument("--config", metavar="FILE.toml", required=True,
                   help="TOML file holding the model and its [grid] table (required)")
    p.add_argument("--engine", choices=ENGINES, default="local",
                   help="where the specifications run: local processes or a local Dask cluster (default: local)")
    p.add_argument("--out", metavar="DIR", default=None,
                   help=f"folder to create (default: ./{defaults.GRID_FOLDER})")
    add_force(p)
    p.add_argument("--json", action="store_true",
                   help="also print the results as JSON ({\"grid\": ...}) on stdout (default: a summary)")
    p.add_argument("--quiet", action="store_true",
                   help="no count, cost estimate or progress bar on stderr (default: shown)")
    p.set_defaults(func=run)


def grid_arguments(cfg: dict[str, Any]) -> dict[str, Any]:
    """Keyword arguments of :func:`robustmod.grid` from a loaded config (its model and [grid])."""
    if "grid" not in cfg:
        raise InputError("The config file has no [grid] table; add one with the choices to cross, e.g. "
                         "[grid] covariates = [\"age\"] outliers = [\"none\", \"cooks-4n\"].")
    for name in ("formula", "focal", "moderator"):
        if name not in cfg:
            key = "moderators" if name == "moderator" else name
            raise InputError(f"The config file sets no '{key}'; the grid needs the model: set '{key}'.")
    kw: dict[str, Any] = {k: cfg[k] for k in ("formula", "focal", "moderator", "probe", "alpha", "seed", "center",
                                              "options", "na_values") if k in cfg}
    kw["moderator"] = list(cfg["moderator"])
    kw["choices"] = dict(cfg["grid"])
    return kw


class ProgressBar:
    """A rich progress bar on stderr, started on the first report."""

    def __init__(self, show: bool) -> None:
        self.show = show
        self._bar: Any = None
        self._task: Any = None

    def __call__(self, done: int, total: int) -> None:
        if not self.show:
            return
        if self._bar is None:
            from rich.console import Console  # noqa: PLC0415
            from rich.progress import BarColumn, MofNCompleteColumn, Progress, TimeRemainingColumn  # noqa: PLC0415

            self._bar = Progress("specifications", BarColumn(), MofNCompleteColumn(), TimeRemainingColumn(),
                                 console=Console(stderr=True), transient=True)
            self._bar.start()
            self._task = self._bar.add_task("grid", total=total)
        self._bar.update(self._task, completed=done)

    def close(self) -> None:
        if self._bar is not None:
            self._bar.stop()


def run(args: argparse.Namespace) -> int:
    from ..config import load_config  # noqa: PLC0415
    from ..engines import make_engine  # noqa: PLC0415
    from ..grid import grid  # noqa: PLC0415
    from ..report.grid_pages import write_grid_folder  # noqa: PLC0415

    started = time.perf_counter()
    cfg = load_config(args.config)
    kw = grid_arguments(cfg)
    data = args.data or cfg.get("data")
    if not data:
        raise InputError("No data file given; pass DATA or set 'data' in the --config file.")
    target = Path(args.out or defaults.GRID_FOLDER)
    force = args.force
    refuse_existing(target, force)
    talk = not args.quiet

    def announce(line: str) -> None:
        if talk:
            sys.stderr.write(f"grid: {line}\n")
            sys.stderr.flush()

    bar = ProgressBar(talk and stderr_is_terminal())
    with make_engine(args.engine, announce=announce) as engine:
        try:
            result = grid(data, engine=engine, on_progress=bar, announce=announce, **kw)
        finally:
            bar.close()
    path = write_grid_folder(result, target, force=force, command_line=command_line(args), data_path=data)
    if args.json:
        json.dump({"grid": result.to_dict()}, sys.stdout, indent=2, allow_nan=False)
        sys.stdout.write("\n")
    else:
        print(summary_line(result))
        print(f"Grid written in {time.perf_counter() - started:.1f} s: {path / 'grid.html'}")
    return 0


def summary_line(result: Any) -> str:
    """How many specifications support the product term, per back-end, and the test of the whole grid."""
    parts = []
    for bid, s in result.summary.items():
        share = s["share_supported"]
        parts.append(f"{bid} {'—' if share is None else f'{100 * share:.0f}%'}")
    line = f"{len(result.specifications):,} specifications; share supporting the product term: {', '.join(parts)}."
    t = result.test
    if t is not None:
        line += (f" Whole-grid test ({t['resamples']} null datasets): p = {t['share_supported_p']:.3f} for the share "
                 f"supported, p = {t['median_estimate_p']:.3f} for the median estimate.")
    return line + " The primary specification was fixed first; the grid is not a menu."
