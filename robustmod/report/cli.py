"""The ``appendix`` and ``demo`` commands (added to ``robustmod`` by :func:`add_commands`)."""
from __future__ import annotations

import argparse
import shlex
import sys
import time
from pathlib import Path
from typing import Any

from ..errors import InputError

DEFAULT_OUT = "robustmod-appendix"
DEMO_OUT = "robustmod-demo-appendix"
#: Every back-end, so the demo shows each variance treatment.
DEMO_BACKENDS = ("ols", "hc3", "wild", "wls", "bayes")
#: Simulated datasets of the demo's calibration: enough to see a gross size distortion
#: (MC SE of a 5% rate ≈ 0.022), small enough for a quick demo on two cores.
DEMO_CALIBRATION = 100
#: Sampler settings that keep the demo quick on two cores while passing the R-hat/ESS checks
#: on the demo data (measured); --set overrides them.
DEMO_OPTIONS: dict[str, dict[str, Any]] = {"bayes": {"chains": 2, "draws": 500, "tune": 500}}


def _command_line(args: argparse.Namespace) -> str:
    """The command as parsed (options in a fixed order), for provenance.json."""
    parts = ["robustmod", str(args.command)]
    values = {k: v for k, v in vars(args).items() if k not in ("func", "command", "debug")}
    if values.get("data"):
        parts.append(str(values.pop("data")))
    values.pop("data", None)
    for key, value in values.items():
        flag = "--" + key.replace("_", "-")
        if value is None or value is False or value == []:
            continue
        if value is True:
            parts.append(flag)
        elif isinstance(value, list):
            for v in value:
                parts += [flag, str(v)]
        else:
            parts += [flag, str(value)]
    return " ".join(shlex.quote(p) for p in parts)


def _progress(args: argparse.Namespace) -> bool:
    return not args.quiet and sys.stderr.isatty()


def _say(args: argparse.Namespace, msg: str) -> None:
    if not args.quiet:
        sys.stderr.write(msg + "\n")


def _finish(args: argparse.Namespace, path: Path, comparison: Any, seconds: float) -> None:
    print(comparison.summary["sentence"])
    print(f"Appendix written in {seconds:.1f} s: {path / 'appendix.html'}")


def cmd_appendix(args: argparse.Namespace) -> int:
    from ..cli import compare_kwargs  # noqa: PLC0415
    from ..compare import compare  # noqa: PLC0415
    from . import write_appendix  # noqa: PLC0415

    t0 = time.perf_counter()
    kw: dict[str, Any] = {}
    data = args.data
    out = args.out
    force = args.force
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
    cli_kw = _given(args, compare_kwargs, kw)
    kw.update(cli_kw)
    out = Path(out or DEFAULT_OUT)
    # Refuse before the (possibly long) fitting, not only at the end.
    if out.exists() and not force:
        raise InputError(f"The output folder '{out}' already exists and was left untouched; "
                         "pass --force to replace it or choose another --out.")
    _say(args, f"fitting {data} …")
    comparison = compare(data, **kw)
    path = write_appendix(comparison, out, force=force, command_line=_command_line(args),
                          data_path=data, progress=_progress(args))
    _finish(args, path, comparison, time.perf_counter() - t0)
    return 0


def _given(args: argparse.Namespace, compare_kwargs: Any, base: dict[str, Any]) -> dict[str, Any]:
    """Compare arguments from the command line that were actually given (they override the config)."""
    ns = argparse.Namespace(**vars(args))
    mods = base.get("moderator")
    if ns.moderator is None:
        ns.moderator = list(mods or [])
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
    for k in ("backends", "primary", "alpha", "seed", "calibration", "center"):
        if k in kw:
            out[k] = kw[k]
    return out


def cmd_demo(args: argparse.Namespace) -> int:
    from ..cli import parse_settings, split_list  # noqa: PLC0415
    from ..compare import compare  # noqa: PLC0415
    from ..demo import DEMO_FOCAL, DEMO_FORMULA, DEMO_MODERATOR, DEMO_SEED, demo_data  # noqa: PLC0415
    from . import write_appendix  # noqa: PLC0415

    t0 = time.perf_counter()
    out = Path(args.out)
    if out.exists() and not args.force:
        raise InputError(f"The output folder '{out}' already exists and was left untouched; "
                         "pass --force to replace it or choose another --out.")
    backends = split_list(args.backends) or list(DEMO_BACKENDS)
    calibration = None if args.calibrate == 0 else args.calibrate
    _say(args, "Demo on INVENTED field-trial data (no real trial): "
               f"{DEMO_FORMULA}; back-ends {', '.join(backends)}; calibration {calibration or 'off'} …")
    options = {b: dict(o) for b, o in DEMO_OPTIONS.items() if b in backends}
    for b, o in parse_settings(args.set).items():
        options.setdefault(b, {}).update(o)
    comparison = compare(demo_data(), DEMO_FORMULA, DEMO_FOCAL, DEMO_MODERATOR, backends=backends, primary="hc3",
                         seed=DEMO_SEED, options=options, calibration=calibration,
                         progress=_progress(args))
    path = write_appendix(comparison, out, force=args.force, command_line=_command_line(args), progress=_progress(args))
    _finish(args, path, comparison, time.perf_counter() - t0)
    return 0


def add_commands(subparsers: Any) -> None:
    """Add ``appendix`` and ``demo`` to the ``robustmod`` command line."""
    from ..cli import add_model_options  # noqa: PLC0415

    p = subparsers.add_parser(
        "appendix", help="write the sensitivity appendix folder (HTML, Markdown, LaTeX, figures, JSON)",
        description="Fit the moderation model with each back-end and write the sensitivity appendix folder. "
                    "Options given on the command line override those of --config.")
    p.add_argument("data", nargs="?", default=None, help="data file: .csv, .tsv, .parquet or .xlsx "
                   "(default: 'data' of --config)")
    p.add_argument("--config", metavar="FILE.toml", default=None,
                   help="TOML file holding the whole analysis (default: none)")
    p.add_argument("--out", metavar="DIR", default=None,
                   help=f"appendix folder to create (default: the config's output.folder, else ./{DEFAULT_OUT})")
    p.add_argument("--force", action="store_true", default=False,
                   help="replace an existing appendix folder (default: refuse and leave it untouched)")
    add_model_options(p, required=False)
    for action in p._actions:  # the shared help says "(required)"; here a config file may supply them
        if action.dest in ("formula", "focal", "moderator") and action.help:
            action.help = action.help.replace("(required)", "(required unless set in --config)")
    p.set_defaults(func=cmd_appendix)

    d = subparsers.add_parser(
        "demo", help="run the built-in demo (invented data) through every back-end and write its appendix",
        description="Run the built-in demo scenario (an INVENTED field trial) through every back-end, "
                    "with a calibration, and write its appendix.")
    d.add_argument("--out", metavar="DIR", default=DEMO_OUT, help=f"appendix folder to create (default: ./{DEMO_OUT})")
    d.add_argument("--force", action="store_true", default=False,
                   help="replace an existing appendix folder (default: refuse and leave it untouched)")
    d.add_argument("--backends", action="append", metavar="IDS",
                   help=f"comma-separated back-end ids (default: {','.join(DEMO_BACKENDS)})")
    d.add_argument("--calibrate", type=int, default=DEMO_CALIBRATION, metavar="N",
                   help=f"simulated datasets for the calibration, 0 for none (default: {DEMO_CALIBRATION})")
    d.add_argument("--set", action="append", default=[], metavar="BACKEND.OPTION=VALUE",
                   help="a back-end option, e.g. wild.replications=199 (repeatable; default: "
                        + ", ".join(f"{b}.{k}={v}" for b, o in DEMO_OPTIONS.items() for k, v in o.items()) + ")")
    d.add_argument("--quiet", action="store_true", help="no progress output (default: progress shown on a terminal)")
    d.set_defaults(func=cmd_demo)
