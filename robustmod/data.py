"""Reading data files and checking the columns a model uses.

Inputs are opened read-only and never modified. Rows are reported 1-based as *data rows*
(the first row under the header is row 1; blank lines in a text file count, as the user sees them).

Formats: CSV/TSV (UTF-8 with or without a byte-order mark, or UTF-16 with one; the separator —
comma, semicolon, tab or bar — and a decimal comma are detected from the file unless given),
Parquet, Excel workbooks (a sheet by name or position), Stata ``.dta`` and SPSS ``.sav``. Value
labels of Stata and SPSS files become category labels when every value of the column carries one;
a column labelled only at a few codes keeps its numbers. SPSS user-missing values become missing.
"""
from __future__ import annotations

import csv
import hashlib
import io
import json
import re
import shlex
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .errors import InputError, close_matches, option_error
from .spec import ModelSpec

READERS = {".csv": "csv", ".tsv": "tsv", ".tab": "tsv", ".txt": "csv", ".parquet": "parquet", ".pq": "parquet",
           ".xlsx": "xlsx", ".xlsm": "xlsx", ".dta": "stata", ".sav": "spss", ".zsav": "spss"}
#: What the messages call each kind of file.
KIND_NAMES = {"csv": "CSV", "tsv": "TSV", "parquet": "Parquet", "xlsx": "Excel", "stata": "Stata", "spss": "SPSS"}
ENDINGS = ".csv, .tsv, .parquet, .xlsx, .dta or .sav"
#: Separators tried when a text file's separator is not given, in order of preference on a tie.
SEPARATORS = (",", ";", "\t", "|")
#: Share of dropped rows above which listwise deletion earns a warning.
DROP_WARNING_SHARE = 0.10
#: Values this large overflow when squared inside the HC "meat"; the user must rescale.
OVERFLOW_LIMIT = 1e150
#: A text covariate or moderator with more levels than this is refused (it would be that many dummies) ...
MAX_LEVELS = 20
#: ... and so is one with more levels than this share of its rows, once it has at least SHARE_RULE_FROM levels.
MAX_LEVEL_SHARE = 0.05
SHARE_RULE_FROM = 6
#: A mostly numeric column with at most this many distinct non-numbers holds missing-value codes (or typos).
MAX_CODES = 5
#: Rows named in a message before "…".
ROWS_SHOWN = 5
#: Transforms whose argument must be in range, the test and how the message words the fault.
TRANSFORM_DOMAINS: dict[str, tuple[str, str, str]] = {
    "log": ("positive values", "0 or below", "le0"), "log2": ("positive values", "0 or below", "le0"),
    "log10": ("positive values", "0 or below", "le0"), "sqrt": ("values of 0 or above", "below 0", "lt0"),
    "log1p": ("values above -1", "-1 or below", "le-1"),
}

NaValues = str | float | Sequence[str | float] | None
_DECIMAL_COMMA = re.compile(r"^[+-]?\d+,\d+$")
_DECIMAL_DOT = re.compile(r"^[+-]?\d*\.\d+$")


def file_sha256(path: str | Path) -> str:
    """SHA-256 of a file, read in chunks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _a(word: str) -> str:
    return ("an " if word[0] in "AEIOSU" and word not in ("Stata",) else "a ") + word


# ---- options ------------------------------------------------------------------------------------
def normalise_na_values(na_values: NaValues) -> tuple[str, ...]:
    """The missing-value codes as a tuple of text tokens: '.' → ('.',); ['.', -99] → ('.', '-99')."""
    if na_values is None:
        return ()
    items = [na_values] if isinstance(na_values, (str, int, float)) else na_values
    if isinstance(items, Mapping) or not isinstance(items, Sequence):
        raise option_error("na_values", "a missing-value code such as '.' or a list of them", na_values)
    tokens: list[str] = []
    for item in items:
        if isinstance(item, bool) or not isinstance(item, (str, int, float)):
            raise option_error("na_values", "a missing-value code such as '.' or a list of them", na_values)
        text = str(int(item)) if isinstance(item, float) and item.is_integer() else str(item)
        if not text.strip():
            raise option_error("na_values", "non-empty codes (empty cells are missing anyway)", na_values)
        tokens.append(text.strip())
    return tuple(dict.fromkeys(tokens))


def na_remedy(tokens: Sequence[str]) -> str:
    """How to declare codes: '--na-values . (na_values="." in Python, na_values = ["."] in the config file)'."""
    cli = shlex.quote(",".join(tokens))
    py = json.dumps(tokens[0]) if len(tokens) == 1 else "[" + ", ".join(json.dumps(t) for t in tokens) + "]"
    toml = "[" + ", ".join(json.dumps(t) for t in tokens) + "]"
    return f"--na-values {cli} (na_values={py} in Python, na_values = {toml} in the config file)"


def _check_read_options(kind: str, name: str, sep: str | None, decimal: str | None,
                        sheet: str | int | None) -> str | None:
    """Validate sep/decimal/sheet against the kind of file; returns sep with 'tab' spelled out."""
    what = KIND_NAMES[kind]
    if sep is not None:
        sep = {"tab": "\t", "\\t": "\t"}.get(sep, sep) if isinstance(sep, str) else sep
        if not isinstance(sep, str) or len(sep) != 1 or sep in "\"'\r\n" or sep.isalnum():
            raise option_error("sep", "one separator character such as ';', ',', '|' or 'tab'", sep)
        if kind not in ("csv", "tsv"):
            raise InputError(f"The 'sep' option (--sep) applies to CSV and TSV files; '{name}' is {_a(what)} file.")
    if decimal is not None:
        if decimal not in (".", ","):
            raise option_error("decimal", "'.' or ','", decimal)
        if kind not in ("csv", "tsv"):
            raise InputError(f"The 'decimal' option (--decimal) applies to CSV and TSV files; '{name}' is {_a(what)} file.")
        if decimal == sep:
            raise InputError(f"The separator and the decimal mark of '{name}' cannot both be {decimal!r}; "
                             "change --sep or --decimal.")
    if sheet is not None:
        if isinstance(sheet, bool) or not isinstance(sheet, (str, int)) or (isinstance(sheet, int) and sheet < 0):
            raise option_error("sheet", "a sheet name or a 0-based sheet position", sheet)
        if kind != "xlsx":
            raise InputError(f"The 'sheet' option (--sheet) applies to Excel files; '{name}' is {_a(what)} file.")
    return sep


# ---- reading --------------------------------------------------------------------------------------
def _data_file(path: str | Path) -> tuple[Path, str]:
    """The path as a ``Path`` and the reader its ending selects; a missing file, a folder or an unread ending is an InputError."""
    p = Path(path)
    if not p.exists():
        raise InputError(f"The data file '{p}' does not exist; check the path.")
    if p.is_dir():
        raise InputError(f"'{p}' is a folder, not a data file; give the path of a {ENDINGS} file.")
    kind = READERS.get(p.suffix.lower())
    if kind is None:
        raise InputError(f"The data file '{p.name}' has the ending '{p.suffix}', which is not read; use {ENDINGS}.")
    return p, kind


def read_table(path: str | Path, *, na_values: NaValues = None, sep: str | None = None, decimal: str | None = None,
               sheet: str | int | None = None) -> pd.DataFrame:
    """Read a CSV, TSV, Parquet, Excel, Stata or SPSS file; every failure is one clear line.

    Parameters
    ----------
    path : str or Path
    na_values : str or list of str, optional
        Codes that mean "missing" in this file (e.g. ``"."`` or ``[".", "-99"]``), besides empty cells.
    sep, decimal : str, optional
        Separator and decimal mark of a CSV/TSV file; detected from the file when not given.
    sheet : str or int, optional
        Sheet of an Excel workbook by name or 0-based position; default the first.
    """
    p, kind = _data_file(path)
    tokens = normalise_na_values(na_values)
    sep = _check_read_options(kind, p.name, sep, decimal, sheet)
    if p.stat().st_size == 0:
        raise InputError(f"The data file '{p.name}' is empty; it needs a header row and at least one data row.")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # readers' notices (value labels, dates) are not for the user
            if kind in ("csv", "tsv"):
                df = _read_text(p, kind, sep, decimal, tokens)
            elif kind == "parquet":
                df = pd.read_parquet(p)
            elif kind == "xlsx":
                df = _read_excel(p, sheet, tokens)
            elif kind == "stata":
                df = _read_stata(p)
            else:
                df = _read_spss(p)
    except InputError:
        raise
    except Exception as exc:  # the readers raise many kinds; all mean "not a table"
        first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise InputError(f"The data file '{p.name}' could not be read as {_a(KIND_NAMES[kind])} file ({first}); "
                         "check that it is complete and of that kind, or export it again.") from None
    if df.shape[1] < 2:
        hint = ""
        if kind in ("csv", "tsv"):
            head = str(df.columns[0]) if df.shape[1] else ""
            shown = head if len(head) <= 40 else head[:40] + "…"
            hint = f" (its header reads {shown!r}: is the separator right? name it with --sep, sep= in Python)"
        raise InputError(
            f"The data file '{p.name}' has {df.shape[1]} column(s); a moderation model needs at least an "
            f"outcome, a focal predictor and a moderator{hint}."
        )
    if df.shape[0] == 0:
        raise InputError(f"The data file '{p.name}' has a header but no data rows.")
    df.columns = [str(c).strip() for c in df.columns]
    _check_duplicate_names(list(df.columns), p.name)
    return apply_na_values(df, tokens)


def load_data(data: pd.DataFrame | str | Path, *, na_values: NaValues = None, sep: str | None = None,
              decimal: str | None = None, sheet: str | int | None = None) -> tuple[pd.DataFrame, str | None]:
    """(frame, source path or None) from a file path or a DataFrame, missing-value codes applied."""
    if isinstance(data, (str, Path)):
        return read_table(data, na_values=na_values, sep=sep, decimal=decimal, sheet=sheet), str(data)
    if not isinstance(data, pd.DataFrame):
        raise InputError(f"The data must be a pandas DataFrame or a file path; got {type(data).__name__}.")
    for name, value in (("sep", sep), ("decimal", decimal), ("sheet", sheet)):
        if value is not None:
            raise InputError(f"The '{name}' option applies to reading a file; the data given are a DataFrame, "
                             f"so leave '{name}' out.")
    return apply_na_values(data, na_values), None


def _decode(raw: bytes, name: str) -> str:
    if raw.startswith((b"\xff\xfe", b"\xfe\xff")):  # "Unicode text" exports of spreadsheet programs
        try:
            return raw.decode("utf-16")
        except UnicodeDecodeError:
            pass
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise InputError(
            f"The data file '{name}' is not valid UTF-8 text (byte {exc.start + 1}); "
            "save it as UTF-8 (e.g. 'CSV UTF-8' in a spreadsheet program)."
        ) from None


def _guess_sep(header: str) -> str:
    """The candidate separator that splits the header into the most fields (comma on a tie)."""
    counts = {s: len(next(csv.reader([header], delimiter=s), [])) for s in SEPARATORS}
    best = max(SEPARATORS, key=lambda s: (counts[s], -SEPARATORS.index(s)))
    return best if counts[best] > 1 else ","


def _guess_decimal(lines: list[str], sep: str) -> str:
    """',' when the cells show decimal commas and no decimal points (never with a comma separator)."""
    if sep == ",":
        return "."
    cells = [c.strip() for row in csv.reader(lines[:500], delimiter=sep) for c in row]
    comma = sum(1 for c in cells if _DECIMAL_COMMA.match(c))
    dot = sum(1 for c in cells if _DECIMAL_DOT.match(c))
    return "," if comma and not dot else "."


def _read_text(p: Path, kind: str, sep: str | None, decimal: str | None, tokens: tuple[str, ...]) -> pd.DataFrame:
    text = _decode(p.read_bytes(), p.name)
    if "\x00" in text:
        raise InputError(f"The data file '{p.name}' holds binary data, not a {kind.upper()} table.")
    lines = text.splitlines()
    header = lines[0] if lines else ""
    if sep is None:
        sep = "\t" if kind == "tsv" else _guess_sep(header)
    names = next(csv.reader([header], delimiter=sep), [])
    _check_duplicate_names([h.strip() for h in names], p.name)
    if decimal is None:
        decimal = _guess_decimal(lines[1:], sep)
    df = pd.read_csv(io.StringIO(text), sep=sep, decimal=decimal, na_values=list(tokens) or None,
                     keep_default_na=True, skip_blank_lines=False)
    # Blank lines keep their place so that row numbers match the file; those at the end are dropped.
    filled = np.flatnonzero(df.notna().any(axis=1).to_numpy())
    return df.iloc[: int(filled[-1]) + 1 if filled.size else 0]


def _read_excel(p: Path, sheet: str | int | None, tokens: tuple[str, ...]) -> pd.DataFrame:
    with pd.ExcelFile(p) as book:
        names = [str(s) for s in book.sheet_names]
        listed = ", ".join(repr(s) for s in names)
        if isinstance(sheet, int) and sheet >= len(names):
            raise InputError(f"The workbook '{p.name}' has {len(names)} sheet(s) ({listed}); sheet position {sheet} "
                             "does not exist (positions start at 0).")
        if isinstance(sheet, str) and sheet not in names:
            raise InputError(f"The workbook '{p.name}' has no sheet {sheet!r}; its sheets: {listed}."
                             f"{close_matches(sheet, names)}")
        target = names[0] if sheet is None else (names[sheet] if isinstance(sheet, int) else sheet)
        df = book.parse(target, na_values=list(tokens) or None, keep_default_na=True)
    if sheet is None and len(names) > 1 and df.shape[1] < 2:
        raise InputError(f"The first sheet {names[0]!r} of the workbook '{p.name}' has {df.shape[1]} column(s); "
                         f"its sheets are {listed}: choose the one with the data with --sheet NAME "
                         "(sheet=\"NAME\" in Python).")
    return df


def _read_stata(p: Path) -> pd.DataFrame:
    codes = pd.read_stata(p, convert_categoricals=False)
    try:
        labelled = pd.read_stata(p, convert_categoricals=True)
    except ValueError:  # value labels that repeat a label for two codes: keep the codes
        return codes
    out = codes.copy()
    for name in codes.columns:
        col = labelled[name]
        # pandas keeps unlabelled codes as numbers among the categories: such a column stays numeric.
        if isinstance(col.dtype, pd.CategoricalDtype) and all(isinstance(c, str) for c in col.cat.categories):
            out[name] = col.cat.remove_unused_categories()
    return out


def _read_spss(p: Path) -> pd.DataFrame:
    try:
        import pyreadstat  # noqa: PLC0415  (only needed for SPSS files)
    except ImportError:
        raise InputError(f"Reading the SPSS file '{p.name}' needs the pyreadstat package; install it "
                         "(pip install pyreadstat) or export the data as CSV.") from None
    # user_missing=False: the codes declared missing in the file become missing values.
    df, meta = pyreadstat.read_sav(str(p), apply_value_formats=False, user_missing=False)
    return apply_value_labels(df, meta.variable_value_labels)


def apply_value_labels(frame: pd.DataFrame, labels: Mapping[str, Mapping[Any, str]]) -> pd.DataFrame:
    """Columns every value of which has a label become categories (levels in code order); others stay."""
    out = frame.copy()
    for name, mapping in labels.items():
        if name not in out.columns or not mapping:
            continue
        present = pd.unique(out[name].dropna())
        if len(present) == 0 or not all(v in mapping for v in present):
            continue
        codes = sorted(present)
        levels = list(dict.fromkeys(str(mapping[c]) for c in codes))
        out[name] = pd.Categorical(out[name].map({c: str(mapping[c]) for c in codes}), categories=levels)
    return out


def _check_duplicate_names(names: list[str], where: str) -> None:
    seen: set[str] = set()
    for name in names:
        if name in seen:
            raise InputError(f"The column name {name!r} appears more than once in {where}; rename one of them.")
        seen.add(name)


# ---- missing-value codes and text that holds numbers ---------------------------------------------
def _is_text(col: pd.Series) -> bool:
    return (pd.api.types.is_object_dtype(col) or pd.api.types.is_string_dtype(col)) and not isinstance(
        col.dtype, pd.CategoricalDtype)


def apply_na_values(frame: pd.DataFrame, na_values: NaValues) -> pd.DataFrame:
    """A new frame with cells equal to a code set missing (the input is not modified).

    Text cells are compared after trimming white space; numeric codes (e.g. '-99') also match numbers.
    A text column that is all numbers once the codes are gone becomes numeric.
    """
    tokens = normalise_na_values(na_values)
    if not tokens:
        return frame
    numbers = [float(t) for t in tokens if _as_number(t) is not None]
    out = frame.copy(deep=False)
    for name in frame.columns:
        col = frame[name]
        if pd.api.types.is_bool_dtype(col):
            continue
        if pd.api.types.is_numeric_dtype(col):
            mask = col.isin(numbers).to_numpy() if numbers else np.zeros(len(col), bool)
        else:
            mask = (col.notna() & col.astype(str).str.strip().isin(tokens)).to_numpy()
        if not mask.any():
            continue
        new = col.where(~mask)
        if isinstance(new.dtype, pd.CategoricalDtype):
            new = new.cat.remove_unused_categories()
        elif _is_text(new):
            parsed = pd.to_numeric(new.astype(str).str.strip().where(new.notna()), errors="coerce")
            if parsed.notna().sum() == new.notna().sum():
                new = parsed
        out[name] = new
    return out


def _as_number(text: str) -> float | None:
    try:
        return float(text)
    except ValueError:
        return None


def _rows_text(positions: np.ndarray) -> str:
    shown = ", ".join(str(int(i) + 1) for i in positions[:ROWS_SHOWN])
    word = "row" if len(positions) == 1 else "rows"
    return f"data {word} {shown}{', …' if len(positions) > ROWS_SHOWN else ''}"


def _numbers_in_text(name: str, col: pd.Series) -> pd.Series:
    """A text column as numbers when it holds numbers; an InputError when it holds numbers except for a
    few recurring codes or numbers with a decimal comma; the column unchanged when it is real text."""
    notna = col.notna().to_numpy()
    stripped = col.astype(str).str.strip().where(notna)
    present = notna & (stripped != "").fillna(False).to_numpy(dtype=bool)
    parsed = pd.to_numeric(stripped.where(present), errors="coerce")
    ok = parsed.notna().to_numpy()
    bad = present & ~ok
    if present.any() and not bad.any():
        return parsed  # numbers stored as text (blank cells are missing)
    comma = present & stripped.fillna("").str.match(_DECIMAL_COMMA).to_numpy()
    if comma.any() and (ok | comma).sum() > (present & ~(ok | comma)).sum():
        first = int(np.flatnonzero(comma)[0])
        raise InputError(
            f"Column {name!r} holds numbers written with a decimal comma (e.g. {stripped.iloc[first]!r} in data row "
            f"{first + 1}); read the file with --decimal , (decimal=\",\" in Python), or convert the column to numbers."
        )
    codes = pd.unique(stripped[bad])
    if ok.sum() > bad.sum() and len(codes) <= MAX_CODES:
        where = np.flatnonzero(bad)
        listed = " or ".join(repr(str(c)) for c in codes)
        these = "looks like a missing-value code" if len(codes) == 1 else "look like missing-value codes"
        raise InputError(
            f"Column {name!r} is numeric except for {int(bad.sum())} cell(s) holding {listed} ({_rows_text(where)}), "
            f"which {these}; declare {'it' if len(codes) == 1 else 'them'} with {na_remedy([str(c) for c in codes])}, "
            "or correct those cells."
        )
    return col


def _check_many_levels(name: str, col: pd.Series, role: str) -> None:
    kind = "text" if _is_text(col) else "categorical"
    levels = col.dropna().unique()
    n = int(col.notna().sum())
    k = len(levels)
    if k > MAX_LEVELS or (k >= SHARE_RULE_FROM and k > MAX_LEVEL_SHARE * n):
        eg = ", ".join(repr(str(v)) for v in levels[:3])
        raise InputError(
            f"Column {name!r} is {kind} with {k} different values in {n} rows (e.g. {eg}); as a {role} it would "
            f"become {k - 1} dummy columns. Recode it into fewer groups, declare it numeric if it holds numbers, "
            "or mark its missing-value codes with --na-values."
        )


def _check_columns(frame: pd.DataFrame, spec: ModelSpec) -> pd.DataFrame:
    """Text columns that hold numbers become numbers; codes, decimal commas, text outcomes and text
    covariates or moderators with many levels are errors."""
    wrapped = {col for fn, col in spec.column_calls if fn == "C"}
    for name in frame.columns:
        col = frame[name]
        if _is_text(col):
            col = _numbers_in_text(name, col)
            frame[name] = col
        if pd.api.types.is_numeric_dtype(col) or pd.api.types.is_bool_dtype(col) or name == spec.focal:
            continue
        if name == spec.response:
            first = int(np.flatnonzero(col.notna().to_numpy())[0]) if col.notna().any() else 0
            raise InputError(
                f"The outcome {name!r} is not numeric (e.g. {str(col.iloc[first])!r} in data row {first + 1}); "
                "recode it as numbers, or mark its missing-value codes with --na-values."
            )
        if name not in wrapped:
            _check_many_levels(name, col, "moderator" if name in spec.moderators else "covariate")
    return frame


def _check_transforms(frame: pd.DataFrame, spec: ModelSpec) -> None:
    """log, sqrt, … of a column with values outside their domain, counted over the rows used."""
    n = len(frame)
    for fn, name in spec.column_calls:
        if fn not in TRANSFORM_DOMAINS or name not in frame.columns:
            continue
        col = frame[name]
        if not pd.api.types.is_numeric_dtype(col) or pd.api.types.is_bool_dtype(col):
            continue
        v = col.to_numpy(dtype=float)
        need, fault, rule = TRANSFORM_DOMAINS[fn]
        bad = v <= 0 if rule == "le0" else (v < 0 if rule == "lt0" else v <= -1)
        if not bad.any():
            continue
        q = f"`{name}`" if not name.isidentifier() else name
        fix = (f"use log1p({q}) or a shift, log({q} + c) with c fixed before looking at the results"
               if fn.startswith("log") and fn != "log1p" else
               f"shift it, {fn}({q} + c) with c fixed before looking at the results")
        raise InputError(
            f"{fn}({q}) needs {need}, but {int(bad.sum())} of {n} rows of {name} are {fault} "
            f"(the first in data row {int(frame.index[int(np.flatnonzero(bad)[0])]) + 1}); {fix}."
        )


# ---- preparing the model's rows ------------------------------------------------------------------
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


def _missing_column_hint(name: str, columns: list[str]) -> str:
    """Point at a column whose name has spaces, dots or other characters and contains ``name``."""
    for col in columns:
        if not col.isidentifier() and name in re.split(r"[^0-9A-Za-z_]+", col):
            return (f" The data have a column {col!r}, whose name has spaces or other characters: write it in "
                    f"back-quotes as `{col}`.")
    return close_matches(name, columns)


def _check_names(columns: list[str], spec: ModelSpec) -> list[str]:
    needed = list(dict.fromkeys([*spec.variables, spec.focal, *spec.moderators]))
    for name in needed:
        if name not in columns:
            where = "the formula" if name in spec.variables else ("the focal option" if name == spec.focal else "the moderator option")
            raise InputError(f"Column {name!r} (named in {where}) is not in the data.{_missing_column_hint(name, columns)}")
    for name in [spec.focal, *spec.moderators]:
        if name not in spec.variables:
            raise InputError(
                f"Column {name!r} is given as focal or moderator but does not appear in the formula "
                f"{spec.formula!r}; add it, e.g. '{spec.response} ~ {spec.focal} * {spec.moderators[0]}'."
            )
    return needed


#: Copy-on-write is on (always from pandas 3): a column selection then costs no copy.
_COPY_ON_WRITE = int(pd.__version__.split(".")[0]) >= 3 or bool(pd.get_option("mode.copy_on_write") is True)


def _check_finite(frame: pd.DataFrame) -> set[str]:
    """Refuse infinite and overflowing numbers, naming the column and row; returns the numeric columns
    found without a gap (no NaN), which listwise deletion then need not look at."""
    clean: set[str] = set()
    for name in frame.columns:
        col = frame[name]
        if pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col):
            values = col.to_numpy(dtype=float, na_value=np.nan)
            # Largest |value| as two reductions (no n-vector); a NaN makes either comparison false.
            if values.size == 0 or (values.max() <= OVERFLOW_LIMIT and -values.min() <= OVERFLOW_LIMIT):
                clean.add(str(name))  # no inf, no huge value, no NaN: nothing to say
                continue
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
    return clean


def prepare_data(data: pd.DataFrame, spec: ModelSpec, *, na_values: NaValues = None) -> PreparedData:
    """Check the model's columns and apply listwise deletion (the input is not modified).

    ``na_values`` are codes that mean "missing" (see :func:`apply_na_values`). Without them a column that
    is numeric except for a few codes is an error naming the codes, their rows and the option to set.
    """
    if not isinstance(data, pd.DataFrame):
        raise InputError(f"The data must be a pandas DataFrame or a file path; got {type(data).__name__}.")
    if data.shape[0] == 0:
        raise InputError("The data have no rows.")
    columns = [str(c) for c in data.columns]
    if len(set(columns)) != len(columns):
        dup = next(c for c in columns if columns.count(c) > 1)
        raise InputError(f"The column name {dup!r} appears more than once in the data; rename one of them.")
    data = apply_na_values(data, na_values)
    needed = _check_names(columns, spec)
    # With copy-on-write (always on from pandas 3) the selection shares the user's columns until one is
    # changed; without it the selection is already a copy, but it is copied once more to be safe.
    frame = data.loc[:, needed].copy(deep=not _COPY_ON_WRITE)
    frame.index = pd.RangeIndex(len(frame))  # positions, whatever index the user's frame has
    frame = _check_columns(frame, spec)
    clean = _check_finite(frame)
    gaps = [c for c in frame.columns if str(c) not in clean]
    complete = frame[gaps].notna().all(axis=1).to_numpy() if gaps else np.ones(len(frame), dtype=bool)
    dropped = tuple(int(i) + 1 for i in np.flatnonzero(~complete))
    if dropped:
        frame = frame.loc[complete]
    for name in frame.columns:  # levels seen only in dropped rows would be empty dummy columns
        if isinstance(frame[name].dtype, pd.CategoricalDtype):
            frame[name] = frame[name].cat.remove_unused_categories()
    n_input = int(data.shape[0])
    if frame.shape[0] == 0:
        raise InputError(
            f"No rows are left after dropping rows with missing values in {needed}; "
            "every row misses at least one of them. Check the columns or fill the gaps."
        )
    _check_transforms(frame, spec)
    warnings_: list[str] = []
    if dropped and len(dropped) / n_input > DROP_WARNING_SHARE:
        warnings_.append(
            f"Listwise deletion dropped {len(dropped)} of {n_input} rows ({100 * len(dropped) / n_input:.0f}%); "
            "results describe the complete cases only."
        )
    categorical = _check_focal_and_moderators(frame, spec)
    return PreparedData(frame, n_input, dropped, tuple(categorical), tuple(warnings_), data)


def _varies(col: pd.Series) -> bool:
    """At least two distinct values (a numeric column without gaps: its minimum is below its maximum)."""
    if pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col) and not col.hasnans:
        v = col.to_numpy()
        return bool(v.size) and bool(v.min() < v.max())
    return bool(col.nunique() >= 2)


def _check_focal_and_moderators(frame: pd.DataFrame, spec: ModelSpec) -> list[str]:
    focal = frame[spec.focal]
    if is_categorical(focal):
        raise InputError(
            f"The focal predictor {spec.focal!r} is not numeric (e.g. {str(focal.iloc[0])!r}); "
            "code it as numbers (a 0/1 indicator for two groups)."
        )
    if not _varies(focal):
        raise InputError(f"The focal predictor {spec.focal!r} is constant in the rows used; it needs at least two values.")
    wrapped = {col for fn, col in spec.column_calls if fn == "C"}
    categorical: list[str] = []
    for mod in spec.moderators:
        col = frame[mod]
        if is_categorical(col) or mod in wrapped:
            if col.nunique() < 2:
                raise InputError(
                    f"The categorical moderator {mod!r} has only one level ({col.iloc[0]!r}) in the rows used; "
                    "it needs at least two."
                )
            categorical.append(mod)
        elif not _varies(col):
            raise InputError(f"The moderator {mod!r} is constant in the rows used; it needs at least two values.")
    return categorical
