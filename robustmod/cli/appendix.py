"""``robustmod appendix``: fit, then write the sensitivity appendix folder.

Options given on the command line override those of ``--config``. The appendix asks back-ends
that have a prior for their prior-sensitivity refits unless the user chose otherwise.
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path
from typing import Any

from .. import defaults
from ..errors import InputError
from .options import (
    Announce,
    add_model_options,
    add_prior_sensitivity,
    add_stream_options,
    check_calibrate_costly,
    command_line,
    compare_kwargs,
    parse_settings,
    set_prior_sensitivity,
    step_lines,
)


def add_command(subparsers: Any) -> None:
    p = subparsers.add_parser(
        "appendix", help="write the sensitivity appendix folder (HTML, Markdown, LaTeX, figures, JSON)",
        description="Fit the moderation model with each back-end and write the sensitivity appendix folder. "
                    "Options given on the command line override those of --config.")
    p.add_argument("data", nargs="?", default=None, help="data file: .csv, .tsv, .parquet, .xlsx, .dta (Stata) or .sav (SPSS) "
                   "(default: 'data' of --config)")
    p.add_argument("--config", metavar="FILE.toml", default=None,
                   help="TOML file holding the whole analysis (default: none)")
    p.add_argument("--out", metavar="DIR", default=None,
                   help="appendix folder to create (default: the config's output.folder, "
                        f"else ./{defaults.APPENDIX_FOLDER})")
    add_force(p)
    p.add_argument("--record-paths", action="store_true", default=False,
                   help="record the full paths of the data file and the command in provenance.json "
                        "(default: file names and SHA-256 only)")
    add_model_options(p, required=False)
    add_stream_options(p)
    add_prior_sensitivity(p, default_on=True)
    p.set_defaults(func=run)


def add_force(p: argparse.ArgumentParser) -> None:
    p.add_argument("--force", action="store_true", default=False,
                   help="replace an existing appendix folder (default: refuse and leave it untouched)")


def refuse_existing(out: Path, force: bool) -> None:
    """Refuse before the (possibly long) fitting, not only when writing."""
    if out.exists() and not force:
        raise InputError(f"The output folder '{out}' already exists and was left untouched; "
                         "pass --force to replace it or choose another --out.")


def say(args: argparse.Namespace, msg: str) -> None:
    if not args.quiet:
        sys.stderr.write(msg + "\n")


def write(args: argparse.Namespace, comparison: Any, out: Path, started: float, **extra: Any) -> None:
    """Write the folder, then the verdict and where the appendix is on stdout."""
    from ..report import write_appendix  # noqa: PLC0415  (matplotlib and jinja2 only when writing)

    steps = step_lines(args)
    t0 = time.perf_counter()
    record = bool(getattr(args, "record_paths", False))
    path = write_appendix(comparison, out, command_line=command_line(args, record_paths=record),
                          progress=steps.show, record_paths=record, **extra)
    steps("appendix", time.perf_counter() - t0)
    print(comparison.summary["sentence"])
    print(f"Appendix written in {time.perf_counter() - started:.1f} s: {path / 'appendix.html'}")


def run(args: argparse.Namespace) -> int:
    from ..compare import compare  # noqa: PLC0415

    started = time.perf_counter()
    kw: dict[str, Any] = {}
    cfg: dict[str, Any] = {}
    data, out, force = args.data, args.out, args.force
    if args.config:
        from ..config import compare_arguments, load_config  # noqa: PLC0415

        cfg = load_config(args.config)
        kw.update(compare_arguments(cfg))
        data = data or cfg.get("data")
        out = out or cfg.get("out")
        force = force or bool(cfg.get("force", False))
    if not data:
        raise InputError("No data file given; pass DATA or set 'data' in the --config file.")
    for name in ("formula", "focal"):
        if getattr(args, name) is None and name not in kw:
            raise InputError(f"No --{name} given; pass --{name} or set '{name}' in the --config file.")
    if args.moderator is None and "moderator" not in kw:
        raise InputError("No moderator given; pass --moderator W or set 'moderators' in the --config file.")
    kw.update(given_on_command_line(args, kw))
    if kw.get("engine") or kw.get("scheduler"):
        kw["announce"] = Announce(not args.quiet)
    check_calibrate_costly(kw)
    set_prior_sensitivity(kw, args.prior_sensitivity, default=True, cli_settings=parse_settings(args.set))
    target = Path(out or defaults.APPENDIX_FOLDER)
    refuse_existing(target, force)
    say(args, f"fitting {data} …")
    comparison = compare(data, on_step=step_lines(args), **kw)
    extra: dict[str, Any] = {}
    if args.config and "grid" in cfg:
        extra["grid"] = run_grid(args, data, cfg, kw)
    write(args, comparison, target, started, force=force, data_path=data, **extra)
    return 0


def run_grid(args: argparse.Namespace, data: str, cfg: dict[str, Any], kw: dict[str, Any]) -> Any:
    """The config's [grid] on the same model (command-line overrides included), on local processes."""
    from ..grid import grid  # noqa: PLC0415
    from .grid import grid_arguments  # noqa: PLC0415

    gk = grid_arguments({**cfg, **{k: v for k, v in kw.items() if k in ("formula", "focal", "moderator", "probe",
                                                                        "alpha", "seed", "center", "options",
                                                                        "na_values")}})
    t0 = time.perf_counter()
    result = grid(data, announce=lambda line: say(args, f"grid: {line}"), **gk)
    step_lines(args)("specification grid", time.perf_counter() - t0)
    return result


def given_on_command_line(args: argparse.Namespace, base: dict[str, Any]) -> dict[str, Any]:
    """Compare arguments from the command line that were actually given (they override the config)."""
    ns = argparse.Namespace(**vars(args))
    if ns.moderator is None:
        ns.moderator = list(base.get("moderator") or [])
    if ns.formula is None:
        ns.formula = base.get("formula")
    if ns.focal is None:
        ns.focal = base.get("focal")
    kw = compare_kwargs(ns)
    out = {k: v for k, v in kw.items() if k in ("formula", "focal", "moderator", "progress")}
    if args.at:
        out["probe"] = kw["probe"]
    if args.set:
        merged = {b: dict(o) for b, o in (base.get("options") or {}).items()}
        for b, o in kw["options"].items():
            merged.setdefault(b, {}).update(o)
        out["options"] = merged
    for k in ("backends", "primary", "cluster", "alpha", "seed", "calibration", "center", "calibrate_costly", "na_values",
              "sep", "decimal", "sheet", "engine", "scheduler", "workers", "stream", "memory"):
        if k in kw:
            out[k] = kw[k]
    return out
