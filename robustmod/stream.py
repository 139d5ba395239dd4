"""compare() on a file read in chunks: the memory budget, the streamed design, the back-ends' fits.

A Parquet file, a folder of Parquet files or a CSV file is read a batch at a time
(:mod:`robustmod.source`); every computation is a streaming kernel of :mod:`robustmod.kernels`,
which keeps only k × k summaries between chunks. The result is an ordinary :class:`Comparison`:
the same ``to_dict()`` contract, tables and terminal output as in memory.

When to stream (``stream=None``): a file is read in chunks when its estimated frame of the
model's columns (rows × columns × 8 bytes; a CSV file's size on disk stands for it) times
:data:`robustmod.defaults.STREAM_MEMORY_FACTOR` exceeds the memory budget. The budget is
``memory`` ("2GB", "512MB", or bytes; K/M/G/T count in powers of 1024), by default
:data:`robustmod.defaults.MEMORY_SHARE` of the memory available when the run starts. One eighth
of the budget (at most 256 MiB) is the work space of one chunk.

The design without X (:class:`StreamedDesign`) carries what effects and tables need: term names,
probe points, the moderators' observed range, mean and SD from the first pass (percentile probe
values from exact streamed quantiles), reference values, warnings and the number of rows. Which
back-ends stream is declared by each back-end (``Backend.streams``, recorded in its registry
entry); the others are listed as unavailable with their reason. The calibration is not run on
data read in chunks (it simulates whole outcome vectors of the design); a warning says so.
"""
from __future__ import annotations

import dataclasses
import math
import os
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .backends.base import Fit, Unavailable
from .data import DROP_WARNING_SHARE, PreparedData
from .defaults import MEMORY_SHARE, STREAM_MEMORY_FACTOR
from .design import (
    Design,
    ModeratorInfo,
    _focal_enters_linearly,
    _interaction_columns,
    _probe_range_note,
)
from .errors import InputError
from .kernels.chunks import DEFAULT_BUDGET, ChunkSource, Partitioned, Plan, fold
from .kernels.ols import StreamedOLS, streamed_ols
from .kernels.order import quantiles
from .memory import parse_memory
from .source import ModelChunks, Partition, Source
from .spec import ModelSpec, parse_probe_rule
from .thin_qr import ThinQR, factor

#: File endings (besides a folder of Parquet files) that are read in chunks.
STREAM_SUFFIXES = (".parquet", ".pq", ".csv", ".txt")
#: Share of the memory budget that one chunk's work space may take, and its upper end.
CHUNK_SHARE = 8
#: Rows per chunk regardless of the budget (None: from the budget). The tests set a few rows.
CHUNK_ROWS: int | None = None
#: Rows per batch of the first pass (and of every pass when no budget applies).
BATCH_ROWS = 1 << 17
#: Rows of a partition (one task) when an engine runs the passes (None: the source's default, which depends
#: on the file alone, so the merges and their rounding are the same on any number of workers). Tests set few.
PARTITION_ROWS: int | None = None
#: A pass shows its progress bar once it has taken this long (seconds).
PROGRESS_AFTER = 2.0


# ---- the memory budget ----------------------------------------------------------------------------
def available_memory() -> int:
    """Bytes of memory available now (psutil's ``available``; else the machine's physical memory)."""
    try:
        import psutil  # type: ignore[import-untyped]  # noqa: PLC0415  (optional: only the default budget depends on it)

        return int(psutil.virtual_memory().available)
    except ImportError:  # pragma: no cover - psutil ships with the test extras
        return int(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES"))


def memory_budget(memory: Any = None) -> int:
    """The budget in bytes: ``memory`` parsed, or MEMORY_SHARE of the memory available now."""
    return parse_memory(memory) if memory is not None else int(MEMORY_SHARE * available_memory())


def chunk_budget(budget: int) -> int:
    """Work space of one chunk: an eighth of the budget, at most the kernels' default (256 MiB)."""
    return max(16 * 2**20, min(DEFAULT_BUDGET, budget // CHUNK_SHARE))


def streamable(path: Path) -> bool:
    return path.is_dir() or path.suffix.lower() in STREAM_SUFFIXES


def estimated_frame_bytes(path: Path, n_columns: int) -> int:
    """Bytes of the frame of ``n_columns`` model columns: rows from the Parquet metadata × columns × 8;
    for a CSV file its size on disk times the share of its columns the model uses."""
    import pyarrow.dataset as pads  # noqa: PLC0415
    import pyarrow.parquet as pq  # noqa: PLC0415

    if path.is_dir() or path.suffix.lower() in (".parquet", ".pq"):
        try:
            files = pads.dataset(str(path), format="parquet").files
            rows = sum(pq.ParquetFile(f).metadata.num_rows for f in files)
        except (OSError, ValueError):
            return 0  # unreadable: the in-memory reader gives the one-line message
        return int(rows) * n_columns * 8
    try:
        with open(path, encoding="utf-8", errors="replace") as fh:
            header = fh.readline()
        total = max(1, header.count(",") + 1)
        return int(path.stat().st_size * min(1.0, n_columns / total))
    except OSError:
        return 0


def choose_stream(data: Any, stream: bool | None, budget: int, spec: ModelSpec,
                  reading: Mapping[str, Any]) -> bool:
    """Whether compare() reads ``data`` in chunks (see the module docstring); a forced choice that
    cannot be honoured is a one-line InputError naming the fix."""
    if stream is not None and not isinstance(stream, bool):
        raise InputError(f"The 'stream' option must be true, false or left out (automatic); got {stream!r}.")
    if not isinstance(data, (str, Path)):
        if stream:
            raise InputError("stream=True reads a file in chunks, but the data given are already in memory; "
                             "pass the path of a Parquet or CSV file, or leave 'stream' out.")
        return False
    path = Path(data)
    if stream is False or not path.exists():
        return False
    if not streamable(path):
        if stream:
            raise InputError(f"The data file '{path.name}' cannot be read in chunks (only .parquet, a folder of "
                             ".parquet files and .csv can); convert it to Parquet, or use --no-stream.")
        return False
    if stream is None:
        columns = len(dict.fromkeys([*spec.variables, spec.focal, *spec.moderators]))
        if estimated_frame_bytes(path, columns) * STREAM_MEMORY_FACTOR <= budget:
            return False
    given = [name for name, value in reading.items() if value is not None]
    if given:
        opts = ", ".join(f"--{n.replace('_', '-')}" for n in given)
        raise InputError(f"Data read in chunks take no {opts} (pyarrow reads commas, empty cells as missing); "
                         "convert the file to Parquet, or read it into memory with --no-stream.")
    return True


# ---- progress over passes -------------------------------------------------------------------------
class PassLog:
    """Counts the passes over the file; each pass that runs longer than PROGRESS_AFTER seconds shows a
    rich progress bar on stderr named after the current stage (only when ``show``)."""

    def __init__(self, show: bool) -> None:
        self.show = show
        self.total: int | None = None
        self.passes = 0
        self._stage: str | Callable[[int], str] = "profile"
        self._in_stage = 0
        self._progress: Any = None
        self._open_task: dict[str, Any] | None = None

    def set_stage(self, stage: str | Callable[[int], str]) -> None:
        self._stage, self._in_stage = stage, 0

    def label(self) -> str:
        self._in_stage += 1
        s = self._stage
        return s(self._in_stage) if callable(s) else (s if self._in_stage == 1 else f"{s}, pass {self._in_stage}")

    def track(self, batches: Iterator[tuple[int, pd.DataFrame]]) -> Iterator[tuple[int, pd.DataFrame]]:
        self.passes += 1
        name = self.label()
        t0, done, task = time.perf_counter(), 0, None
        try:
            for start, frame in batches:
                yield start, frame
                done += len(frame)
                if not self.show:
                    continue
                if task is None and time.perf_counter() - t0 > PROGRESS_AFTER:
                    task = self._bars().add_task(name, total=self.total, completed=done)
                elif task is not None:
                    self._progress.update(task, completed=done)
        finally:
            if task is not None:
                self._progress.remove_task(task)

    def tasks(self, partitions: Sequence[Partition]) -> Callable[[int], None]:
        """A pass run as one task per partition (on an engine): counted and named as :meth:`track` does;
        the returned ``on_done(i)`` advances the bar by partition i's rows. :meth:`end_tasks` closes it."""
        self.passes += 1
        name = self.label()
        t0 = time.perf_counter()
        state: dict[str, Any] = {"done": 0, "task": None}

        def on_done(i: int) -> None:
            state["done"] += partitions[i].rows
            if not self.show:
                return
            if state["task"] is None and time.perf_counter() - t0 > PROGRESS_AFTER:
                state["task"] = self._bars().add_task(name, total=self.total, completed=state["done"])
            elif state["task"] is not None:
                self._progress.update(state["task"], completed=state["done"])

        self._open_task = state
        return on_done

    def end_tasks(self) -> None:
        state = self._open_task
        if state is not None and state["task"] is not None and self._progress is not None:
            self._progress.remove_task(state["task"])
        self._open_task = None

    def _bars(self) -> Any:
        if self._progress is None:
            from rich.console import Console  # noqa: PLC0415  (only for passes that take a while)
            from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn  # noqa: PLC0415

            self._progress = Progress(TextColumn("{task.description}"), BarColumn(),
                                      TextColumn("{task.completed:,} rows"), TimeElapsedColumn(),
                                      console=Console(stderr=True), transient=True)
            self._progress.start()
        return self._progress

    def close(self) -> None:
        if self._progress is not None:
            self._progress.stop()
            self._progress = None


class TrackedSource(Source):
    """A Source whose every pass is counted (and shown, if asked) by a :class:`PassLog`."""

    def __init__(self, path: str | Path, log: PassLog, *, batch_rows: int) -> None:
        super().__init__(path, batch_rows=batch_rows)
        self.log = log

    def batches(self, columns: Sequence[str], batch_rows: int | None = None) -> Iterator[tuple[int, pd.DataFrame]]:
        return self.log.track(super().batches(columns, batch_rows))


# ---- the design without X -------------------------------------------------------------------------
@dataclass(frozen=True)
class StreamedRows(PreparedData):
    """What is known of the rows of a file read in chunks: counts, not the rows themselves."""

    n_used: int = 0
    n_dropped_rows: int = 0

    @property
    def n_obs(self) -> int:
        return self.n_used

    @property
    def n_dropped(self) -> int:
        return self.n_dropped_rows


@dataclass(frozen=True, eq=False)
class StreamedDesign(Design):
    """A :class:`Design` whose rows stay in the file: X and y are empty (0 rows), ``n_rows`` counts the
    rows used. L rows, probe points and the moderators' facts work as in memory."""

    n_rows: int = 0
    focal_sd: float = 1.0  # SD (ddof 0) of the focal predictor, for the derivative step

    @property
    def n_obs(self) -> int:
        return self.n_rows

    @property
    def n_params(self) -> int:
        return len(self.term_names)

    def _focal_step(self) -> float:
        return 1e-4 * (self.focal_sd if self.focal_sd > 0 else 1.0)


class ColumnValues(Partitioned):
    """Passes over one column's values on the complete rows (no model matrix is built)."""

    def __init__(self, source: Source, needed: Sequence[str], column: str, chunk_rows: int,
                 plan: Plan | None = None) -> None:
        self.source, self.needed, self.column, self.chunk_rows = source, list(needed), column, chunk_rows
        self.plan = plan

    def __call__(self) -> Iterator[np.ndarray]:
        for _, batch in self.source.batches(self.needed, self.chunk_rows):
            keep = ~batch.isna().any(axis=1).to_numpy()
            yield batch[self.column].to_numpy(dtype=float)[keep]

    def on(self, part: Partition) -> ColumnValues:
        return ColumnValues(self.source.on(part), self.needed, self.column, self.chunk_rows)


def _values(chunks: ModelChunks, column: str) -> ColumnValues:
    """A pass over one column's values on the complete rows of ``chunks``' file (its partitions kept)."""
    return ColumnValues(chunks.source, chunks.needed, column, chunks.chunk_rows, chunks.plan)


def _probe_points(spec: ModelSpec, moderators: dict[str, ModeratorInfo], warnings: list[str],
                  percentile: Callable[[str, list[float]], list[float]]) -> tuple[dict[str, Any], ...]:
    """As :func:`robustmod.design.build_design` sets them (continuous moderators), percentiles streamed."""
    import itertools  # noqa: PLC0415

    per: list[list[float]] = []
    for name, info in moderators.items():
        kind, vals = parse_probe_rule(spec.probe.get(name), name)
        assert info.mean is not None and info.sd is not None
        if kind == "levels":
            raise InputError(f"The probe values for the continuous moderator {name!r} must be numbers; got {list(vals)}.")
        if kind == "sd":
            values = [info.mean - info.sd, info.mean, info.mean + info.sd]
        elif kind == "percentiles":
            values = percentile(name, [float(q) for q in vals])
        else:
            values = [float(v) for v in vals]
        if kind != "percentiles" and (note := _probe_range_note(name, info, [float(v) for v in values], kind)):
            warnings.append(note)
        per.append([float(v) for v in values])
    names = list(moderators)
    return tuple(dict(zip(names, combo, strict=False)) for combo in itertools.product(*per))


def streamed_design(chunks: ModelChunks, spec: ModelSpec, chunk_rows: int) -> StreamedDesign:
    """The design of the file's complete rows from the first pass (no X is held)."""
    prof = chunks.profile
    cats = [m for m in spec.moderators if m in chunks.categorical]
    if cats:
        raise InputError(f"The moderator {cats[0]!r} is categorical; data read in chunks take continuous moderators "
                         "only. Read the data into memory (--no-stream), or code the moderator as a number.")
    n, k = prof.n_complete, len(chunks.term_names)
    if n <= k + 1:
        raise InputError(f"The model has {k} coefficients but only {n} complete rows; it needs at least {k + 2} rows "
                         "(fewer terms or more data).")
    moderators = {}
    for name in spec.moderators:
        c = prof.columns[name]
        moderators[name] = ModeratorInfo(name, False, mean=c.mean, sd=c.sd, minimum=c.minimum, maximum=c.maximum)
    warnings: list[str] = []
    if prof.n_dropped and prof.n_dropped / prof.n_input > DROP_WARNING_SHARE:
        warnings.append(f"Listwise deletion dropped {prof.n_dropped} of {prof.n_input} rows "
                        f"({100 * prof.n_dropped / prof.n_input:.0f}%); results describe the complete cases only.")

    def percentile(name: str, qs: list[float]) -> list[float]:
        got = quantiles(_values(chunks, name), [q / 100 for q in qs])
        return [float(v) for v in got]

    probe_points = _probe_points(spec, moderators, warnings, percentile)
    reference: dict[str, Any] = {}
    one_row: dict[str, Any] = {}
    for name in chunks.needed:
        if name == spec.response:
            continue
        c = prof.columns[name]
        if name in chunks.categorical:
            reference[name] = c.levels[0]
            one_row[name] = pd.Categorical([c.levels[0]], categories=list(c.levels))
        else:
            reference[name] = float(c.mean or 0.0) - chunks.centering.get(name, 0.0)
            one_row[name] = [reference[name]]
    reference[spec.focal] = 0.0
    focal = prof.columns[spec.focal]
    focal_sd = float(focal.sd or 0.0) * math.sqrt((n - 1) / n)
    rows = StreamedRows(pd.DataFrame(columns=list(chunks.needed)), prof.n_input, (), (), tuple(warnings), None,
                        n_used=n, n_dropped_rows=prof.n_dropped)
    term_names = tuple(chunks.term_names)
    design = StreamedDesign(
        spec=spec, y=np.zeros(0), X=np.zeros((0, k)), term_names=term_names,
        interaction_columns=_interaction_columns(chunks._rhs, spec, term_names), moderators=moderators,
        probe_points=probe_points, reference=reference, centering=dict(chunks.centering), data=rows,
        focal_linear=True, focal_mean=float(focal.mean or 0.0), warnings=tuple(warnings),
        qr=ThinQR(np.eye(k), Q=np.zeros((0, k))), _model_spec=chunks._rhs, _frame=pd.DataFrame(one_row),
        n_rows=n, focal_sd=focal_sd)
    if _focal_enters_linearly(design):
        return design
    return dataclasses.replace(design, focal_linear=False, warnings=design.warnings + (
        f"The focal predictor {spec.focal!r} enters the model non-linearly; its conditional effect is "
        f"the derivative d E[y] / d {spec.focal} at {spec.focal} = {design.focal_mean:.4g} (its mean).",))


# ---- what a back-end's fit_stream receives ---------------------------------------------------------
@dataclass(eq=False)
class StreamData:
    """The file, its model chunks and design, and the passes several back-ends share.

    ``chunks`` is the :data:`~robustmod.kernels.chunks.ChunkSource` of the model matrices (columns:
    the raw focal predictor, each moderator, and ``"Z"``, the default log-linear variance regressors);
    :meth:`ols` the shared OLS fit (every kind the back-ends asked for, in one pair of passes);
    :meth:`stage` names the passes for the progress bars; :meth:`rows_design` reads chosen rows
    into an in-memory :class:`Design` in one pass.
    """

    source: TrackedSource
    chunks: ModelChunks
    design: StreamedDesign
    log: PassLog
    budget: int
    kinds: tuple[str, ...] = ()
    consumers: list[Any] = field(default_factory=list)
    _ols: StreamedOLS | None = None

    @contextmanager
    def stage(self, name: str | Callable[[int], str]) -> Iterator[None]:
        """Name every pass inside the block (a text, or a function of the pass number in the stage)."""
        self.log.set_stage(name)
        try:
            yield
        finally:
            self.log.set_stage("other")

    def ols(self) -> StreamedOLS:
        """The OLS fit with every covariance kind asked for (computed on first use, once)."""
        if self._ols is None:
            with self.stage(lambda i: "OLS factor" if i == 1 else "OLS residuals and tests" if i == 2
                            else f"OLS, pass {i}"):
                self._ols = streamed_ols(self.chunks, tuple(dict.fromkeys(self.kinds or ("ols", "hc3"))),
                                         names=self.design.term_names, consumers=self.consumers)
        return self._ols

    def ols_fit(self, kind: str, *, label: str | None = None, backend_id: str | None = None) -> Fit | Unavailable:
        """The shared fit's Wald fit of ``kind`` ('ols' or an HC id); a kind not asked for costs its own passes."""
        fit = self.ols()
        if kind not in fit.cov:
            with self.stage(f"OLS {kind.upper()}"):
                fit = streamed_ols(self.chunks, (kind,), names=self.design.term_names)
        return fit.fit(kind, self.design.term_names, label=label, backend_id=backend_id)

    def variance_chunks(self, terms: Sequence[str] | None) -> tuple[ChunkSource, tuple[str, ...]]:
        """Chunks whose ``columns["Z"]`` is the log-linear variance design of ``terms`` (default the focal
        predictor and the moderators), and its labels as :meth:`Design.variance_matrix` names them."""
        spec = self.design.spec
        names = tuple(terms) if terms is not None else (spec.focal, *spec.moderators)
        chunks = self.chunks
        if names != chunks.variance_terms:
            self.source.check_columns(names)
            with self.stage("profile for the variance terms"):
                chunks = ModelChunks(self.source, spec, variance_terms=names, categorical=(),
                                     memory_budget=chunk_budget(self.budget), plan=self.chunks.plan)
                chunks.chunk_rows = CHUNK_ROWS or chunks.chunk_rows
        labels = ["Intercept"]
        for name in names:
            prof = chunks.profile.columns[name]
            labels += [f"{name}[T.{lv}]" for lv in prof.levels[1:]] if not prof.numeric else [name]
        return chunks, tuple(labels)

    def rows_design(self, positions: np.ndarray | None) -> Design:
        """An in-memory Design of the complete rows at ``positions`` (0-based among the complete rows, sorted;
        None: all of them), read in one pass; same columns, centring and levels as the streamed design."""
        c = self.chunks
        frames, seen = [], 0
        want = None if positions is None else np.asarray(positions, dtype=np.int64)
        for _rows, frame in c._frames():
            m = len(frame)
            if want is None:
                frames.append(frame)
            else:
                lo, hi = np.searchsorted(want, [seen, seen + m])
                if hi > lo:
                    frames.append(frame.iloc[want[lo:hi] - seen])
            seen += m
        model = pd.concat(frames, ignore_index=True)
        X = np.ascontiguousarray(np.asarray(c._rhs.get_model_matrix(model), dtype=float))
        y = np.asarray(c._lhs.get_model_matrix(model), dtype=float)[:, 0].copy()
        raw = model.copy()
        for name, mean in c.centering.items():
            raw[name] = raw[name] + mean
        d = self.design
        data = PreparedData(raw, len(raw), (), (), (), raw)
        return Design(spec=d.spec, y=y, X=X, term_names=d.term_names, interaction_columns=d.interaction_columns,
                      moderators=d.moderators, probe_points=d.probe_points, reference=d.reference,
                      centering=d.centering, data=data, focal_linear=d.focal_linear, focal_mean=d.focal_mean,
                      warnings=(), qr=factor(X), _model_spec=d._model_spec, _frame=d._frame)


# ---- compare() on a file read in chunks ------------------------------------------------------------
def stream_compare(path: str | Path, spec: ModelSpec, ids: list[str], primary: str, options: dict[str, Any], *,
                   budget: int, calibration: int | None, progress: bool, on_step: Any, started: float,
                   engine: Any = None) -> Any:
    """The work of :func:`robustmod.compare` for a file read in chunks (see the module docstring).

    With ``engine`` (an :class:`robustmod.engines.Engine`, e.g. Dask) every pass over the file (the profile
    and each pass of the kernels) runs as one task per partition of the file (:func:`robustmod.source.Source.partitions`),
    the partial sums merged by a tree reduction (:func:`robustmod.kernels.chunks.fold`)."""
    from .backends.registry import entry, make_backend  # noqa: PLC0415
    from .compare import Comparison, evaluate_fit, mark_degenerate  # noqa: PLC0415
    from .steps import report_step  # noqa: PLC0415
    from .stream_diagnostics import DiagnosticPasses  # noqa: PLC0415

    if spec.cluster is not None:
        raise InputError("Clustered rows (--cluster) are not read in chunks: the cluster-robust fits need the whole "
                         "design in memory; read the data into memory with --no-stream, or leave out --cluster.")
    log = PassLog(progress)
    try:
        cb = chunk_budget(budget)
        source = TrackedSource(path, log, batch_rows=CHUNK_ROWS or BATCH_ROWS)
        log.total = _file_rows(source)
        chunks = ModelChunks(source, spec, memory_budget=cb, plan=plan_for(source, engine))
        chunks.chunk_rows = CHUNK_ROWS or chunks.chunk_rows
        log.total = chunks.profile.n_input
        data = StreamData(source, chunks, streamed_design(chunks, spec, chunks.chunk_rows), log, budget)
        report_step(on_step, "profile and design (read in chunks)", started)
        backends = {bid: make_backend(bid, **dict(options.get(bid, {}))) for bid in ids}
        data.kinds = tuple(dict.fromkeys(["ols", "hc3", *(k for b in backends.values() for k in b.shared_ols_kinds())]))
        t0 = time.perf_counter()
        diag = DiagnosticPasses(data, alpha=spec.alpha)
        diag.before_ols()
        data.ols()
        report_step(on_step, "OLS and its residual pass", t0)
        results = {}
        for bid, backend in backends.items():
            t0 = time.perf_counter()
            if entry(bid).streams:
                fit = backend.fit_stream(data, seed=spec.seed, progress=progress)
            else:
                fit = Unavailable(bid, backend.label,
                                  f"{backend.label} cannot fit data read in chunks: {backend.stream_reason}.")
            results[bid] = evaluate_fit(fit, data.design, spec.alpha, time.perf_counter() - t0)
            report_step(on_step, f"back-end {bid}", t0)
        ols = data.ols()
        note = leverage_one_note(ols) if ols.leverage_one_count else None
        if note is not None:
            results = mark_degenerate(results, note)
        if not results[primary].available:
            raise InputError(f"The primary back-end {primary!r} cannot answer on these data ({results[primary].reason}) "
                             "Choose another primary back-end (e.g. hc0) or fix the data.")
        t0 = time.perf_counter()
        diagnostics = diag.result()
        report_step(on_step, "diagnostics", t0)
        region_shares(data, results)
        warnings = list(data.design.warnings) + ([note] if note else [])
        warnings.append(_read_note(chunks, log, budget, engine))
        if calibration is not None:
            warnings.append("The calibration was not run: it simulates whole outcome vectors of the design, which data "
                            "read in chunks do not hold in memory; run it on a subsample of the file read into memory.")
        return Comparison(spec, data.design, results, primary, diagnostics, None, tuple(warnings), str(path))
    finally:
        log.close()


def _read_note(chunks: ModelChunks, log: PassLog, budget: int, engine: Any) -> str:
    """The warning that says how the file was read: chunk size, passes, partitions, budget."""
    passes = log.passes
    split = "" if chunks.plan is None else f", {len(chunks.plan.partitions)} partitions as {engine.name} tasks"
    return (f"The data were read in chunks of up to {chunks.chunk_rows:,} rows ({passes} passes over the file{split}; "
            f"memory budget {budget / 2**30:.2f} GiB): every number comes from the streaming kernels "
            "(docs/method-streaming.md).")


def plan_for(source: Source, engine: Any) -> Plan | None:
    """The partitions of the file for ``engine`` (None without an engine: every pass in this process)."""
    if engine is None:
        return None
    log = source.log if isinstance(source, TrackedSource) else None
    return Plan(engine, source.partitions(engine, rows=PARTITION_ROWS), log=log)


def _file_rows(source: Source) -> int | None:
    """Rows of a Parquet source from its metadata (None for CSV: unknown before the first pass)."""
    if source.kind != "parquet":
        return None
    import pyarrow.parquet as pq  # noqa: PLC0415

    return int(sum(pq.ParquetFile(f).metadata.num_rows for f in source._files))


def leverage_one_note(ols: StreamedOLS) -> str:
    """The leverage-one warning of the in-memory comparison, from the streamed count and first rows."""
    rows = ", ".join(str(int(r) + 1) for r in ols.leverage_one_rows)
    more = " …" if ols.leverage_one_count > ols.leverage_one_rows.size else ""
    return (f"Data row(s) {rows}{more} have leverage 1 (a category or dummy with a single row); their residuals are "
            "zero, so standard errors built from residuals are degenerate there. Merge that level with another, "
            "drop the row(s) or the term.")


class _Counts:
    """Rows seen, and rows inside each region."""

    def __init__(self, n: int) -> None:
        self.total = 0
        self.inside = np.zeros(n, dtype=np.int64)

    @staticmethod
    def maker(n: int) -> Callable[[], _Counts]:
        return lambda: _Counts(n)

    @staticmethod
    def stepper(intervals: list[list[Any]]) -> Callable[[_Counts, np.ndarray], None]:
        """Counts the values inside each region's significant intervals (None: no bound)."""
        def step(acc: _Counts, v: np.ndarray) -> None:
            acc.total += v.size
            for i, spans in enumerate(intervals):
                hit = np.zeros(v.size, dtype=bool)
                for lo, hi in spans:
                    hit |= (v >= (-np.inf if lo is None else lo)) & (v <= (np.inf if hi is None else hi))
                acc.inside[i] += int(hit.sum())
        return step

    def merge(self, other: _Counts) -> _Counts:
        self.total += other.total
        self.inside = self.inside + other.inside
        return self


def region_shares(data: StreamData, results: Mapping[str, Any]) -> None:
    """Share of observed moderator values inside each region's significant intervals: one pass over the
    moderator column for every region of every back-end (the in-memory regions count the same rows)."""
    regions: list[dict[str, Any]] = []
    for r in results.values():
        regions += [g for g in (r.significance_region, r.simultaneous_region, *r.regions_by_other) if g]
    if not regions:
        return
    by_mod: dict[str, list[dict[str, Any]]] = {}
    for g in regions:
        by_mod.setdefault(g["moderator"], []).append(g)
    for moderator, gs in by_mod.items():
        with data.stage(f"region shares along {moderator}"):
            got = fold(_values(data.chunks, moderator), _Counts.maker(len(gs)),
                       _Counts.stepper([list(g["significant_intervals"]) for g in gs]))
        inside, total = got.inside, got.total
        for g, count in zip(gs, inside, strict=True):
            g["share_of_observed_significant"] = float(count / total) if total else None


__all__ = ["StreamData", "StreamedDesign", "choose_stream", "memory_budget", "parse_memory", "stream_compare"]
