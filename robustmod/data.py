"""Reading data files and checking the columns a model uses.

Inputs are opened read-only and never modified. Rows are reported 1-based as *data rows*
(the first row under the header is row 1).
"""
from __future__ import annotations

import csv
import hashlib
import io
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import InputError, close_matches
from .spec import ModelSpec

READERS = {".csv": "csv", ".tsv": "tsv", ".tab": "tsv", ".txt": "csv", ".parquet": "parquet", ".pq": "parquet", ".xlsx": "xlsx"}
#: Share of dropped rows above which listwise deletion earns a warning.
DROP_WARNING_SHARE = 0.10
#: Values this large overflow when squared inside the HC "meat"; the user must rescale.
OVERFLOW_LIMIT = 1e150


def file_sha256(path: str | Path) -> str:
    """SHA-256 of a file, read in chunks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def read_table(path: str | Path) -> pd.DataFrame:
    """Read CSV, TSV, Parquet or xlsx into a DataFrame; every failure is one clear line."""
    p = Path(path)
    if not p.exists():
        raise InputError(f"The data file '{p}' does not exist; check the path.")
    if p.is_dir():
        raise InputError(f"'{p}' is a folder, not a data file; give the path of a CSV, TSV, Parquet or xlsx file.")
    kind = READERS.get(p.suffix.lower())
    if kind is None:
        raise InputError(
            f"The data file '{p.name}' has the ending '{p.suffix}', which is not read; "
            "use .csv, .tsv, .parquet or .xlsx."
        )
    if p.stat().st_size == 0:
        raise InputError(f"The data file '{p.name}' is empty; it needs a header row and at least one data row.")
    try:
        if kind in ("csv", "tsv"):
            raw = p.read_bytes()
            try:
                text = raw.decode("utf-8-sig")
            except UnicodeDecodeError as exc:
                raise InputError(
                    f"The data file '{p.name}' is not valid UTF-8 text (byte {exc.start + 1}); "
                    "save it as UTF-8 (e.g. 'CSV UTF-8' in a spreadsheet program)."
                ) from None
            if "\x00" in text:
                raise InputError(f"The data file '{p.name}' holds binary data, not a {kind.upper()} table.")
            sep = "\t" if kind == "tsv" else ","
            header = next(csv.reader(io.StringIO(text), delimiter=sep), [])
            _check_duplicate_names([h.strip() for h in header], p.name)
            df = pd.read_csv(io.StringIO(text), sep=sep)
        elif kind == "parquet":
            df = pd.read_parquet(p)
        else:
            df = pd.read_excel(p)
    except InputError:
        raise
    except Exception as exc:  # the readers raise many kinds; all mean "not a table"
        first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise InputError(f"The data file '{p.name}' could not be read as a {kind} table ({first}).") from None
    if df.shape[1] < 2:
        raise InputError(
            f"The data file '{p.name}' has {df.shape[1]} column(s); a moderation model needs at least an "
            f"outcome, a focal predictor and a moderator (is the separator right for a .{kind} file?)."
        )
    if df.shape[0] == 0:
        raise InputError(f"The data file '{p.name}' has a header but no data rows.")
    df.columns = [str(c).strip() for c in df.columns]
    _check_duplicate_names(list(df.columns), p.name)
    return df


def _check_duplicate_names(names: list[str], where: str) -> None:
    seen: set[str] = set()
    for name in names:
        if name in seen:
            raise InputError(f"The column name {name!r} appears more than once in {where}; rename one of them.")
        seen.add(name)


@dataclass(frozen=True)
class PreparedData:
    """The rows a model uses and what happened to the others."""

    frame: pd.DataFrame  # only the model's columns, only complete rows; index = 0-based positions in the user's data
    n_input: int
    dropped_rows: tuple[int, ...]  # 1-based data-row numbers
    categorical_moderators: tuple[str, ...]
    warnings: tuple[str, ...]
    source: pd.DataFrame | None = None  # the user's whole frame (read-only use), for extra columns

    def column(self, name: str) -> pd.Series:
        """A column of the user's data (e.g. weights or groups outside the formula) on the rows used."""
        if self.source is None or name not in self.source.columns:
            cols = [] if self.source is None else list(self.source.columns)
            raise InputError(f"Column {name!r} is not in the data.{close_matches(name, cols)}")
        return self.source[name].iloc[self.frame.index.to_numpy()]

    @property
    def n_obs(self) -> int:
        return int(self.frame.shape[0])

    @property
    def n_dropped(self) -> int:
        return len(self.dropped_rows)


def is_categorical(series: pd.Series) -> bool:
    """Text, category and boolean columns are categorical; numbers are continuous."""
    return not pd.api.types.is_numeric_dtype(series) or pd.api.types.is_bool_dtype(series)


def prepare_data(data: pd.DataFrame, spec: ModelSpec) -> PreparedData:
    """Check the model's columns and apply listwise deletion (the input is not modified)."""
    if not isinstance(data, pd.DataFrame):
        raise InputError(f"The data must be a pandas DataFrame or a file path; got {type(data).__name__}.")
    if data.shape[0] == 0:
        raise InputError("The data have no rows.")
    columns = [str(c) for c in data.columns]
    if len(set(columns)) != len(columns):
        dup = next(c for c in columns if columns.count(c) > 1)
        raise InputError(f"The column name {dup!r} appears more than once in the data; rename one of them.")
    needed = list(dict.fromkeys([*spec.variables, spec.focal, *spec.moderators]))
    for name in needed:
        if name not in columns:
            where = "the formula" if name in spec.variables else ("the focal option" if name == spec.focal else "the moderator option")
            raise InputError(f"Column {name!r} (named in {where}) is not in the data.{close_matches(name, columns)}")
    for name in [spec.focal, *spec.moderators]:
        if name not in spec.variables:
            raise InputError(
                f"Column {name!r} is given as focal or moderator but does not appear in the formula "
                f"{spec.formula!r}; add it, e.g. '{spec.response} ~ {spec.focal} * {spec.moderators[0]}'."
            )
    frame = data.loc[:, needed].copy()
    frame.index = pd.RangeIndex(len(frame))  # positions, whatever index the user's frame has
    warnings: list[str] = []
    for name in needed:
        col = frame[name]
        if pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col):
            values = col.to_numpy(dtype=float, na_value=np.nan)
            bad = np.isinf(values)
            if bad.any():
                row = int(np.flatnonzero(bad)[0]) + 1
                raise InputError(
                    f"Column {name!r} has an infinite value in data row {row} ({int(bad.sum())} in all); "
                    "replace it with a finite value or leave the cell empty to drop the row."
                )
            big = np.abs(np.nan_to_num(values)) > OVERFLOW_LIMIT
            if big.any():
                row = int(np.flatnonzero(big)[0]) + 1
                raise InputError(
                    f"Column {name!r} has values as large as {values[big][0]:.3g} (data row {row}), whose squares "
                    "overflow; rescale the column (e.g. divide by 1e100) and refit."
                )
    complete = frame.notna().all(axis=1).to_numpy()
    dropped = tuple(int(i) + 1 for i in np.flatnonzero(~complete))
    frame = frame.loc[complete]
    n_input = int(data.shape[0])
    if frame.shape[0] == 0:
        raise InputError(
            f"No rows are left after dropping rows with missing values in {needed}; "
            "every row misses at least one of them. Check the columns or fill the gaps."
        )
    if dropped and len(dropped) / n_input > DROP_WARNING_SHARE:
        warnings.append(
            f"Listwise deletion dropped {len(dropped)} of {n_input} rows ({100 * len(dropped) / n_input:.0f}%); "
            "results describe the complete cases only."
        )
    focal = frame[spec.focal]
    if is_categorical(focal):
        raise InputError(
            f"The focal predictor {spec.focal!r} is not numeric (e.g. {str(focal.iloc[0])!r}); "
            "code it as numbers (a 0/1 indicator for two groups)."
        )
    if focal.nunique() < 2:
        raise InputError(f"The focal predictor {spec.focal!r} is constant in the rows used; it needs at least two values.")
    categorical: list[str] = []
    for mod in spec.moderators:
        col = frame[mod]
        wrapped = re.search(rf"C\(\s*`?{re.escape(mod)}`?\s*[,)]", spec.formula) is not None
        if is_categorical(col) or wrapped:
            if col.nunique() < 2:
                raise InputError(
                    f"The categorical moderator {mod!r} has only one level ({col.iloc[0]!r}) in the rows used; "
                    "it needs at least two."
                )
            categorical.append(mod)
        elif col.nunique() < 2:
            raise InputError(f"The moderator {mod!r} is constant in the rows used; it needs at least two values.")
    return PreparedData(frame, n_input, dropped, tuple(categorical), tuple(warnings), data)

