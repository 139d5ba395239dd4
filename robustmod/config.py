"""A TOML file that holds a whole analysis, for ``robustmod appendix --config FILE.toml``.

Example (relative paths are taken from the folder of the config file)::

    data = "trial.csv"
    formula = "grain_yield ~ fertiliser * soil_moisture + field_slope"
    focal = "fertiliser"
    moderators = ["soil_moisture"]
    backends = ["ols", "hc3", "wild", "wls", "bayes"]
    primary = "hc3"
    alpha = 0.05
    seed = 20240917
    center = false
    calibration = 200
    na_values = ["."]                 # codes that mean "missing" besides empty cells

    [probe]
    soil_moisture = [15, 25, 35]      # or "sd", "percentiles", "percentiles:10,50,90"

    [options.wild]
    replications = 1999

    [output]
    folder = "appendix"
    force = false
"""
from __future__ import annotations

import tomllib
from pathlib import Path
from typing import Any

from .errors import InputError

#: Top-level keys and what each must be (used in the error messages).
TOP_KEYS: dict[str, str] = {
    "data": "a file path (text)",
    "formula": "a model formula (text)",
    "focal": "a column name (text)",
    "moderators": "a list of one or two column names",
    "moderator": "a column name or a list of one or two (same as 'moderators')",
    "probe": "a table {moderator = [values] or \"sd\"} or one rule such as \"sd\"",
    "backends": "a list of back-end ids",
    "primary": "a back-end id (text)",
    "alpha": "a number in (0, 1)",
    "seed": "a whole number",
    "center": "true or false",
    "calibration": "a whole number of simulated datasets (at least 10)",
    "options": "a table of tables, e.g. [options.wild] replications = 999",
    "output": "a table with 'folder' and 'force'",
    "na_values": "a missing-value code or a list of them, e.g. \".\" or [\".\", \"-99\"]",
}
OUTPUT_KEYS: dict[str, str] = {"folder": "a folder path (text)", "force": "true or false"}


def _bad(key: str, got: Any, where: Path) -> InputError:
    return InputError(f"In the config file '{where.name}', '{key}' must be {TOP_KEYS.get(key) or OUTPUT_KEYS.get(key.split('.')[-1], 'valid')}; "
                      f"got {got!r}.")


def _unknown(keys: list[str], valid: dict[str, str], where: Path, section: str = "") -> None:
    bad = [k for k in keys if k not in valid]
    if bad:
        place = f"the [{section}] table of " if section else ""
        raise InputError(f"Unknown key {bad[0]!r} in {place}the config file '{where.name}'; valid keys: {', '.join(valid)}.")


def load_config(path: str | Path) -> dict[str, Any]:
    """Read and check a TOML analysis file.

    Returns a dict with the keys of :data:`TOP_KEYS` that the file sets, normalised:
    ``data`` and ``out`` as absolute paths (relative ones resolved against the config
    file's folder), ``moderator`` as a list, ``options`` as {backend: {option: value}},
    ``out`` and ``force`` lifted out of the ``[output]`` table. Unknown keys are an error.
    """
    p = Path(path).expanduser()
    if not p.is_file():
        raise InputError(f"The config file '{p}' does not exist; check the path given to --config.")
    try:
        raw = tomllib.loads(p.read_text(encoding="utf-8"))
    except UnicodeDecodeError:
        raise InputError(f"The config file '{p.name}' is not UTF-8 text; save it as UTF-8.") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"The config file '{p.name}' is not valid TOML ({exc}).") from None
    _unknown(list(raw), TOP_KEYS, p)
    base = p.resolve().parent
    out: dict[str, Any] = {}
    for key in ("data", "formula", "focal", "primary"):
        if key in raw:
            if not isinstance(raw[key], str) or not raw[key].strip():
                raise _bad(key, raw[key], p)
            out[key] = raw[key]
    if "data" in out:
        out["data"] = str((base / Path(out["data"]).expanduser()).resolve())
    if "moderators" in raw and "moderator" in raw:
        raise InputError(f"The config file '{p.name}' sets both 'moderators' and 'moderator'; keep one.")
    mods = raw.get("moderators", raw.get("moderator"))
    if mods is not None:
        key = "moderators" if "moderators" in raw else "moderator"
        mods = [mods] if isinstance(mods, str) else mods
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
        b = raw["backends"]
        b = [b] if isinstance(b, str) else b
        if not isinstance(b, list) or not b or not all(isinstance(x, str) for x in b):
            raise _bad("backends", raw["backends"], p)
        out["backends"] = list(b)
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
    if "center" in raw:
        if not isinstance(raw["center"], bool):
            raise _bad("center", raw["center"], p)
        out["center"] = raw["center"]
    if "na_values" in raw:
        na = raw["na_values"]
        items = na if isinstance(na, list) else [na]
        if not items or not all(isinstance(x, (str, int, float)) and not isinstance(x, bool) and str(x).strip()
                                for x in items):
            raise _bad("na_values", na, p)
        out["na_values"] = items
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
    return out


def compare_arguments(config: dict[str, Any]) -> dict[str, Any]:
    """The keyword arguments of :func:`robustmod.compare` a loaded config sets."""
    keys = ("formula", "focal", "moderator", "probe", "backends", "primary", "alpha", "seed", "center",
            "calibration", "options", "na_values")
    return {k: config[k] for k in keys if k in config}
