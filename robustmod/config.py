"""A TOML file that holds a whole analysis, for ``robustmod appendix --config FILE.toml``.

Example (relative paths are taken from the folder of the config file; a key left out takes
its default from :mod:`robustmod.defaults`, as on the command line)::

    data = "trial.csv"
    formula = "grain_yield ~ fertiliser * soil_moisture + field_slope"
    focal = "fertiliser"
    moderators = ["soil_moisture"]
    backends = ["ols", "hc3", "wild", "wls"]
    primary = "hc3"
    alpha = 0.1
    seed = 7
    center = false
    calibration = 200
    calibrate_costly = false
    na_values = ["."]                 # codes that mean "missing" besides empty cells
    stream = true                     # read a Parquet/CSV file in chunks (false: into memory; left out: automatic)
    memory = "2GB"                    # the memory budget (default: a quarter of the memory available)

    [probe]
    soil_moisture = [15, 25, 35]      # or "sd", "percentiles", "percentiles:10,50,90"

    [options.wild]
    replications = 1999

    [output]
    folder = "appendix"
    force = false

    [grid]                            # optional: the specification grid (robustmod grid, and a section
    covariates = ["field_slope"]      # of the appendix); each optional covariate in or out
    outcome = ["none", "log"]
    outliers = ["none", "cooks-4n"]
    backends = ["ols", "hc3", "wls"]
    resamples = 500
    primary = { covariates = ["field_slope"], outcome = "none", outliers = "none" }

    [engine]
    name = "dask"                     # "local" (default) or "dask"
    scheduler = "tcp://scheduler-host:8786" # a running Dask scheduler; left out: a local cluster on 127.0.0.1
    workers = 4                       # local processes, or the size of that local cluster

Clustered rows take ``cluster = "COLUMN"`` (the column of cluster ids), as ``--cluster`` does.
"""
from __future__ import annotations

import tomllib
from pathlib import Path
from typing import Any

from . import defaults
from .errors import InputError

#: Top-level keys and what each must be (used in the error messages).
TOP_KEYS: dict[str, str] = {
    "data": "a file path (text)",
    "formula": "a model formula (text)",
    "focal": "a column name (text)",
    "moderators": "a list of one or two column names",
    "moderator": "a column name or a list of one or two (same as 'moderators')",
    "probe": "a table {moderator = [values] or \"sd\"} or one rule such as \"sd\"",
    "backends": f"a list of back-end ids (default: {', '.join(defaults.BACKENDS)}; with a cluster "
                f"{', '.join(defaults.CLUSTER_BACKENDS)})",
    "primary": f"a back-end id (text; default: {defaults.PRIMARY}, or {defaults.CLUSTER_PRIMARY} with a cluster)",
    "cluster": "a column name of cluster ids (text; default: none, rows are independent)",
    "alpha": f"a number in (0, 1) (default: {defaults.ALPHA})",
    "seed": f"a whole number (default: {defaults.SEED})",
    "center": "true or false (default: false)",
    "calibration": "a whole number of simulated datasets (at least 10; default: no calibration)",
    "calibrate_costly": "true or false: also calibrate back-ends that need a full fit per dataset (default: false)",
    "options": "a table of tables, e.g. [options.wild] replications = 999",
    "output": "a table with 'folder' and 'force'",
    "engine": "a table with 'name', 'scheduler' and 'workers'",
    "na_values": "a missing-value code or a list of them, e.g. \".\" or [\".\", \"-99\"]",
    "grid": "a table with covariates, outcome, outliers, backends, primary and resamples",
    "stream": "true (read the file in chunks) or false (into memory); left out: automatic",
    "memory": "a memory size such as \"2GB\" or \"512MB\", or a whole number of bytes (at least 64MB)",
}
OUTPUT_KEYS: dict[str, str] = {"folder": f"a folder path (text; default: {defaults.APPENDIX_FOLDER})",
                               "force": "true or false (default: false)"}
ENGINE_KEYS: dict[str, str] = {"name": f"one of {', '.join(defaults.ENGINES)} (default: {defaults.ENGINE})",
                               "scheduler": "a Dask scheduler address such as \"tcp://scheduler-host:8786\" (text)",
                               "workers": "a whole number ≥ 1 (default: the available cores)"}


#: Keys of the [grid] table (the choices of robustmod.grid.make_plan).
GRID_KEYS: dict[str, str] = {
    "covariates": "a list of covariate terms of the formula, each left in or out",
    "outcome": "a list of outcome rules (none, log, log1p, inverse-normal)",
    "outliers": "a list of outlier rules (none, studentized-3, cooks-4n)",
    "backends": "a list of back-end ids (default: ols, hc3, wls)",
    "primary": "a table with covariates (a list), outcome and outliers (text)",
    "resamples": "0 (no inferential test) or a whole number in [100, 100000] (default: 500)",
}
PRIMARY_KEYS = ("covariates", "outcome", "outliers")


def _bad(key: str, got: Any, where: Path) -> InputError:
    tail = key.rsplit(".", maxsplit=1)[-1]
    table = GRID_KEYS if key.startswith("grid.") else ENGINE_KEYS if key.startswith("engine.") else OUTPUT_KEYS
    need = TOP_KEYS.get(key) or table.get(tail, "valid")
    return InputError(f"In the config file '{where.name}', '{key}' must be {need}; got {got!r}.")


def _unknown(keys: list[str], valid: dict[str, str], where: Path, section: str = "") -> None:
    bad = [k for k in keys if k not in valid]
    if bad:
        place = f"the [{section}] table of " if section else ""
        raise InputError(f"Unknown key {bad[0]!r} in {place}the config file '{where.name}'; "
                         f"valid keys: {', '.join(valid)}.")


def _read(p: Path) -> dict[str, Any]:
    if not p.is_file():
        raise InputError(f"The config file '{p}' does not exist; check the path given to --config.")
    try:
        return tomllib.loads(p.read_text(encoding="utf-8"))
    except UnicodeDecodeError:
        raise InputError(f"The config file '{p.name}' is not UTF-8 text; save it as UTF-8.") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"The config file '{p.name}' is not valid TOML ({exc}).") from None


def _scalars(raw: dict[str, Any], p: Path, out: dict[str, Any]) -> None:
    """Text, numbers and switches: data, formula, focal, primary, alpha, seed, calibration, center, ..."""
    for key in ("data", "formula", "focal", "primary", "cluster"):
        if key in raw:
            if not isinstance(raw[key], str) or not raw[key].strip():
                raise _bad(key, raw[key], p)
            out[key] = raw[key]
    if "alpha" in raw:
        a = raw["alpha"]
        if isinstance(a, bool) or not isinstance(a, (int, float)) or not 0 < a < 1:
            raise _bad("alpha", a, p)
        out["alpha"] = float(a)
    for key, low in (("seed", 0), ("calibration", 10)):
        if key in raw:
            v = raw[key]
            if isinstance(v, bool) or not isinstance(v, int) or v < low:
                raise _bad(key, v, p)
            out[key] = v
    for key in ("center", "calibrate_costly", "stream"):
        if key in raw:
            if not isinstance(raw[key], bool):
                raise _bad(key, raw[key], p)
            out[key] = raw[key]
    _memory(raw, p, out)


def _memory(raw: dict[str, Any], p: Path, out: dict[str, Any]) -> None:
    """The memory budget of data read in chunks, in bytes."""
    if "memory" in raw:
        from .memory import parse_memory  # noqa: PLC0415

        try:
            out["memory"] = parse_memory(raw["memory"])
        except InputError:
            raise _bad("memory", raw["memory"], p) from None


def _lists(raw: dict[str, Any], p: Path, out: dict[str, Any]) -> None:
    """Moderators, probe values and back-end ids."""
    if "moderators" in raw and "moderator" in raw:
        raise InputError(f"The config file '{p.name}' sets both 'moderators' and 'moderator'; keep one.")
    key = "moderators" if "moderators" in raw else "moderator"
    if key in raw:
        mods = [raw[key]] if isinstance(raw[key], str) else raw[key]
        if not isinstance(mods, list) or not 1 <= len(mods) <= 2 or not all(isinstance(m, str) and m for m in mods):
            raise _bad(key, raw[key], p)
        out["moderator"] = list(mods)
    if "probe" in raw:
        probe = raw["probe"]
        if isinstance(probe, dict):
            for k, v in probe.items():
                ok = isinstance(v, str) or (isinstance(v, list) and v and all(
                    isinstance(x, (int, float, str)) and not isinstance(x, bool) for x in v))
                if not ok:
                    raise _bad("probe", {k: v}, p)
        elif not isinstance(probe, (str, list)):
            raise _bad("probe", probe, p)
        out["probe"] = probe
    if "backends" in raw:
        b = [raw["backends"]] if isinstance(raw["backends"], str) else raw["backends"]
        if not isinstance(b, list) or not b or not all(isinstance(x, str) for x in b):
            raise _bad("backends", raw["backends"], p)
        out["backends"] = list(b)
    if "na_values" in raw:
        na = raw["na_values"]
        items = na if isinstance(na, list) else [na]
        if not items or not all(isinstance(x, (str, int, float)) and not isinstance(x, bool) and str(x).strip()
                                for x in items):
            raise _bad("na_values", na, p)
        out["na_values"] = items


def _tables(raw: dict[str, Any], p: Path, base: Path, out: dict[str, Any]) -> None:
    """The [options.*] tables and the [output] table."""
    if "options" in raw:
        opts = raw["options"]
        if not isinstance(opts, dict) or not all(isinstance(v, dict) for v in opts.values()):
            raise _bad("options", opts, p)
        out["options"] = {str(k).lower(): dict(v) for k, v in opts.items()}
    if "output" in raw:
        o = raw["output"]
        if not isinstance(o, dict):
            raise _bad("output", o, p)
        _unknown(list(o), OUTPUT_KEYS, p, "output")
        if "folder" in o:
            if not isinstance(o["folder"], str) or not o["folder"].strip():
                raise _bad("output.folder", o["folder"], p)
            out["out"] = str((base / Path(o["folder"]).expanduser()).resolve())
        if "force" in o:
            if not isinstance(o["force"], bool):
                raise _bad("output.force", o["force"], p)
            out["force"] = o["force"]


def _engine(raw: dict[str, Any], p: Path, out: dict[str, Any]) -> None:
    """The [engine] table: name, scheduler, workers (as the keyword arguments of compare())."""
    if "engine" not in raw:
        return
    e = raw["engine"]
    if not isinstance(e, dict):
        raise _bad("engine", e, p)
    _unknown(list(e), ENGINE_KEYS, p, "engine")
    if "name" in e:
        if not isinstance(e["name"], str) or e["name"].strip().lower() not in defaults.ENGINES:
            raise _bad("engine.name", e["name"], p)
        out["engine"] = e["name"].strip().lower()
    if "scheduler" in e:
        if not isinstance(e["scheduler"], str) or not e["scheduler"].strip():
            raise _bad("engine.scheduler", e["scheduler"], p)
        out["scheduler"] = e["scheduler"].strip()
        out.setdefault("engine", "dask")  # an address can only mean a Dask scheduler
    if "workers" in e:
        if isinstance(e["workers"], bool) or not isinstance(e["workers"], int) or e["workers"] < 1:
            raise _bad("engine.workers", e["workers"], p)
        out["workers"] = e["workers"]


def load_config(path: str | Path) -> dict[str, Any]:
    """Read and check a TOML analysis file.

    Returns a dict with the keys of :data:`TOP_KEYS` that the file sets, normalised:
    ``data`` and ``out`` as absolute paths (relative ones resolved against the config
    file's folder), ``moderator`` as a list, ``options`` as {backend: {option: value}},
    ``out`` and ``force`` lifted out of the ``[output]`` table, ``engine``, ``scheduler`` and
    ``workers`` out of the ``[engine]`` table. Unknown keys are an error.
    """
    p = Path(path).expanduser()
    raw = _read(p)
    _unknown(list(raw), TOP_KEYS, p)
    base = p.resolve().parent
    out: dict[str, Any] = {}
    _scalars(raw, p, out)
    if "data" in out:
        out["data"] = str((base / Path(out["data"]).expanduser()).resolve())
    _lists(raw, p, out)
    _tables(raw, p, base, out)
    _engine(raw, p, out)
    if "grid" in raw:
        out["grid"] = _grid(raw["grid"], p)
    return out


def _texts(value: Any, *, allow_one: bool) -> list[str] | None:
    """A list of non-empty strings (one string too when ``allow_one``), else None."""
    items = [value] if allow_one and isinstance(value, str) else value
    if not isinstance(items, list) or not all(isinstance(x, str) and x.strip() for x in items):
        return None
    return list(items)


def _grid(g: Any, p: Path) -> dict[str, Any]:
    """The [grid] table: the choices of robustmod.grid.make_plan, checked for their types here
    (their values — known rules, covariates of the formula — are checked against the model there)."""
    if not isinstance(g, dict):
        raise _bad("grid", g, p)
    _unknown(list(g), GRID_KEYS, p, "grid")
    out: dict[str, Any] = {}
    for key in ("covariates", "outcome", "outliers", "backends"):
        if key in g:
            items = _texts(g[key], allow_one=key != "covariates")
            if items is None or (key != "covariates" and not items):
                raise _bad(f"grid.{key}", g[key], p)
            out[key] = items
    if "resamples" in g:
        r = g["resamples"]
        if isinstance(r, bool) or not isinstance(r, int) or r < 0 or 0 < r < 100 or r > 100_000:
            raise _bad("grid.resamples", r, p)
        out["resamples"] = r
    if "primary" in g:
        prim = g["primary"]
        if not isinstance(prim, dict):
            raise _bad("grid.primary", prim, p)
        bad = [k for k in prim if k not in PRIMARY_KEYS]
        if bad:
            raise InputError(f"Unknown key {bad[0]!r} in the [grid.primary] table of the config file '{p.name}'; "
                             f"valid keys: {', '.join(PRIMARY_KEYS)}.")
        if "covariates" in prim and _texts(prim["covariates"], allow_one=False) is None:
            raise _bad("grid.primary", prim, p)
        for key in ("outcome", "outliers"):
            if key in prim and (not isinstance(prim[key], str) or not prim[key].strip()):
                raise _bad("grid.primary", prim, p)
        out["primary"] = dict(prim)
    return out


def compare_arguments(config: dict[str, Any]) -> dict[str, Any]:
    """The keyword arguments of :func:`robustmod.compare` a loaded config sets."""
    keys = ("formula", "focal", "moderator", "probe", "backends", "primary", "cluster", "alpha", "seed", "center",
            "calibration", "calibrate_costly", "options", "na_values", "engine", "scheduler", "workers", "stream",
            "memory")
    return {k: config[k] for k in keys if k in config}
