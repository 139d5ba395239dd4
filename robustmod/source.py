"""Data read in chunks: a Parquet file, a folder of Parquet files or a CSV file, through pyarrow.

A :class:`Source` yields the rows as pandas frames in file order, a batch at a time. Its first
pass (:meth:`Source.profile`) collects what every later pass must agree on: the number of rows
and of complete rows, missing values per column, the levels and counts of categorical columns,
and the min / max / mean / SD of the numeric ones (on the complete rows, as the in-memory
listwise deletion does). :class:`ModelChunks` then fixes the formula's model spec (formulaic) on
a frame carrying those levels, so that every chunk's model matrix has the same columns, and is a
:data:`robustmod.kernels.chunks.ChunkSource` for the streaming kernels.

Rows are numbered as everywhere in robustmod: data row 1 is the first row under the header.
Bad values get the one-line messages of the in-memory path, naming the column and the data row.
"""
from __future__ import annotations

import gc
import re
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.dataset as pads
import pyarrow.parquet as pq

from .data import OVERFLOW_LIMIT
from .errors import InputError, close_matches
from .kernels.accumulate import RunningMoments
from .kernels.chunks import Partitioned, Plan, fold, rows_per_chunk

#: Rows per batch read from the file (the chunk size of the kernels that read the source).
BATCH_ROWS = 1 << 17
#: A Parquet row group of at most this many batches is read whole (memory stays at one row group).
ROW_GROUP_WHOLE = 16
#: Rows of a partition of a Parquet source (whole row groups are gathered up to this count): a task
#: per 2²⁰ rows keeps both the per-task overhead (~10 ms) and the wait for the last task small.
PARTITION_ROWS = 1 << 20
#: Bytes of a partition of a CSV source (blocks end at a line end; about 2²⁰ rows of 5 numbers).
PARTITION_BYTES = 1 << 26
_CSV_ROW = re.compile(r"column #(\d+): Row #(\d+): CSV conversion error to \w+: invalid value '([^']*)'")


@dataclass(frozen=True)
class Partition:
    """Consecutive rows of a source, the unit of one task: ``start`` is the 0-based position of its
    first row in the whole data (so row numbers in messages count from the file's start), ``rows``
    its row count; a Parquet partition is whole row groups of one file, a CSV one a byte range
    [``first_byte``, ``end_byte``) of lines (the header is read apart)."""

    index: int
    start: int
    rows: int
    file: str = ""
    row_groups: tuple[int, ...] = ()
    first_byte: int = 0
    end_byte: int = 0


@dataclass(frozen=True)
class ColumnProfile:
    """What the first pass learned of one column (statistics on the complete rows)."""

    name: str
    numeric: bool
    missing: int
    levels: tuple[Any, ...] = ()
    counts: tuple[int, ...] = ()
    minimum: float | None = None
    maximum: float | None = None
    mean: float | None = None
    sd: float | None = None


@dataclass(frozen=True)
class Profile:
    n_input: int
    n_complete: int
    columns: dict[str, ColumnProfile] = field(default_factory=dict)

    @property
    def n_dropped(self) -> int:
        return self.n_input - self.n_complete


class Source:
    """Rows of a Parquet file, a folder of Parquet files, or a CSV file, read in batches (read-only)."""

    def __init__(self, path: str | Path, *, batch_rows: int = BATCH_ROWS) -> None:
        p = Path(path)
        if not p.exists():
            raise InputError(f"The data file '{p}' does not exist; check the path.")
        self.path = p
        self.batch_rows = int(batch_rows)
        self.kind = "parquet" if p.is_dir() or p.suffix.lower() in (".parquet", ".pq") else \
            "csv" if p.suffix.lower() in (".csv", ".txt") else ""
        if not self.kind:
            raise InputError(f"The data file '{p.name}' has the ending '{p.suffix}', which is not read in chunks; "
                             "use .parquet, a folder of .parquet files, or .csv.")
        try:
            if self.kind == "parquet":
                self._files = sorted(str(f) for f in pads.dataset(str(p), format="parquet").files)
                if not self._files:
                    raise InputError(f"The folder '{p}' holds no Parquet files; give a .parquet file or a folder of them.")
                schema = pq.read_schema(self._files[0])
                self._types = dict(zip(schema.names, schema.types, strict=False))
            else:
                head = pacsv.open_csv(str(p)).read_next_batch()
                self._types = {f.name: pa.float64() if pa.types.is_integer(f.type) or pa.types.is_floating(f.type)
                               else f.type for f in head.schema}
        except (pa.ArrowInvalid, OSError, StopIteration) as exc:
            raise InputError(f"The data '{p.name}' could not be read as {self.kind}: "
                             f"{str(exc).splitlines()[0] if str(exc) else type(exc).__name__}.") from None
        self.column_names = tuple(self._types)
        self.part: Partition | None = None

    def on(self, part: Partition) -> Source:
        """The rows of ``part`` only, as a plain Source (what a task reads; rows still counted from the file start)."""
        out = Source.__new__(Source)
        out.__dict__.update({k: v for k, v in self.__dict__.items() if k in _SOURCE_FIELDS})
        out.part = part
        return out

    def __reduce__(self) -> Any:
        """A Source travels to a worker as a plain Source (no progress log)."""
        return _rebuild_source, ({k: v for k, v in self.__dict__.items() if k in _SOURCE_FIELDS},)

    def partitions(self, engine: Any = None, *, rows: int | None = None,
                   size: int | None = None) -> list[Partition]:
        """The source cut into partitions: runs of whole Parquet row groups of at most ``rows`` rows
        (default :data:`PARTITION_ROWS`; a row group is never split, so a larger one is a partition alone),
        or CSV byte blocks of about ``size`` bytes (default :data:`PARTITION_BYTES`) ending at a line end,
        whose rows are counted by one task each on ``engine`` (a local count without it)."""
        if self.kind == "parquet":
            target = int(rows or PARTITION_ROWS)
            parts: list[Partition] = []
            start = 0
            for name in self._files:
                meta = pq.ParquetFile(name).metadata
                groups: list[int] = []
                count = 0
                for g in range(meta.num_row_groups):
                    m = meta.row_group(g).num_rows
                    if groups and count + m > target:
                        parts.append(Partition(len(parts), start, count, name, tuple(groups)))
                        start, groups, count = start + count, [], 0
                    groups.append(g)
                    count += m
                if groups and count:
                    parts.append(Partition(len(parts), start, count, name, tuple(groups)))
                    start += count
            return parts
        block = int(size or PARTITION_BYTES)
        total = self.path.stat().st_size
        with open(self.path, "rb") as fh:
            fh.readline()
            edges = [fh.tell()]
            while edges[-1] < total:
                fh.seek(min(total, edges[-1] + block))
                fh.readline()
                edges.append(min(total, fh.tell()))
        spans = [(a, b) for a, b in zip(edges[:-1], edges[1:], strict=True) if b > a]
        blank = [Partition(i, 0, 0, first_byte=a, end_byte=b) for i, (a, b) in enumerate(spans)]
        if engine is None:
            counts = [_count_rows(self, p) for p in blank]
        else:
            counts = engine.map(_count_rows, [(p,) for p in blank], state=self)
        out, start = [], 0
        for p, n in zip(blank, counts, strict=True):
            out.append(Partition(p.index, start, int(n), first_byte=p.first_byte, end_byte=p.end_byte))
            start += int(n)
        return out

    def check_columns(self, names: Sequence[str]) -> None:
        for name in names:
            if name not in self.column_names:
                raise InputError(f"Column {name!r} is not in the data.{close_matches(name, self.column_names)}")

    def batches(self, columns: Sequence[str], batch_rows: int | None = None) -> Iterator[tuple[int, pd.DataFrame]]:
        """(0-based position of the first row, frame of ``columns``) for each batch, in file order;
        ``batch_rows`` rows per batch (at most; default the source's)."""
        self.check_columns(columns)
        size = int(batch_rows or self.batch_rows)
        start = self.part.start if self.part is not None else 0
        try:
            for batch in self._record_batches(list(columns), size):
                if batch.num_rows:
                    yield start, batch.to_pandas()
                    start += batch.num_rows
        except pa.ArrowInvalid as exc:
            raise self._read_error(exc) from None
        except OSError as exc:
            if self.part is None:
                raise
            raise InputError(f"A worker cannot read the data file '{self.path}' ({type(exc).__name__}): every worker "
                             "of the cluster must be able to read the file at the same path (a shared file system, "
                             "or a copy at that path on each machine).") from None

    def _record_batches(self, columns: list[str], size: int) -> Iterator[pa.RecordBatch]:
        """Synchronous readers, one row group (Parquet) or block (CSV) at a time: a scanner that
        reads ahead on its own threads can run far ahead of the kernels and hold much of the file."""
        part = self.part
        if self.kind == "parquet":
            for name in self._files if part is None else [part.file]:
                pf = pq.ParquetFile(name)
                for g in range(pf.num_row_groups) if part is None else part.row_groups:
                    if pf.metadata.row_group(g).num_rows <= ROW_GROUP_WHOLE * size:
                        yield from pf.read_row_group(g, columns=columns, use_threads=False).to_batches(size)
                    else:
                        yield from pf.iter_batches(batch_size=size, row_groups=[g], columns=columns,
                                                   use_threads=False)
            return
        numeric = {c: t for c, t in self._types.items() if c in columns and pa.types.is_floating(t)}
        yield from pacsv.open_csv(
            self._csv_input(), read_options=pacsv.ReadOptions(block_size=max(1 << 20, 64 * size), use_threads=False),
            convert_options=pacsv.ConvertOptions(column_types=numeric, include_columns=columns))

    def _csv_input(self) -> Any:
        """The CSV file, or for a partition its header line followed by the partition's bytes."""
        if self.part is None:
            return str(self.path)
        with open(self.path, "rb") as fh:
            header = fh.readline()
            fh.seek(self.part.first_byte)
            body = fh.read(self.part.end_byte - self.part.first_byte)
        return pa.BufferReader(header + body)

    def _read_error(self, exc: pa.ArrowInvalid) -> InputError:
        m = _CSV_ROW.search(str(exc))
        if m:  # pyarrow counts lines from 1 with the header: data row = line − 1 (+ a partition's first row)
            col, line, value = self.column_names[int(m.group(1))], int(m.group(2)), m.group(3)
            row = line - 1 + (self.part.start if self.part is not None else 0)
            return InputError(f"Column {col!r} has the non-numeric value {value!r} in data row {row}; "
                              "fix it, or leave the cell empty to drop the row.")
        return InputError(f"The data '{self.path.name}' could not be read: {str(exc).splitlines()[0]}")

    def profile(self, columns: Sequence[str], *, categorical: Sequence[str] = (),  # noqa: PLR0912 - one branch per column kind
                plan: Plan | None = None) -> Profile:
        """First pass: rows, complete rows, missing values, levels and numeric summaries of ``columns``
        (with ``plan``, one task per partition on its engine, the partial summaries merged)."""
        columns = list(dict.fromkeys(columns))
        numeric = {c: pa.types.is_integer(t) or pa.types.is_floating(t)
                   for c, t in self._types.items() if c in columns}
        numeric.update(dict.fromkeys(categorical, False))
        batches = _Batches(self, columns, plan)
        sums = fold(batches, lambda: _ProfileSums(columns), lambda acc, item: acc.add(item, numeric))
        missing, counts, moments, infinite = sums.missing, sums.counts, sums.moments, sums.infinite
        n_input, n_complete = sums.n_input, sums.n_complete
        for name in columns:
            if name in infinite:
                row, count = infinite[name]
                raise InputError(f"Column {name!r} has an infinite value in data row {row} ({count} in all); "
                                 "replace it with a finite value or leave the cell empty to drop the row.")
        if n_complete == 0:
            raise InputError(f"No rows are left after dropping rows with missing values in {columns}; "
                             "every row misses at least one of them. Check the columns or fill the gaps.")
        out: dict[str, ColumnProfile] = {}
        for name in columns:
            if numeric[name]:
                m = moments[name]
                out[name] = ColumnProfile(name, True, missing[name], minimum=float(m.minimum[0]),
                                          maximum=float(m.maximum[0]), mean=float(m.mean[0]),
                                          sd=float(np.sqrt(m.variance(1)[0])))
            else:
                vc = counts.get(name, pd.Series(dtype=float))
                order = sorted(vc.index, key=lambda v: (str(type(v)), v))
                out[name] = ColumnProfile(name, False, missing[name], levels=tuple(order),
                                          counts=tuple(int(vc[v]) for v in order))
        return Profile(n_input, n_complete, out)


class _Batches(Partitioned):
    """Passes over (first row, frame) batches of ``columns`` of a source (its partitions kept)."""

    def __init__(self, source: Source, columns: list[str], plan: Plan | None = None) -> None:
        self.source, self.columns, self.plan = source, columns, plan

    def __call__(self) -> Iterator[tuple[int, pd.DataFrame]]:
        return self.source.batches(self.columns)

    def on(self, part: Partition) -> _Batches:
        return _Batches(self.source.on(part), self.columns)


class _ProfileSums:
    """What the profile pass gathers: missing values, level counts, numeric moments, rows, infinite values."""

    def __init__(self, columns: list[str]) -> None:
        self.columns = columns
        self.missing = dict.fromkeys(columns, 0)
        self.counts: dict[str, pd.Series] = {}
        self.moments = {c: RunningMoments(1) for c in columns}
        self.n_input = self.n_complete = 0
        self.infinite: dict[str, list[int]] = {}  # column → [first data row, count]

    def add(self, item: tuple[int, pd.DataFrame], numeric: dict[str, bool]) -> None:
        start, frame = item
        columns, infinite = self.columns, self.infinite
        for name in columns:
            if numeric[name]:
                _check_numeric(name, frame[name].to_numpy(dtype=float, na_value=np.nan), start, infinite)
        na = frame.isna()
        for name in columns:
            self.missing[name] += int(na[name].sum())
        complete = frame.loc[~na.any(axis=1).to_numpy()]
        self.n_input += len(frame)
        self.n_complete += len(complete)
        for name in columns:
            if numeric[name]:
                if name not in infinite:  # the pass ends in an error for that column anyway
                    self.moments[name].add(complete[name].to_numpy(dtype=float))
            else:
                vc = complete[name].value_counts()
                self.counts[name] = vc if name not in self.counts else self.counts[name].add(vc, fill_value=0)

    def merge(self, other: _ProfileSums) -> _ProfileSums:
        """Self followed by the rows of ``other`` (a later partition)."""
        for name in self.columns:
            self.missing[name] += other.missing[name]
            self.moments[name].merge(other.moments[name])
        for name, vc in other.counts.items():
            self.counts[name] = vc if name not in self.counts else self.counts[name].add(vc, fill_value=0)
        self.n_input += other.n_input
        self.n_complete += other.n_complete
        for name, (row, count) in other.infinite.items():
            entry = self.infinite.setdefault(name, [row, 0])  # self's rows come first in the file
            entry[1] += count
        return self


_SOURCE_FIELDS = ("path", "batch_rows", "kind", "_files", "_types", "column_names", "part")


def _rebuild_source(state: dict[str, Any]) -> Source:
    out = Source.__new__(Source)
    out.__dict__.update(state)
    return out


def _count_rows(source: Source, part: Partition) -> int:
    """Rows of a CSV partition (every column read as text, so a bad number does not stop the count)."""
    src = source.on(part)
    reader = pacsv.open_csv(src._csv_input(), read_options=pacsv.ReadOptions(use_threads=False),
                            convert_options=pacsv.ConvertOptions(
                                column_types=dict.fromkeys(source.column_names, pa.string())))
    return sum(batch.num_rows for batch in reader)


def _check_numeric(name: str, values: np.ndarray, start: int, infinite: dict[str, list[int]]) -> None:
    """The in-memory checks of :func:`robustmod.data.prepare_data`, row numbers counted from the file start;
    infinite values are counted over the whole pass (the message gives the first row and the count)."""
    bad = np.isinf(values)
    if bad.any():
        entry = infinite.setdefault(name, [start + int(np.flatnonzero(bad)[0]) + 1, 0])
        entry[1] += int(bad.sum())
    big = np.isfinite(values) & (np.abs(np.nan_to_num(values)) > OVERFLOW_LIMIT)
    if big.any():
        i = int(np.flatnonzero(big)[0])
        raise InputError(f"Column {name!r} has values as large as {values[i]:.3g} (data row {start + i + 1}), whose "
                         "squares overflow; rescale the column (e.g. divide by 1e100) and refit.")


class ModelChunks(Partitioned):
    """The model matrices of a :class:`Source`, chunk by chunk: a ChunkSource for the kernels.

    Each chunk holds the complete rows of one batch: X and y from the formula (formulaic, spec
    fixed on the first pass so every chunk has the same columns), ``rows`` the 0-based positions
    in the file, and ``columns`` with the raw values of the focal predictor and of each continuous
    moderator, plus ``"Z"``: the log-linear variance regressors (a constant, then each of
    ``variance_terms`` on its raw scale; categorical ones as dummies of every level but the first,
    as :meth:`robustmod.design.Design.variance_matrix` builds them).

    ``plan`` (a :class:`~robustmod.kernels.chunks.Plan`) runs the profile pass and every later pass of
    the kernels partition by partition on its engine. ``memory_budget`` (bytes), when given, sets the rows per chunk with
    :func:`robustmod.kernels.chunks.rows_per_chunk` for the widest per-row array a kernel builds,
    White's 1 + k + k(k+1)/2 columns; otherwise chunks are the source's batches.
    """

    def __init__(self, source: Source, spec: Any, *, variance_terms: Sequence[str] | None = None,
                 categorical: Sequence[str] = (), memory_budget: int | None = None, plan: Plan | None = None) -> None:
        from formulaic import model_matrix  # heavy: only when a model is built

        from .design import FORMULA_CONTEXT

        if re.search(r"\b(center|scale|standardize)\s*\(", spec.formula):
            raise InputError(f"The formula {spec.formula!r} uses a transform that learns from the data (centring or "
                             "scaling); with data read in chunks use the center option instead.")
        self.source, self.spec = source, spec
        self.variance_terms = tuple(variance_terms) if variance_terms is not None else (spec.focal, *spec.moderators)
        self.needed = list(dict.fromkeys([*spec.variables, spec.focal, *spec.moderators, *self.variance_terms]))
        source.check_columns(self.needed)
        self.plan = plan
        self.profile = source.profile(self.needed, categorical=categorical, plan=plan)
        self.categorical = tuple(c for c in self.needed if not self.profile.columns[c].numeric)
        self.centering = {name: float(self.profile.columns[name].mean or 0.0)
                          for name in (spec.focal, *spec.moderators)
                          if spec.center and name not in self.categorical}
        self.chunk_rows = source.batch_rows  # until the model's width is known
        first = next(self._frames(), None)
        if first is None:
            raise InputError("No complete rows in the data; check the columns or fill the gaps.")
        try:
            mm = model_matrix(spec.formula, first[1], context=FORMULA_CONTEXT, na_action="ignore")
        except Exception as exc:  # noqa: BLE001  (formulaic raises many kinds; report the first line)
            msg = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
            raise InputError(f"The formula {spec.formula!r} could not be built on these data: {msg}") from None
        self._lhs, self._rhs = mm.lhs.model_spec, mm.rhs.model_spec
        self.term_names = tuple(str(c) for c in mm.rhs.columns)
        k = len(self.term_names)
        self.chunk_rows = source.batch_rows if memory_budget is None else \
            rows_per_chunk(memory_budget, 1 + k + k * (k + 1) // 2)

    def on(self, part: Partition) -> ModelChunks:
        """The model chunks of the rows of ``part`` only (a task's share of a pass)."""
        out = ModelChunks.__new__(ModelChunks)
        out.__dict__.update(self.__dict__)
        out.source = self.source.on(part)
        out.plan = None
        return out

    def _frames(self) -> Iterator[tuple[np.ndarray, pd.DataFrame]]:
        """(0-based file positions, model-scale frame) of the complete rows of each batch."""
        for start, batch in self.source.batches(self.needed, self.chunk_rows):
            keep = ~batch.isna().any(axis=1).to_numpy()
            rows = start + np.flatnonzero(keep)
            frame = batch.loc[keep].reset_index(drop=True)
            for name in self.categorical:
                levels = self.profile.columns[name].levels
                frame[name] = pd.Categorical(frame[name], categories=list(levels))
            for name, mean in self.centering.items():
                frame[name] = frame[name].astype(float) - mean
            yield rows, frame

    def __call__(self) -> Iterator[Any]:
        from .kernels.chunks import Chunk

        for rows, frame in self._frames():
            if len(frame) == 0:
                continue
            y = np.asarray(self._lhs.get_model_matrix(frame), dtype=float)[:, 0]
            X = np.ascontiguousarray(np.asarray(self._rhs.get_model_matrix(frame), dtype=float))
            # formulaic's materializer leaves reference cycles that hold this chunk's frame (and the
            # Arrow buffers under it); left to the full collections they piled up pass after pass
            # (measured: 450 MiB of dead Arrow buffers at 10⁷ rows). A young-generation collection
            # here frees each chunk's cycles while they are still young, for about a millisecond.
            gc.collect(1)
            for arr, names in ((y[:, None], [self.spec.response]), (X, self.term_names)):
                bad = ~np.isfinite(arr)
                if bad.any():
                    i, j = np.argwhere(bad)[0]
                    raise InputError(f"The term {names[j]!r} is not finite in data row {int(rows[i]) + 1} "
                                     "(e.g. log of a value ≤ 0); fix or drop that row, or change the transform.")
            yield Chunk(X, y, rows, self._columns(frame))

    def _columns(self, frame: pd.DataFrame) -> dict[str, np.ndarray]:
        cols: dict[str, np.ndarray] = {}
        for name in (self.spec.focal, *self.spec.moderators):
            if name not in self.categorical:
                cols[name] = frame[name].to_numpy(dtype=float) + self.centering.get(name, 0.0)
        blocks = [np.ones((len(frame), 1))]
        for name in self.variance_terms:
            if name in self.categorical:
                codes = frame[name].cat.codes.to_numpy()
                blocks.append((codes[:, None] == np.arange(1, len(self.profile.columns[name].levels))[None, :])
                              .astype(float))
            else:
                blocks.append(frame[name].to_numpy(dtype=float)[:, None] + self.centering.get(name, 0.0))
        cols["Z"] = np.hstack(blocks)
        return cols
