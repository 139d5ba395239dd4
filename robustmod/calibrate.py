"""How often does each back-end reject the product term on data like the user's?

Datasets are simulated from the fitted variance model of the ``wls`` back-end, keeping
the observed X:  y* = X β̃ + σ̂ᵢ zᵢ with zᵢ ~ N(0, 1), where β̃ is the WLS estimate with the
product-term coefficient(s) set to 0 (false-positive rate) or left at the estimate
(power; the same z, so the two rates are paired). Each frequentist back-end's rejection
rate at alpha is reported with its Monte Carlo SE sqrt(p̂(1 − p̂)/N). A good back-end has a
false-positive rate within Monte Carlo error of alpha (cf. Long & Ervin 2000).

Back-ends answer in batches when they offer ``reject_many(design, Y, alpha, *, seed)``
(Y is n × D; the OLS/HC family shares one QR across all D datasets); otherwise each
dataset is refitted. Datasets are cut into chunks of fixed size, each dataset's noise
comes from its own child of ``np.random.SeedSequence(seed)`` and each chunk's back-end
seed from another; a costly back-end gets one task per dataset with its own seed. Every
task goes to an engine (local processes or a Dask cluster), so the numbers depend neither
on the engine nor on how many workers run.

With clustered rows (a design with cluster codes) the datasets keep the observed clusters:
y* = X β̃ + τ̂ u_g + σ̃ᵢ zᵢ, u_g ~ N(0, 1) per cluster, where τ̂² is a moment estimate of the
cluster-intercept variance from the residuals of β̃ and σ̃ᵢ² = σ̂ᵢ² − τ̂² keeps each row's total
variance at the fitted variance function (see :func:`cluster_intercept_model`).
"""
from __future__ import annotations

import dataclasses
import math
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .backends.base import Fit, Unavailable
from .backends.kernels import twostep_fgls
from .backends.registry import (
    SIMULATION_BACKEND,
    backend_class,
    check_ids,
    make_backend,
)
from .defaults import MAX_DATASETS, MIN_DATASETS
from .design import Design
from .engines import Engine, make_engine
from .engines.base import available_cores
from .errors import InputError, option_error
from .tables import Column, NotApplicable, Table, format_number, join_notes, make_table

#: Datasets per chunk; fixed so that results do not depend on the number of workers.
CHUNK = 50
#: Datasets a costly back-end (one whose class sets ``costly = True``, e.g. a sampler) gets
#: when it is asked for; each one is a full fit.
COSTLY_DATASETS = 20
#: Run the remaining chunks in worker processes when they would take longer than this (s).
PARALLEL_MIN_SECONDS = 2.0


# ---- the simulation model ----------------------------------------------------------
def simulation_model(design: Design, *, seed: int, options: Mapping[str, Any] | None = None
                     ) -> tuple[np.ndarray, np.ndarray, str, list[str]]:
    """(β̃, σ̂, description, notes): mean coefficients and per-row error SD to simulate from.

    From the ``wls`` back-end's fit (its ``params`` and ``sigma_hat``). Should that back-end
    be missing or unable to fit, a multiplicative variance model log σᵢ² = xᵢγ fitted to
    log êᵢ² (Harvey 1976) with an FGLS mean takes its place, and the notes say so.
    """
    reason = ""
    fit: Fit | Unavailable | None
    try:
        fit = make_backend(SIMULATION_BACKEND, **dict(options or {})).fit(design, seed=seed)
    except InputError as exc:
        fit, reason = None, str(exc)
    if isinstance(fit, Unavailable):
        reason = fit.reason
        fit = None
    if fit is not None:
        sigma = getattr(fit, "sigma_hat", None)
        if sigma is None:
            sigma = fit.extras.get("sigma_hat")
        sigma = None if sigma is None else np.asarray(sigma, dtype=float)
        if sigma is not None and sigma.shape == (design.n_obs,) and np.all(np.isfinite(sigma)) and np.all(sigma > 0):
            return (np.array(fit.params, dtype=float), sigma,
                    f"the fitted variance model of the wls back-end ({fit.label}), observed X kept", [])
        reason = "its fit gave no usable per-row error SD (sigma_hat)"
    beta, sigma = twostep_fgls(design.X, design.y, design.X)
    return (beta, sigma,
            "a multiplicative variance model log σ² = Xγ fitted to log ê² (Harvey 1976) with an FGLS mean, observed X kept",
            [f"The wls back-end could not supply the variance model ({reason}); a multiplicative variance "
             "model was used instead."])


def cluster_intercept_model(design: Design, beta: np.ndarray, sigma: np.ndarray) -> tuple[np.ndarray, float]:
    """(σ̃, τ̂): within-cluster SD per row and the SD of the cluster intercepts, by the method of moments.

    With ē_g the mean residual of cluster g (n_g rows) and s_g the mean of σ̂ᵢ² over its rows,
    E[ē_g²] ≈ τ² + (s_g − τ²)/n_g when σ̂ᵢ² = τ² + σ̃ᵢ² is the total variance of a row, so
    τ̂² = Σ_g (ē_g² − s_g/n_g) / Σ_g (1 − 1/n_g), kept in [0, ½·min σ̂ᵢ²] so that every
    σ̃ᵢ² = σ̂ᵢ² − τ̂² stays positive (common practice, no source).
    """
    codes = design.clusters
    if codes is None:
        return sigma, 0.0
    sizes = np.bincount(codes).astype(float)
    resid = design.y - design.X @ beta
    mean_e = np.bincount(codes, weights=resid) / sizes
    s_g = np.bincount(codes, weights=sigma**2) / sizes
    tau2 = float(np.sum(mean_e**2 - s_g / sizes) / np.sum(1.0 - 1.0 / sizes)) if np.any(sizes > 1) else 0.0
    tau2 = min(max(tau2, 0.0), 0.5 * float(np.min(sigma**2)))
    return np.sqrt(sigma**2 - tau2), math.sqrt(tau2)


# ---- one chunk of datasets (an engine task: runs in this process or on a worker) ----
def _noise(seqs: Sequence[np.random.SeedSequence], n: int) -> np.ndarray:
    """n × m standard normals, column j from its own dataset seed."""
    return np.column_stack([np.random.default_rng(s).standard_normal(n) for s in seqs])


def _rejections(backend: Any, design: Design, Y: np.ndarray, alpha: float, seed: int) -> tuple[np.ndarray, int]:
    """(rejected?, number of datasets the back-end could not fit); batched when it can be."""
    if hasattr(backend, "reject_many"):
        return np.asarray(backend.reject_many(design, Y, alpha, seed=seed), dtype=bool), 0
    from . import effects

    seeds = np.random.SeedSequence(seed).generate_state(Y.shape[1])
    out = np.zeros(Y.shape[1], dtype=bool)
    failed = 0
    for j in range(Y.shape[1]):  # a back-end without a batched path: one fit per dataset
        dj = dataclasses.replace(design, y=Y[:, j].copy())  # same X, so the same QR factor
        fit = backend.fit(dj, seed=int(seeds[j]), progress=False)
        if isinstance(fit, Unavailable):
            failed += 1
            continue
        out[j] = effects.interaction(fit, dj, alpha)["supported"]
    return out, failed


def _run_chunk(state: dict[str, Any], ids: tuple[str, ...], start: int, stop: int,
               chunk_seed: np.random.SeedSequence) -> dict[str, Any]:
    """Rejections of back-ends ``ids`` on datasets ``start``…``stop - 1``: one engine task."""
    design: Design = state["design"]
    n = design.n_obs
    codes = design.clusters
    G = 0 if codes is None else int(codes.max()) + 1
    Z = _noise(state["noise_seqs"][start:stop], n + G)  # per dataset: n row draws, then G cluster draws
    E = state["sigma"][:, None] * Z[:n]
    if codes is not None:
        E += state["tau"] * Z[n:][codes]
    Ys = {"null": state["mu0"][:, None] + E}
    if state["power"]:
        Ys["power"] = state["mu1"][:, None] + E
    bseeds = chunk_seed.generate_state(2 * len(ids))
    out: dict[str, Any] = {}
    for b, bid in enumerate(ids):
        backend = make_backend(bid, **state["options"].get(bid, {}))
        out[bid] = {k: _rejections(backend, design, Y, state["alpha"], int(bseeds[2 * b + i]))
                    for i, (k, Y) in enumerate(Ys.items())}
    return out


# ---- the public entry point ---------------------------------------------------------
def _rate(rej: np.ndarray, failed: int) -> dict[str, Any]:
    n = int(rej.size - failed)
    if n <= 0:
        return {"rate": None, "mc_se": None, "n": 0, "failed": int(failed)}
    p = float(rej.sum()) / n
    return {"rate": p, "mc_se": math.sqrt(p * (1 - p) / n), "n": n, "failed": int(failed)}


@dataclass(frozen=True)
class Calibration(Mapping[str, Any]):
    """Simulated false-positive rate and power of each back-end on one design.

    Reads as a mapping with the keys of the results contract (``to_dict()`` gives the dict);
    rates are shares of ``n_datasets`` simulated datasets at level ``alpha`` with their Monte
    Carlo SEs; a back-end that could not be calibrated has null rates and its reason under
    ``unavailable``; ``notes`` are sentences. ``engine``, ``workers`` and ``seconds`` say how the
    run went (the appendix moves them to provenance.json); the rates do not depend on them.
    """

    n_datasets: int
    alpha: float
    seed: int
    false_positive_rate: dict[str, dict[str, Any]]
    power: dict[str, dict[str, Any]] | None
    nominal_mc_se: float
    simulated_from: str
    product_term_under_power: dict[str, float]
    methods: dict[str, str]
    unavailable: dict[str, str]
    workers: int
    seconds: float
    notes: tuple[str, ...]
    engine: str = "local"
    source: str = "calibrate"

    def to_dict(self) -> dict[str, Any]:
        out = {f.name: getattr(self, f.name) for f in dataclasses.fields(self) if f.name != "source"}
        out["notes"] = list(self.notes)
        return out

    def __getitem__(self, key: str) -> Any:
        if key == "source" or key not in self.__dataclass_fields__:
            raise KeyError(key)
        return list(self.notes) if key == "notes" else getattr(self, key)

    def __iter__(self) -> Iterator[str]:
        return (f.name for f in dataclasses.fields(self) if f.name != "source")

    def __len__(self) -> int:
        return len(dataclasses.fields(self)) - 1

    def tables(self) -> list[Table]:
        return [calibration_table(self)]


def _check_arguments(n_datasets: Any, seed: Any, workers: Any, costly_datasets: Any, alpha: Any) -> float:
    """One-line errors for bad calibration options; returns alpha as a float."""
    if (isinstance(n_datasets, bool) or not isinstance(n_datasets, (int, np.integer))
            or not MIN_DATASETS <= n_datasets <= MAX_DATASETS):
        raise option_error("n_datasets", f"a whole number of simulated datasets from {MIN_DATASETS} to {MAX_DATASETS:,}",
                           n_datasets)
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise option_error("seed", "a whole number ≥ 0", seed)
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, (int, np.integer)) or workers < 1):
        raise option_error("workers", "a whole number ≥ 1 (or None for the available cores)", workers)
    if isinstance(costly_datasets, bool) or not isinstance(costly_datasets, (int, np.integer)) or costly_datasets < 1:
        raise option_error("costly_datasets", "a whole number ≥ 1", costly_datasets)
    if isinstance(alpha, bool) or not isinstance(alpha, (int, float)) or not 0 < alpha < 1:
        raise option_error("alpha", "a number in (0, 1)", alpha)
    return float(alpha)


def _prepare_backends(design: Design, ids: list[str], options: Mapping[str, Mapping[str, Any]], notes: list[str],
                      include_costly: bool, seed: int
                      ) -> tuple[list[str], dict[str, dict[str, Any]], list[str], dict[str, str], dict[str, str]]:
    """Options per back-end (with each class's calibration options), the costly ones, those that
    cannot answer on the observed data, and how each is run; appends the notes that apply."""
    run_opts: dict[str, dict[str, Any]] = {bid: dict(options.get(bid, {})) for bid in ids}
    costly: list[str] = []
    for bid in ids:
        klass = backend_class(bid)
        run_opts[bid].update(getattr(klass, "calibration_options", {}))
        if getattr(klass, "costly", False):
            costly.append(bid)
        note = getattr(klass, "calibration_note", "")
        if note and (include_costly or bid not in costly):
            notes.append(note)  # said only of a back-end that is calibrated
    if not include_costly:
        for bid in costly:
            notes.append(f"{bid} was not calibrated (each simulated dataset would need a full fit); ask for it "
                         "with calibrate_costly=True (on the command line: --calibrate-costly).")
        ids = [b for b in ids if b not in costly]
        costly = []
    unavailable: dict[str, str] = {}
    methods: dict[str, str] = {}
    for bid in ids:  # can each back-end answer on the observed data? (a costly one is not tried twice)
        try:
            backend = make_backend(bid, **run_opts[bid])
            fit = backend.fit(design, seed=seed, progress=False) if bid not in costly else None
        except InputError as exc:
            unavailable[bid] = str(exc)
            continue
        if isinstance(fit, Unavailable):
            unavailable[bid] = fit.reason
            continue
        methods[bid] = "batched across datasets" if hasattr(backend, "reject_many") else "refitted per dataset"
    return ids, run_opts, costly, unavailable, methods


def _tasks(freq: list[str], costly: list[str], bounds: list[tuple[int, int]], chunk_seqs: list[np.random.SeedSequence],
           chunk_root: np.random.SeedSequence, m: int) -> list[tuple[Any, ...]]:
    """Engine tasks (ids, start, stop, seed): every chunk of datasets for the batched back-ends, then
    one task per dataset for each costly back-end, each with a seed fixed by its place alone."""
    tasks: list[tuple[Any, ...]] = [(tuple(freq), s, e, q) for (s, e), q in zip(bounds, chunk_seqs, strict=True)] \
        if freq else []
    for bid, root in zip(costly, chunk_root.spawn(len(costly)), strict=True):
        tasks += [((bid,), j, j + 1, q) for j, q in enumerate(root.spawn(m))]
    return tasks


def _run_tasks(state: dict[str, Any], tasks: list[tuple[Any, ...]], engine: Engine | None, n_workers: int,
               bar: Any) -> tuple[list[dict[str, Any]], int]:
    """Results of every task in task order and the number of workers used.

    A given engine runs every task. Without one, the first task runs here and is timed; the rest go
    to local worker processes when they would take longer than PARALLEL_MIN_SECONDS (or include a
    costly back-end), else they run here too.
    """
    def done(offset: int) -> Callable[[int], None]:
        return lambda i: _advance(bar, tasks[offset + i][1:3])

    if engine is not None:
        return engine.map(_run_chunk, tasks, state, on_done=done(0)), engine.workers
    t0 = time.perf_counter()
    first = _run_chunk(state, *tasks[0])
    _advance(bar, tasks[0][1:3])
    rest = tasks[1:]
    expected = (time.perf_counter() - t0) * len(rest)
    if rest and n_workers > 1 and (expected > PARALLEL_MIN_SECONDS or any(len(t[0]) == 1 and t[0][0] in state["costly"]
                                                                           for t in rest)):
        with make_engine("local", workers=min(n_workers, len(rest))) as local:
            return [first, *local.map(_run_chunk, rest, state, on_done=done(1))], local.workers
    results = [first]
    for t in rest:
        results.append(_run_chunk(state, *t))
        _advance(bar, t[1:3])
    return results, 1


def _run_study(state: dict[str, Any], tasks: list[tuple[Any, ...]], engine: Engine | None, n_workers: int, *,
               progress: bool) -> tuple[dict[str, Any], dict[str, Any], int]:
    """Run every task; rejection rates per back-end under the null and under power, and the
    number of workers used."""
    bar = _progress_bar(progress, sum(t[2] - t[1] for t in tasks))
    try:
        results, used_workers = _run_tasks(state, tasks, engine, n_workers, bar) if tasks else ([], 1)
    finally:
        if bar is not None:
            bar.stop()
    parts: dict[str, list[dict[str, Any]]] = {}
    for res in results:  # task order, so datasets stay in order
        for bid, part in res.items():
            parts.setdefault(bid, []).append(part)
    fp: dict[str, Any] = {}
    pw: dict[str, Any] = {}
    for bid, ps in parts.items():
        for key, target in (("null", fp), ("power", pw)):
            if key in ps[0]:
                target[bid] = _rate(np.concatenate([p[key][0] for p in ps]), sum(p[key][1] for p in ps))
    return fp, pw, used_workers


def calibrate(
    design: Design,
    backend_ids: Sequence[str],
    *,
    n_datasets: int = 1000,
    seed: int,
    options: Mapping[str, Mapping[str, Any]] | None = None,
    progress: bool = False,
    power: bool = True,
    workers: int | None = None,
    alpha: float | None = None,
    costly_datasets: int = COSTLY_DATASETS,
    include_costly: bool = True,
    engine: Engine | None = None,
) -> Calibration:
    """Simulated false-positive rate and power of the product-term test of each back-end.

    Parameters
    ----------
    design : Design
        The user's design; its X is kept, y is simulated.
    backend_ids : list of str
        Back-ends to calibrate. A back-end whose class sets ``costly = True`` (the sampler)
        runs on the first ``costly_datasets`` datasets only, and only with ``include_costly``.
    n_datasets : int, default=1000
    seed : int
        Seeds the datasets and every back-end's own randomness.
    options : dict of dicts, optional
        Per back-end options (the simulation back-end's entry also shapes the simulation
        model). A back-end class may fix options of its own for calibration
        (``calibration_options``, e.g. fewer bootstrap replications), and the notes say so.
    progress : bool, default=False
        Show a progress bar.
    power : bool, default=True
        Also simulate with the product term at its WLS estimate.
    workers : int, optional
        Local worker processes when no ``engine`` is given (default: the available cores, used
        only when that pays).
    engine : robustmod.engines.Engine, optional
        Runs every chunk of datasets and every costly fit as a task (e.g. a Dask cluster); the
        caller keeps and closes it. Default: this machine's cores.
    alpha : float, optional
        Test level (default: the design's).

    Returns
    -------
    Calibration
        A mapping with ``n_datasets``, ``alpha``, ``false_positive_rate`` and ``power``
        ({id: {rate, mc_se, n, failed}}), ``simulated_from`` and ``notes``; ``to_dict()`` is a dict.

    Notes
    -----
    y* = X β̃ + σ̂ ⊙ z, z ~ N(0, I), with β̃ and σ̂ from the simulation back-end (``wls``) and
    the product term set to 0 (false-positive rate) or to its estimate (power). The Monte Carlo
    SE of a rate p̂ over N datasets is sqrt(p̂(1 − p̂)/N). Design in the style of Long & Ervin (2000).
    """
    ids = check_ids(list(backend_ids))
    alpha = _check_arguments(n_datasets, seed, workers, costly_datasets, design.spec.alpha if alpha is None else alpha)
    options = {str(k).lower(): dict(v) for k, v in dict(options or {}).items()}
    t_start = time.perf_counter()
    n_datasets = int(n_datasets)

    beta, sigma, source, notes = simulation_model(design, seed=int(seed), options=options.get(SIMULATION_BACKEND))
    sigma, tau = cluster_intercept_model(design, beta, sigma)
    if design.clusters is not None:
        source += (f"; cluster intercepts of SD {tau:.4g} (method of moments) on the observed clusters of "
                   f"{design.cluster_name!r}, their sizes kept")
    beta0 = beta.copy()
    beta0[list(design.interaction_columns)] = 0.0
    noise_root, chunk_root = np.random.SeedSequence(int(seed)).spawn(2)
    noise_seqs = noise_root.spawn(n_datasets)

    ids, run_opts, costly, unavailable, methods = _prepare_backends(design, ids, options, notes, include_costly,
                                                                    int(seed))
    freq = [b for b in ids if b not in unavailable and b not in costly]
    costly_run = [b for b in costly if b not in unavailable]
    state = {"design": design, "options": run_opts, "mu0": design.X @ beta0, "mu1": design.X @ beta,
             "sigma": sigma, "tau": tau, "noise_seqs": noise_seqs, "alpha": float(alpha), "power": bool(power),
             "costly": tuple(costly_run)}
    bounds = [(s, min(s + CHUNK, n_datasets)) for s in range(0, n_datasets, CHUNK)]
    chunk_seqs = chunk_root.spawn(len(bounds))
    m = min(int(costly_datasets), n_datasets)
    tasks = _tasks(freq, costly_run, bounds, chunk_seqs, chunk_root, m)
    n_workers = min(available_cores() if workers is None else int(workers), max(1, len(tasks)))
    fp, pw, used_workers = _run_study(state, tasks, engine, n_workers, progress=progress)
    for bid in costly_run:
        notes.append(f"{bid} was run on the first {m} datasets only (each is a full fit); its rate is the share "
                     f"whose {100 * (1 - alpha):g}% interval of the product term excludes zero.")
    for bid, reason in unavailable.items():
        fp[bid] = {"rate": None, "mc_se": None, "n": 0, "failed": n_datasets}
        if power:
            pw[bid] = {"rate": None, "mc_se": None, "n": 0, "failed": n_datasets}
        notes.append(f"{bid}: not calibrated ({reason})")
    inter = design.interaction_rows() @ beta
    return Calibration(
        n_datasets=n_datasets, alpha=float(alpha), seed=int(seed),
        false_positive_rate={b: fp[b] for b in ids if b in fp},
        power={b: pw[b] for b in ids if b in pw} if power else None,
        nominal_mc_se=math.sqrt(alpha * (1 - alpha) / n_datasets), simulated_from=source,
        product_term_under_power={t: float(v) for t, v in zip(design.interaction_terms, inter, strict=False)},
        methods=methods, unavailable=unavailable, workers=used_workers, seconds=time.perf_counter() - t_start,
        notes=tuple(notes), engine="local" if engine is None else engine.name,
    )


def _progress_bar(progress: bool, total: int) -> Any:
    if not progress:
        return None
    from rich.console import Console
    from rich.progress import Progress

    bar = Progress(transient=True, console=Console(stderr=True))  # stdout may carry the JSON results
    bar.start()
    bar.add_task("calibration datasets", total=total)
    return bar


def _advance(bar: Any, bound: tuple[int, int]) -> None:
    if bar is not None:
        bar.advance(bar.task_ids[0], bound[1] - bound[0])


def calibration_table(cal: Mapping[str, Any]) -> Table:
    """False-positive rate and power of each back-end, with Monte Carlo SEs and one paragraph of notes."""
    fpr, power = cal.get("false_positive_rate") or {}, cal.get("power") or {}
    methods, unavailable = cal.get("methods") or {}, cal.get("unavailable") or {}
    rows = []
    for bid in list(fpr) + [b for b in power if b not in fpr]:
        f, p = fpr.get(bid) or {}, power.get(bid)
        na = NotApplicable("power was not simulated") if p is None else None
        p = p or {}
        how = methods.get(bid) or ("not calibrated: " + unavailable[bid] if bid in unavailable else "")
        rows.append((bid, f.get("rate"), f.get("mc_se"), na or p.get("rate"), na or p.get("mc_se"), f.get("n"),
                     f.get("failed"), how))
    alpha = float(cal.get("alpha", 0.05))
    cols = (Column("backend", "back-end", "code"), Column("false_positive_rate", f"false-positive rate (nominal {alpha:g})"),
            Column("false_positive_mc_se", "Monte Carlo SE"), Column("power", "power"),
            Column("power_mc_se", "Monte Carlo SE"), Column("n", "datasets used", "integer"),
            Column("failed", "failed fits", "integer"), Column("how", "how it was run", "text"))
    head = (f"{cal.get('n_datasets')} datasets simulated from {cal.get('simulated_from', 'the fitted model')}, with "
            "the product term set to zero (false-positive rate) and to its estimate (power). At the nominal level a "
            f"rate's Monte Carlo SE is {format_number(cal.get('nominal_mc_se'))}.")
    return make_table("calibration", f"Calibration on this design ({cal.get('n_datasets')} simulated datasets)", cols,
                      rows, source="calibrate", level=1 - alpha, notes=(head, join_notes(cal.get("notes") or [])))
