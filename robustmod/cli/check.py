"""``robustmod check``: fit and compare in the terminal, or print the results contract as JSON."""
from __future__ import annotations

import argparse
import json
import sys
from typing import Any

from .options import (
    add_model_options,
    add_prior_sensitivity,
    add_stream_options,
    check_calibrate_costly,
    compare_kwargs,
    parse_settings,
    set_prior_sensitivity,
    step_lines,
)


def add_command(subparsers: Any) -> None:
    p = subparsers.add_parser("check", help="fit and compare in the terminal (or as JSON)",
                              description="Fit the moderation model with each back-end and print the comparison. "
                                          "Each slow step prints its time on stderr (on a terminal, unless --quiet).")
    p.add_argument("data", help="data file: .csv, .tsv, .parquet, .xlsx, .dta (Stata) or .sav (SPSS)")
    add_model_options(p)
    add_stream_options(p)
    add_prior_sensitivity(p, default_on=False)
    p.add_argument("--json", action="store_true",
                   help="print the results contract as JSON on stdout (default: table)")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from ..compare import compare  # noqa: PLC0415  (pandas and scipy only when running)

    kw = compare_kwargs(args)
    if args.json:  # the JSON goes to stdout and nothing else is shown: no progress bars
        kw["progress"] = False
    check_calibrate_costly(kw)
    set_prior_sensitivity(kw, args.prior_sensitivity, default=None, cli_settings=parse_settings(args.set))
    res = compare(args.data, on_step=step_lines(args), **kw)
    if args.json:
        json.dump(res.to_dict(), sys.stdout, indent=2, allow_nan=False)
        sys.stdout.write("\n")
    else:
        print_terminal(res)
    return 0


def print_terminal(res: Any) -> None:
    """A readable table in the terminal, from the comparison's one summary."""
    from rich.console import Console  # noqa: PLC0415
    from rich.table import Table  # noqa: PLC0415

    from ..compare import CAUTION_LINE  # noqa: PLC0415

    console = Console()
    for title, rows in res.summary_lines():
        table = Table(title=title, title_justify="left")
        for h in rows[0]:
            table.add_column(h)
        for r in rows[1:]:
            table.add_row(*[str(c) for c in r])
        console.print(table)
    for w in res.warnings:
        console.print(f"[yellow]warning:[/yellow] {w}", highlight=False)
    for bid, r in res.results.items():
        for w in r.warnings:
            console.print(f"[yellow]warning ({bid}):[/yellow] {w}", highlight=False)
    cal = res.calibration or {}
    for note in cal.get("notes", []):
        console.print(f"[dim]calibration note:[/dim] {note}", highlight=False)
    console.print(res.summary["sentence"], highlight=False)
    console.print(f"[dim]{CAUTION_LINE}[/dim]", highlight=False)
