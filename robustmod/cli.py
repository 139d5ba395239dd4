"""The command line: ``robustmod check``, ``robustmod appendix`` and ``robustmod demo``.

Exit status 0 on success, 2 on bad input (one line on stderr naming what is wrong and
how to fix it), 1 on an internal error (one line; ``--debug`` shows the traceback).
"""
from __future__ import annotations

import argparse
import json
import os
import sys
import warnings
from collections.abc import Sequence
from typing import Any, NoReturn

from .backends.registry import DEFAULT_BACKENDS
from .errors import InputError, RobustmodError

PROG = "robustmod"


class _Parser(argparse.ArgumentParser):
    """argparse that reports a usage error as one line with exit status 2."""

    def error(self, message: str) -> NoReturn:
        self.exit(2, f"{PROG}: error: {message} (see '{self.prog} --help').\n")


def parse_value(text: str) -> Any:
    """'999' → 999, '0.5' → 0.5, 'true' → True, anything else stays text."""
    low = text.strip().lower()
    if low in ("true", "yes", "on"):
        return True
    if low in ("false", "no", "off"):
        return False
    for cast in (int, float):
        try:
            return cast(text)
        except ValueError:
            pass
    return text


def parse_settings(items: Sequence[str]) -> dict[str, dict[str, Any]]:
    """['wild.replications=999'] → {'wild': {'replications': 999}}."""
    out: dict[str, dict[str, Any]] = {}
    for item in items or []:
        key, sep, value = item.partition("=")
        bid, dot, name = key.partition(".")
        if not sep or not dot or not bid or not name:
            raise InputError(f"The --set value {item!r} must look like BACKEND.OPTION=VALUE, e.g. wild.replications=999.")
        out.setdefault(bid.strip().lower(), {})[name.strip()] = parse_value(value)
    return out


def parse_probe(items: Sequence[str] | None, moderators: Sequence[str]) -> dict[str, Any]:
    """--at values: '1,2,3' (first moderator), 'w=1,2,3', 'sd', 'percentiles' or 'percentiles:10,50,90'."""
    probe: dict[str, Any] = {}
    for item in items or []:
        name, sep, rule = item.partition("=")
        if not sep:
            name, rule = moderators[0], item
        name = name.strip()
        if name not in moderators:
            raise InputError(f"--at names {name!r}, which is not a moderator; moderators: {', '.join(moderators)}.")
        rule = rule.strip()
        if rule.lower() in ("sd",) or rule.lower().startswith("percentiles"):
            probe[name] = rule
        else:
            parts = [p.strip() for p in rule.split(",") if p.strip()]
            try:
                probe[name] = [float(p) for p in parts]
            except ValueError:
                probe[name] = parts  # level labels of a categorical moderator
    return probe


def split_list(values: Sequence[str] | None) -> list[str]:
    out: list[str] = []
    for v in values or []:
        out.extend(p.strip() for p in v.split(",") if p.strip())
    return out


def add_model_options(p: argparse.ArgumentParser, *, required: bool = True) -> None:
    """Options shared by every command that fits a model."""
    need = "(required)" if required else "(required unless set in --config)"
    p.add_argument("--formula", required=required, help=f"model formula, e.g. 'y ~ x * w + age' {need}")
    p.add_argument("--focal", required=required, help=f"the focal predictor whose slope is probed {need}")
    p.add_argument("--moderator", action="append", required=required, metavar="W",
                   help=f"moderator column; repeat (or comma-separate) for two moderators {need}")
    p.add_argument("--backends", action="append", metavar="IDS",
                   help=f"comma-separated back-end ids (default: {','.join(DEFAULT_BACKENDS)}; "
                        "all ids: 'robustmod backends')")
    p.add_argument("--primary", default=None, help="primary back-end, chosen before looking (default: hc3)")
    p.add_argument("--at", action="append", metavar="[W=]VALUES",
                   help="probe values: '1,2,3', 'w=1,2,3', 'sd' or 'percentiles[:10,50,90]' (default: sd = mean ± 1 SD)")
    p.add_argument("--alpha", type=float, default=None, help="significance level (default: 0.05)")
    p.add_argument("--seed", type=int, default=None, help="seed for every random step (default: 20240917)")
    p.add_argument("--center", action="store_true", default=None, help="mean-centre focal and moderators (default: off)")
    p.add_argument("--set", action="append", default=[], metavar="BACKEND.OPTION=VALUE",
                   help="a back-end option, e.g. wild.replications=999 (repeatable; default: none)")
    p.add_argument("--calibrate", type=int, nargs="?", const=1000, default=None, metavar="N",
                   help="simulate N datasets (1000 when N is left out) for each back-end's false-positive "
                        "rate and power on this design (default: off)")
    p.add_argument("--quiet", action="store_true", help="no progress bars (default: progress shown on a terminal)")


def compare_kwargs(args: argparse.Namespace) -> dict[str, Any]:
    """Turn parsed model options into keyword arguments of :func:`robustmod.compare`."""
    mods = split_list(args.moderator)
    if not mods:
        raise InputError("No moderator given; add --moderator W.")
    kw: dict[str, Any] = {"formula": args.formula, "focal": args.focal, "moderator": mods,
                          "probe": parse_probe(args.at, mods), "options": parse_settings(args.set)}
    if args.backends:
        kw["backends"] = split_list(args.backends)
    for name in ("primary", "alpha", "seed", "calibration"):
        value = getattr(args, "calibrate" if name == "calibration" else name)
        if value is not None:
            kw[name] = value
    if args.center:
        kw["center"] = True
    kw["progress"] = not args.quiet and sys.stderr.isatty()
    return kw


def cmd_check(args: argparse.Namespace) -> int:
    from .compare import compare  # noqa: PLC0415  (fast --help)

    res = compare(args.data, **compare_kwargs(args))
    if args.json:
        json.dump(res.to_dict(), sys.stdout, indent=2, allow_nan=False)
        sys.stdout.write("\n")
    else:
        _print_terminal(res)
    return 0


def _print_terminal(res: Any) -> None:
    """A readable table in the terminal, from the comparison's one summary."""
    try:
        from rich.console import Console  # noqa: PLC0415
        from rich.table import Table  # noqa: PLC0415
    except ImportError:  # pragma: no cover
        print(res)
        return
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
    from .compare import CAUTION_LINE  # noqa: PLC0415

    console.print(f"[dim]{CAUTION_LINE}[/dim]", highlight=False)


def cmd_backends(args: argparse.Namespace) -> int:
    from .backends.registry import REGISTRY, make_backend  # noqa: PLC0415

    width = max(len(b) for b in REGISTRY)
    for bid in REGISTRY:
        label = getattr(make_backend(bid), "label", "")
        print(f"{bid.ljust(width)}  {label}{'  [default]' if bid in DEFAULT_BACKENDS else ''}")
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog=PROG, description="Is a moderation effect an artifact of non-constant variance? "
                     "Fit it with several variance treatments and compare.")
    parser.add_argument("--debug", action="store_true",
                        help="show tracebacks of internal errors and library warnings (default: off)")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True
    p = sub.add_parser("check", help="fit and compare in the terminal (or as JSON)",
                       description="Fit the moderation model with each back-end and print the comparison.")
    p.add_argument("data", help="data file: .csv, .tsv, .parquet or .xlsx")
    add_model_options(p)
    p.add_argument("--json", action="store_true", help="print the results contract as JSON on stdout (default: table)")
    p.set_defaults(func=cmd_check)
    b = sub.add_parser("backends", help="list the back-end ids", description="List the back-end ids.")
    b.set_defaults(func=cmd_backends)
    try:
        from .report import cli as report_cli  # noqa: PLC0415
    except ImportError:  # the report package adds the appendix and demo commands
        report_cli = None
    if report_cli is not None:
        report_cli.add_commands(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    argv = list(sys.argv[1:] if argv is None else argv)
    args = parser.parse_args(argv)
    args.argv = argv  # the literal command, for provenance
    if not getattr(args, "debug", False):
        # The results carry every warning that matters, worded for the user; library notices
        # (deprecations, numerical chatter of dependencies) would only clutter the terminal.
        warnings.simplefilter("ignore")
    try:
        return int(args.func(args) or 0)
    except RobustmodError as exc:
        sys.stderr.write(f"{PROG}: error: {exc}\n")
        return 2
    except KeyboardInterrupt:
        sys.stderr.write(f"{PROG}: interrupted\n")
        return 130
    except Exception as exc:  # noqa: BLE001
        if getattr(args, "debug", False) or os.environ.get("ROBUSTMOD_DEBUG"):
            raise
        first = str(exc).splitlines()[0] if str(exc) else ""
        sys.stderr.write(f"{PROG}: internal error: {type(exc).__name__}: {first} (rerun with --debug for details)\n")
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
