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
seed from another, so the numbers do not depend on how many worker processes run.
"""
from __future__ import annotations

import dataclasses
import math
import os
import time
from collections.abc import Iterator, Mapping, Sequence
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from typing import Any

import numpy as np

from .backends.base import Unavailable
from .backends.kernels import twostep_fgls
from .backends.registry import (
    SIMULATION_BACKEND,
    backend_class,
    check_ids,
    make_backend,
)
from .defaults import MAX_DATASETS, MIN_DATASETS
from .design import Design
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
    try:
        fit = make_backend(SIMULATION_BACKEND, **dict(options or {})).fit(design, seed=seed)
    except InputError as exc:
        fit, reason = None, str(exc)
    if isinstance(fit, Unavailable):
        fit, reason = None, fit.reason
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


# ---- one chunk of datasets (runs in the parent or in a worker) ----------------------
_WORKER: dict[str, Any] = {}


def _init_worker(state: dict[str, Any]) -> None:
    try:  # one BLAS thread per worker process: the workers already fill the cores
        from threadpoolctl import threadpool_limits

        threadpool_limits(1)
    except ImportError:  # pragma: no cover
        pass
    _WORKER.clear()
    _WORKER.update(state)


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


def _run_chunk(state: dict[str, Any], start: int, stop: int, chunk_seed: np.random.SeedSequence) -> dict[str, Any]:
    design: Design = state["design"]
    Z = _noise(state["noise_seqs"][start:stop], design.n_obs)
    sig = state["sigma"][:, None]
    Ys = {"null": state["mu0"][:, None] + sig * Z}
    if state["power"]:
        Ys["power"] = state["mu1"][:, None] + sig * Z
    bseeds = chunk_seed.generate_state(2 * len(state["ids"]))
    out: dict[str, Any] = {}
    for b, bid in enumerate(state["ids"]):
        backend = make_backend(bid, **state["options"].get(bid, {}))
        out[bid] = {k: _rejections(backend, design, Y, state["alpha"], int(bseeds[2 * b + i]))
                    for i, (k, Y) in enumerate(Ys.items())}
    return out


def _worker_chunk(start: int, stop: int, chunk_seed: np.random.SeedSequence) -> dict[str, Any]:
    return _run_chunk(_WORKER, start, stop, chunk_seed)


# ---- the public entry point ---------------------------------------------------------
def _rate(rej: np.ndarray, failed: int) -> dict[str, Any]:
    n = int(rej.size - failed)
    if n <= 0:
        return {"rate": None, "mc_se": None, "n": 0, "failed": int(failed)}
    p = float(rej.sum()) / n
    return {"rate": p, "mc_se": math.sqrt(p * (1 - p) / n), "n": n, "failed": int(failed)}


def _cpu_count() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover
        return max(1, os.cpu_count() or 1)


@dataclass(frozen=True)
class Calibration(Mapping[str, Any]):
    """Simulated false-positive rate and power of each back-end on one design.

    Reads as a mapping with the keys of the results contract (``to_dict()`` gives the dict);
    rates are shares of ``n_datasets`` simulated datasets at level ``alpha`` with their Monte
    Carlo SEs; a back-end that could not be calibrated has null rates and its reason under
    ``unavailable``; ``notes`` are sentences.
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


def _run_study(state: dict[str, Any], freq: list[str], costly: list[str], unavailable: dict[str, str],
               bounds: list[tuple[int, int]], chunk_seqs: list[np.random.SeedSequence], chunk_root: np.random.SeedSequence,
               n_workers: int, notes: list[str], *, progress: bool, n_datasets: int, costly_datasets: int
               ) -> tuple[dict[str, Any], dict[str, Any], int]:
    """Run every chunk of datasets (in worker processes when that pays), then the costly back-ends
    on their few datasets: rejection rates per back-end under the null and under power, and the
    number of worker processes used."""
    results: list[dict[str, Any] | None] = [None] * len(bounds)
    alpha, power = state["alpha"], state["power"]
    bar = _progress_bar(progress, n_datasets)
    try:
        used_workers = 1
        if freq:
            t0 = time.perf_counter()
            results[0] = _run_chunk(state, *bounds[0], chunk_seqs[0])
            _advance(bar, bounds[0])
            rest = list(range(1, len(bounds)))
            expected = (time.perf_counter() - t0) * len(rest)
            if rest and n_workers > 1 and expected > PARALLEL_MIN_SECONDS:
                used_workers = n_workers
                with ProcessPoolExecutor(max_workers=n_workers, initializer=_init_worker, initargs=(state,)) as pool:
                    futs = {i: pool.submit(_worker_chunk, *bounds[i], chunk_seqs[i]) for i in rest}
                    for i, fut in futs.items():
                        results[i] = fut.result()
                        _advance(bar, bounds[i])
            else:
                for i in rest:
                    results[i] = _run_chunk(state, *bounds[i], chunk_seqs[i])
                    _advance(bar, bounds[i])
        fp: dict[str, Any] = {}
        pw: dict[str, Any] = {}
        for bid in freq:
            parts = [r[bid] for r in results if r is not None]
            for key, target in (("null", fp), ("power", pw)):
                if key in parts[0]:
                    target[bid] = _rate(np.concatenate([p[key][0] for p in parts]), sum(p[key][1] for p in parts))
        for bid in (b for b in costly if b not in unavailable):
            m = min(costly_datasets, n_datasets)
            res = _run_chunk({**state, "ids": [bid]}, 0, m, chunk_root.spawn(1)[0])
            fp[bid] = _rate(*res[bid]["null"])
            if power:
                pw[bid] = _rate(*res[bid]["power"])
            notes.append(f"{bid} was run on the first {m} datasets only (each is a full fit); its rate is the share "
                         f"whose {100 * (1 - alpha):g}% interval of the product term excludes zero.")
    finally:
        if bar is not None:
            bar.stop()
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
        Worker processes (default: the available cores, used only when that pays).
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
    beta0 = beta.copy()
    beta0[list(design.interaction_columns)] = 0.0
    noise_root, chunk_root = np.random.SeedSequence(int(seed)).spawn(2)
    noise_seqs = noise_root.spawn(n_datasets)

    ids, run_opts, costly, unavailable, methods = _prepare_backends(design, ids, options, notes, include_costly,
                                                                    int(seed))
    freq = [b for b in ids if b not in unavailable and b not in costly]
    state = {"design": design, "ids": freq, "options": run_opts, "mu0": design.X @ beta0, "mu1": design.X @ beta,
             "sigma": sigma, "noise_seqs": noise_seqs, "alpha": float(alpha), "power": bool(power)}
    bounds = [(s, min(s + CHUNK, n_datasets)) for s in range(0, n_datasets, CHUNK)]
    chunk_seqs = chunk_root.spawn(len(bounds))
    n_workers = min(_cpu_count() if workers is None else int(workers), len(bounds))

    fp, pw, used_workers = _run_study(state, freq, costly, unavailable, bounds, chunk_seqs, chunk_root, n_workers, notes,
                                      progress=progress, n_datasets=n_datasets,
                                      costly_datasets=int(costly_datasets))
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
        notes=tuple(notes),
    )


def _progress_bar(progress: bool, total: int) -> Any:
    if not progress:
        return None
    from rich.progress import Progress

    bar = Progress(transient=True)
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
