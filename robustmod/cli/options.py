"""Argument helpers shared by the commands: the one-line parser, option parsing, step lines.

Nothing here imports pandas, scipy or the back-ends at import time, so ``robustmod --help``
starts fast; the help text states the defaults of :mod:`robustmod.defaults`.
"""
from __future__ import annotations

import argparse
import shlex
import sys
from collections.abc import Sequence
from typing import Any, NoReturn

from .. import defaults
from ..errors import InputError

PROG = "robustmod"

#: The back-end option that ``--prior-sensitivity`` sets on every back-end that declares it.
PRIOR_SENSITIVITY = "prior_sensitivity"


class Parser(argparse.ArgumentParser):
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


def parse_settings(items: Sequence[str] | None) -> dict[str, dict[str, Any]]:
    """['wild.replications=999'] → {'wild': {'replications': 999}}."""
    out: dict[str, dict[str, Any]] = {}
    for item in items or []:
        key, sep, value = item.partition("=")
        bid, dot, name = key.partition(".")
        if not sep or not dot or not bid or not name:
            raise InputError(f"The --set value {item!r} must look like BACKEND.OPTION=VALUE, "
                             "e.g. wild.replications=999.")
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
        if rule.lower() == "sd" or rule.lower().startswith("percentiles"):
            probe[name] = rule
        else:
            parts = [p.strip() for p in rule.split(",") if p.strip()]
            try:
                probe[name] = [float(p) for p in parts]
            except ValueError:
                probe[name] = parts  # level labels of a categorical moderator
    return probe


def split_list(values: Sequence[str] | None) -> list[str]:
    """['a,b', 'c'] → ['a', 'b', 'c'] (repeated and comma-separated options alike)."""
    out: list[str] = []
    for v in values or []:
        out.extend(p.strip() for p in v.split(",") if p.strip())
    return out


#: Arguments that hold a file or folder; provenance keeps only their last part unless --record-paths.
PATH_ARGUMENTS = ("data", "config", "out")


def command_line(args: argparse.Namespace, *, record_paths: bool = False) -> str:
    """The command as typed (shell-quoted), for provenance.json; the data, config and output
    arguments are cut to their file names unless ``record_paths`` (folders can name people)."""
    argv = [str(a) for a in getattr(args, "argv", [])]
    if not record_paths:
        paths = {str(v) for v in (getattr(args, n, None) for n in PATH_ARGUMENTS) if v}
        argv = [_file_name_only(a, paths) for a in argv]
    return " ".join([PROG, *(shlex.quote(a) for a in argv)])


def _file_name_only(token: str, paths: set[str]) -> str:
    from pathlib import PurePath  # noqa: PLC0415

    option, eq, value = token.partition("=")
    if eq and option.startswith("--") and value in paths:
        return f"{option}={PurePath(value).name}"
    return PurePath(token).name if token in paths else token


def add_model_options(p: argparse.ArgumentParser, *, required: bool = True) -> None:
    """Options shared by every command that fits a model (help text only: no heavy import)."""
    need = "(required)" if required else "(required unless set in --config)"
    p.add_argument("--formula", required=required, help=f"model formula, e.g. 'y ~ x * w + age' {need}")
    p.add_argument("--focal", required=required, help=f"the focal predictor whose slope is probed {need}")
    p.add_argument("--moderator", action="append", required=required, metavar="W",
                   help=f"moderator column; repeat (or comma-separate) for two moderators {need}")
    p.add_argument("--cluster", default=None, metavar="COL",
                   help="column of cluster ids (teams, classes, persons measured repeatedly); switches the "
                        "defaults to the cluster-aware back-ends (default: rows are independent)")
    p.add_argument("--backends", action="append", metavar="IDS",
                   help=f"comma-separated back-end ids (default: {','.join(defaults.BACKENDS)}; with --cluster "
                        f"{','.join(defaults.CLUSTER_BACKENDS)}; all ids: 'robustmod backends')")
    p.add_argument("--primary", default=None,
                   help=f"primary back-end, chosen before looking (default: {defaults.PRIMARY}; with --cluster "
                        f"{defaults.CLUSTER_PRIMARY})")
    p.add_argument("--at", action="append", metavar="[W=]VALUES",
                   help="probe values: '1,2,3', 'w=1,2,3', 'sd' or 'percentiles[:10,50,90]' "
                        "(default: sd = mean ± 1 SD)")
    p.add_argument("--alpha", type=float, default=None, help=f"significance level (default: {defaults.ALPHA})")
    p.add_argument("--seed", type=int, default=None, help=f"seed for every random step (default: {defaults.SEED})")
    p.add_argument("--center", action="store_true", default=None,
                   help="mean-centre focal and moderators (default: off)")
    p.add_argument("--set", action="append", default=[], metavar="BACKEND.OPTION=VALUE",
                   help="a back-end option, e.g. wild.replications=999 (repeatable; default: none)")
    p.add_argument("--calibrate", type=int, nargs="?", const=defaults.CALIBRATION_DATASETS, default=None,
                   metavar="N", help=f"simulate N datasets ({defaults.CALIBRATION_DATASETS} when N is left out) "
                                     "for each back-end's false-positive rate and power on this design "
                                     "(default: off)")
    p.add_argument("--calibrate-costly", action="store_true", default=None,
                   help="with --calibrate, also calibrate back-ends that need a full fit per dataset "
                        "(the sampler), on a few datasets (default: off)")
    p.add_argument("--quiet", action="store_true",
                   help="no progress bars or step timings on stderr (default: shown on a terminal)")
    add_reading_options(p)
    add_engine_options(p)


def add_engine_options(p: argparse.ArgumentParser) -> None:
    """Where the calibration's tasks and the passes over a file read in chunks run: this machine, or Dask."""
    p.add_argument("--engine", choices=defaults.ENGINES, default=None,
                   help="where calibration tasks and the passes over a file read in chunks (--stream) run: "
                        "'local' (this machine) or 'dask' (a Dask cluster: "
                        "--scheduler, else a local cluster on 127.0.0.1 whose dashboard address is printed) "
                        f"(default: {defaults.ENGINE})")
    p.add_argument("--scheduler", metavar="ADDRESS", default=None,
                   help="address of a running Dask scheduler, e.g. tcp://scheduler-host:8786 (implies --engine dask; "
                        "default: none)")
    p.add_argument("--workers", type=int, default=None, metavar="N",
                   help="workers of the calibration (local processes, or the size of a local Dask cluster; "
                        "default: the available cores)")


def engine_kwargs(args: argparse.Namespace) -> dict[str, Any]:
    """The engine options given on the command line, as keyword arguments of compare()."""
    kw: dict[str, Any] = {}
    for name in ("engine", "scheduler", "workers"):
        if getattr(args, name, None) is not None:
            kw[name] = getattr(args, name)
    if kw.get("scheduler") and "engine" not in kw:
        kw["engine"] = "dask"  # an address can only mean a Dask scheduler
    if "engine" in kw or "scheduler" in kw:
        kw["announce"] = Announce(not getattr(args, "quiet", False))
    return kw


class Announce:
    """One line on stderr, e.g. the dashboard address of a cluster that was started."""

    def __init__(self, show: bool) -> None:
        self.show = show

    def __call__(self, line: str) -> None:
        if self.show:
            sys.stderr.write(f"{PROG}: {line}\n")
            sys.stderr.flush()


def add_reading_options(p: argparse.ArgumentParser) -> None:
    """How the data file is read: missing-value codes, separator, decimal mark, Excel sheet."""
    p.add_argument("--na-values", metavar="TOKEN[,TOKEN…]", default=None,
                   help="codes that mean 'missing' besides empty cells, e.g. '.' or '.,-99' (default: none)")
    p.add_argument("--sep", default=None, help="column separator of a CSV/TSV file, e.g. ';' or 'tab' "
                                               "(default: detected)")
    p.add_argument("--decimal", default=None, help="decimal mark of a CSV/TSV file, '.' or ',' (default: detected)")
    p.add_argument("--sheet", default=None, help="Excel sheet by name or 0-based position (default: the first)")


def reading_kwargs(args: argparse.Namespace) -> dict[str, Any]:
    """The reading options given on the command line, as keyword arguments of compare()."""
    kw: dict[str, Any] = {}
    if getattr(args, "na_values", None) is not None:
        kw["na_values"] = [t for t in (x.strip() for x in args.na_values.split(",")) if t] or None
    for name in ("sep", "decimal"):
        if getattr(args, name, None) is not None:
            kw[name] = getattr(args, name)
    sheet = getattr(args, "sheet", None)
    if sheet is not None:
        kw["sheet"] = int(sheet) if sheet.strip().isdigit() else sheet
    return kw


def add_stream_options(p: argparse.ArgumentParser) -> None:
    """Reading a file in chunks (Parquet file, folder of Parquet files, CSV) and the memory budget."""
    p.add_argument("--stream", action=argparse.BooleanOptionalAction, default=None,
                   help="read a .parquet file, a folder of .parquet files or a .csv file in chunks (--stream), or "
                        "into memory (--no-stream) (default: in chunks when the model's columns times "
                        f"{defaults.STREAM_MEMORY_FACTOR} would exceed the memory budget)")
    p.add_argument("--memory", metavar="SIZE", default=None,
                   help="memory budget, e.g. 2GB or 512MB (powers of 1024; default: "
                        f"{100 * defaults.MEMORY_SHARE:.0f}%% of the memory available at the start)")


def stream_kwargs(args: argparse.Namespace) -> dict[str, Any]:
    """--stream/--no-stream and --memory as keyword arguments of compare(); a bad size is one line."""
    from ..memory import parse_memory  # noqa: PLC0415  (no heavy import)

    kw: dict[str, Any] = {}
    if getattr(args, "stream", None) is not None:
        kw["stream"] = args.stream
    if getattr(args, "memory", None) is not None:
        kw["memory"] = parse_memory(args.memory, option="--memory")
    return kw


def add_prior_sensitivity(p: argparse.ArgumentParser, *, default_on: bool) -> None:
    """``--prior-sensitivity`` / ``--no-prior-sensitivity`` (None when not given)."""
    p.add_argument("--prior-sensitivity", action=argparse.BooleanOptionalAction, default=None,
                   help="refit back-ends that have a prior (bayes) at halved and doubled prior scales "
                        + ("(default: on)" if default_on else "(default: the back-end's own setting)"))


def compare_kwargs(args: argparse.Namespace) -> dict[str, Any]:
    """Turn parsed model options into keyword arguments of :func:`robustmod.compare`."""
    mods = split_list(args.moderator)
    if not mods:
        raise InputError("No moderator given; add --moderator W.")
    kw: dict[str, Any] = {"formula": args.formula, "focal": args.focal, "moderator": mods,
                          "probe": parse_probe(args.at, mods), "options": parse_settings(args.set)}
    if args.backends:
        kw["backends"] = split_list(args.backends)
    for name in ("primary", "alpha", "seed", "calibration", "cluster"):
        value = getattr(args, "calibrate" if name == "calibration" else name)
        if value is not None:
            kw[name] = value
    if args.center:
        kw["center"] = True
    if args.calibrate_costly:
        kw["calibrate_costly"] = True
    check_calibration_count(kw.get("calibration"))
    kw["progress"] = not args.quiet and stderr_is_terminal()
    kw.update(reading_kwargs(args))
    kw.update(engine_kwargs(args))
    kw.update(stream_kwargs(args))
    return kw


def check_calibration_count(n: int | None) -> None:
    """--calibrate N within the allowed range, said in the option's own name before any reading."""
    if n is not None and not defaults.MIN_DATASETS <= n <= defaults.MAX_DATASETS:
        raise InputError(f"--calibrate must be a whole number of simulated datasets from {defaults.MIN_DATASETS} "
                         f"to {defaults.MAX_DATASETS:,}; got {n:,}. Use e.g. --calibrate "
                         f"{defaults.CALIBRATION_DATASETS}.")


def check_calibrate_costly(kw: dict[str, Any]) -> None:
    """--calibrate-costly means nothing without a calibration: say so instead of ignoring it."""
    if kw.get("calibrate_costly") and kw.get("calibration") is None:
        raise InputError("--calibrate-costly only applies to a calibration; add --calibrate N "
                         "(or 'calibration = N' in the --config file), or drop --calibrate-costly.")


def run_ids(kw: dict[str, Any]) -> list[str]:
    """The back-end ids a compare() call with these arguments runs (the primary included)."""
    from ..backends.registry import check_ids  # noqa: PLC0415  (the registry only when running)

    clustered = kw.get("cluster") is not None
    ids = check_ids(list(kw.get("backends") or (defaults.CLUSTER_BACKENDS if clustered else defaults.BACKENDS)))
    (primary,) = check_ids([kw.get("primary") or (defaults.CLUSTER_PRIMARY if clustered else defaults.PRIMARY)])
    return ids if primary in ids else [primary, *ids]


def takes_option(backend_id: str, name: str) -> bool:
    """Whether the back-end declares the option ``name`` (its contract's option list)."""
    from ..backends.registry import backend_class  # noqa: PLC0415

    return any(opt.name == name for opt in getattr(backend_class(backend_id), "options", ()))


def set_prior_sensitivity(kw: dict[str, Any], given: bool | None, *, default: bool | None,
                          cli_settings: dict[str, dict[str, Any]] | None = None) -> None:
    """Put ``prior_sensitivity`` into the options of every run back-end that declares it.

    ``given`` is the command-line switch (None when absent): it applies to every such back-end and
    must not contradict a --set of the same option. Otherwise ``default`` (None: leave the
    back-end's own default) fills in wherever the user set nothing.
    """
    if given is None and default is None:
        return
    takers = [b for b in run_ids(kw) if takes_option(b, PRIOR_SENSITIVITY)]
    if given is not None and not takers:
        raise InputError(f"--prior-sensitivity applies to back-ends with a prior, and none of "
                         f"{', '.join(run_ids(kw))} has one; add bayes to --backends or drop the option.")
    options = {b: dict(o) for b, o in (kw.get("options") or {}).items()}
    for bid in takers:
        mine = options.setdefault(bid, {})
        if given is None:
            mine.setdefault(PRIOR_SENSITIVITY, default)
            continue
        typed = (cli_settings or {}).get(bid, {}).get(PRIOR_SENSITIVITY)
        if typed is not None and typed != given:
            flag = "--prior-sensitivity" if given else "--no-prior-sensitivity"
            raise InputError(f"{flag} contradicts --set {bid}.{PRIOR_SENSITIVITY}={str(typed).lower()}; keep one.")
        mine[PRIOR_SENSITIVITY] = given
    kw["options"] = options


def stderr_is_terminal() -> bool:
    """Progress bars and step lines are for a person watching a terminal, not for logs or pipes."""
    return sys.stderr.isatty()


class StepLines:
    """Writes one line per finished slow step on stderr: ``robustmod: back-end wild took 1.23 s``."""

    def __init__(self, show: bool) -> None:
        self.show = show

    def __call__(self, step: str, seconds: float) -> None:
        if self.show:
            sys.stderr.write(f"{PROG}: {step} took {seconds:.2f} s\n")
            sys.stderr.flush()


def step_lines(args: argparse.Namespace) -> StepLines:
    """The step reporter of a command: on unless --quiet or stderr is not a terminal."""
    return StepLines(not args.quiet and stderr_is_terminal())
