"""Run several back-ends on one design and put them side by side.

``compare()`` is the package's main entry point. The result's ``to_dict()`` follows the
results contract of docs/results.md (schema ``robustmod/results-v1``); its ``table()``,
``str()`` and ``_repr_html_()`` all come from one summary, so the terminal, Jupyter and
the appendix never disagree.
"""
from __future__ import annotations

import dataclasses
import html
import time
from collections.abc import Callable, Mapping, Sequence
from contextlib import ExitStack
from dataclasses import dataclass, field
from functools import cached_property, partial
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from . import effects
from .backends.base import Fit, Unavailable
from .backends.kernels import leverage_one_note
from .backends.registry import CONSTANT_VARIANCE, check_ids, independent_rows_ids, make_backend, residual_per_row_ids
from .blas_threads import one_blas_thread
from .calibrate import MAX_DATASETS, MIN_DATASETS, Calibration, calibrate
from .clusters import FEW_CLUSTERS, cluster_sizes, residual_icc
from .comparison_tables import backend_tables, cluster_table, product_term_table, regions_table, slopes_table
from .data import NaValues, load_data
from .defaults import ALPHA, BACKENDS, CLUSTER_BACKENDS, CLUSTER_PRIMARY, PRIMARY, SEED
from .design import Design, build_design
from .diagnostics import VarianceDiagnostics, diagnostics_parts
from .engines import Engine, check_engine_choice, make_engine
from .errors import InputError, option_error
from .jsonvalues import jsonable, num
from .lanes import run_parts
from .spec import ModelSpec
from .steps import StepCallback, report_step
from .tables import Table, display_rows, render_html, render_text

SCHEMA = "robustmod/results-v1"

#: The cautions every output carries (terminal, JSON, appendix).
CAUTIONS = (
    "Pre-specify the primary analysis (the primary back-end, the model and the probe values) before looking at "
    "the data; this appendix reports it next to the alternatives, it does not choose it.",
    "This appendix is a sensitivity check, not a menu: do not pick whichever back-end gives the significant "
    "result. If the conclusion changes with the variance treatment, report that it does.",
    "An interaction needs a hypothesis stated in advance. Product terms are estimated with far less precision "
    "than main effects and overfit easily when several are tried.",
    "Significance-region boundaries and slopes at moderator values outside the observed range are "
    "extrapolation; the figures grey that part out and the tables flag it.",
    "Association is not causation: a robust moderation effect in observational data says nothing about what "
    "would happen if the moderator were changed.",
    "Follow the reporting standards of your field, and consult a qualified statistician where decisions with "
    "consequences rest on the result.",
)

#: The same, in one line for the terminal.
CAUTION_LINE = ("Cautions: the primary back-end must be chosen before looking (this is a sensitivity check, not a "
                "menu); interactions need a hypothesis and overfit easily; regions outside the observed moderator "
                "range are extrapolation; association is not causation; follow your field's reporting standards "
                "and consult a qualified statistician where decisions carry consequences.")


@dataclass(frozen=True, eq=False)
class BackendResult:
    """One back-end's answers, as plain JSON-ready values plus the Fit behind them."""

    id: str
    label: str
    kind: str
    available: bool
    reliable: bool
    reason: str | None
    coefficients: dict[str, dict[str, Any]]
    interaction: dict[str, Any] | None
    conditional_effects: list[dict[str, Any]]
    significance_region: dict[str, Any] | None
    simultaneous_region: dict[str, Any] | None
    regions_by_other: list[dict[str, Any]]
    slope_grid: dict[str, Any] | None
    slope_curve: dict[str, Any] | None
    warnings: tuple[str, ...]
    extras: dict[str, Any]
    seconds: float
    fit: Fit | None = field(default=None, repr=False)

    def to_dict(self) -> dict[str, Any]:
        out = {
            "label": self.label, "kind": self.kind, "available": self.available, "reliable": self.reliable,
            "reason": self.reason, "coefficients": self.coefficients, "interaction": self.interaction,
            "conditional_effects": self.conditional_effects, "significance_region": self.significance_region,
            "simultaneous_region": self.simultaneous_region, "warnings": list(self.warnings),
            "extras": jsonable(self.extras), "seconds": round(self.seconds, 3),
        }
        if self.regions_by_other:
            out["significance_regions_by"] = self.regions_by_other
        if self.slope_grid is not None:
            out["slope_grid"] = self.slope_grid
        if self.slope_curve is not None:
            out["slope_curve"] = self.slope_curve
        return out


def evaluate_fit(fit: Fit | Unavailable, design: Design, alpha: float, seconds: float = 0.0) -> BackendResult:
    """Turn a Fit into the effects the contract asks for."""
    if isinstance(fit, Unavailable):
        return BackendResult(fit.backend_id, fit.label, "unavailable", False, False, fit.reason, {}, None, [], None,
                             None, [], None, None, tuple(fit.warnings) + (fit.reason,), {}, seconds, None)
    coefs = fit.coefficients(alpha)
    coefficients = {name: effects._point(coefs, i) for i, name in enumerate(fit.term_names)}
    return BackendResult(
        id=fit.backend_id, label=fit.label, kind=fit.kind, available=True, reliable=fit.reliable, reason=None,
        coefficients=coefficients,
        interaction=effects.interaction(fit, design, alpha),
        conditional_effects=effects.conditional_effects(fit, design, alpha),
        significance_region=effects.significance_region(fit, design, alpha),
        simultaneous_region=effects.significance_region(fit, design, alpha, band="simultaneous"),
        regions_by_other=effects.regions_by_other(fit, design, alpha),
        slope_grid=effects.slope_grid(fit, design, alpha),
        slope_curve=effects.slope_curve(fit, design, alpha),
        warnings=fit.warnings, extras=dict(fit.extras), seconds=seconds, fit=fit,
    )


@dataclass(frozen=True, eq=False)
class Comparison:
    """All back-ends side by side, the robustness summary and the variance diagnostics."""

    spec: ModelSpec
    design: Design
    results: dict[str, BackendResult]
    primary: str
    diagnostics: VarianceDiagnostics
    calibration: Calibration | None
    warnings: tuple[str, ...]
    data_source: str | None = None

    @cached_property
    def summary(self) -> dict[str, Any]:
        return robustness_summary(self)

    @cached_property
    def clustering(self) -> dict[str, Any] | None:
        """The clustering of the rows (None without a cluster column): the model's cluster entry plus the
        residual ICC, the smallest Satterthwaite df among the reported contrasts and the few-cluster caution."""
        return clustering_summary(self)

    def to_dict(self) -> dict[str, Any]:
        d = self.design
        out: dict[str, Any] = {
            "schema": SCHEMA,
            "model": {
                "formula": self.spec.formula, "focal": self.spec.focal, "moderators": list(self.spec.moderators),
                "interaction_terms": list(d.interaction_terms), "n_obs": d.n_obs, "n_dropped": d.data.n_dropped,
                "n_input": d.data.n_input, "alpha": self.spec.alpha, "seed": self.spec.seed,
                "terms": list(d.term_names), "centered": dict(d.centering),
                "scale": ("coefficients on the mean-centred scale of " + ", ".join(d.centering)
                          if d.centering else "raw (user's) scale"),
                "effects_scale": "raw (user's) scale of the moderators",
                "categorical_moderators": list(d.data.categorical_moderators),
                "moderator_summary": {m: jsonable({"categorical": i.categorical, "levels": list(i.levels),
                                                     "mean": i.mean, "sd": i.sd, "min": i.minimum, "max": i.maximum})
                                      for m, i in d.moderators.items()},
                "probe_points": jsonable(list(d.probe_points)),
                "focal_linear": d.focal_linear,
                "data_source": self.data_source,
            },
            "backends": {bid: r.to_dict() for bid, r in self.results.items()},
            "summary": self.summary,
            "diagnostics": jsonable(self.diagnostics),
            "warnings": list(self.warnings),
            "cautions": list(CAUTIONS),
        }
        if self.clustering is not None:
            out["model"]["cluster"] = {k: self.clustering[k] for k in CLUSTER_MODEL_KEYS}
            out["clustering"] = jsonable(self.clustering)
        if self.calibration is not None:
            out["calibration"] = jsonable(self.calibration)
        out["tables"] = [jsonable(t.to_dict()) for t in self._tables]
        return out

    def tables(self) -> list[Table]:
        """The one ordered set of named tables every display renders (terminal, Jupyter, appendix
        HTML, Markdown, LaTeX, CSV): product term, slopes at chosen moderator values, significance
        regions, variance diagnostics, linearity check, calibration, then each back-end's own."""
        return list(self._tables)

    @cached_property
    def _tables(self) -> tuple[Table, ...]:
        out = [product_term_table(self), slopes_table(self)]
        if any(r.significance_region for r in self.results.values()):
            out.append(regions_table(self))
        if self.clustering is not None:
            out.append(cluster_table(self))
        out += self.diagnostics.tables()
        if self.calibration:
            out += self.calibration.tables()
        for r in self.results.values():
            out += backend_tables(r)
        return tuple(out)

    def table(self) -> pd.DataFrame:
        """One row per back-end (index ``backend``): the product term with ``se`` and interval ends,
        p, support, the significance region in words with numeric ``boundary_1``, ``boundary_2``, …,
        and the slope at each chosen moderator value. Taken from :meth:`tables`."""
        frame = self._tables[0].to_frame().set_index("backend")
        by_key = {t.key: t for t in self._tables}
        if "regions" in by_key:
            reg = by_key["regions"].to_frame().set_index("backend")
            frame = frame.join(reg.drop(columns=[c for c in ("label",) if c in reg]))
        slopes = by_key["slopes"].to_frame()
        for _, row in slopes.iterrows():
            frame.loc[row["backend"], f"slope at {row['at']}"] = row["estimate"]
        return frame

    # ---- one set of tables, every display ---------------------------------------------
    def summary_lines(self) -> list[tuple[str, list[list[str]]]]:
        """Each table as (title, [header, *rows]) of display text, for renderers of their own."""
        out = []
        for t in self._tables:
            cols, rows = display_rows(t)
            out.append((t.title, [[c.label for c in cols], *rows]))
        return out

    def __str__(self) -> str:
        parts = [render_text(t) for t in self._tables]
        warned = "".join(f"warning: {w}\n" for w in self.warnings)
        return "\n\n".join(parts) + "\n\n" + warned + self.summary["sentence"] + "\n" + CAUTION_LINE

    def __repr__(self) -> str:
        return f"<Comparison of {len(self.results)} back-ends on {self.spec.formula!r}; primary {self.primary}>"

    def _repr_html_(self) -> str:
        parts = [render_html(t, heading="h4") for t in self._tables]
        parts += [f"<p><strong>Warning:</strong> {html.escape(w)}</p>" for w in self.warnings]
        parts.append(f"<p>{html.escape(self.summary['sentence'])}</p>")
        parts.append(f"<p><small>{html.escape(CAUTION_LINE)}</small></p>")
        return "\n".join(parts)


def robustness_summary(c: Comparison) -> dict[str, Any]:
    """Which back-ends support the product term, sign agreement, shifts against the primary."""
    alpha = c.spec.alpha
    res = c.results
    rowwise = row_independent(c)
    usable = {b: r for b, r in res.items() if r.available and r.reliable and r.interaction is not None
              and b not in rowwise}
    inter = {b: r.interaction for b, r in usable.items() if r.interaction is not None}  # every usable result has one
    unreliable = [b for b, r in res.items() if b not in usable and b not in rowwise]
    supported = [b for b in usable if inter[b]["supported"]]
    not_supported = [b for b in usable if b not in supported]
    ests = {b: inter[b]["estimate"] for b in usable if inter[b].get("estimate") is not None}
    signs = {np.sign(v) for v in ests.values() if v}
    sign_consistent = len(signs) <= 1
    prim = usable.get(c.primary)
    rel_change: dict[str, float | None] = {}
    width_change: dict[str, float | None] = {}
    boundary_shift: dict[str, Any] = {}
    if prim is not None and inter[c.primary].get("estimate") is not None:
        pe = inter[c.primary]["estimate"]
        pci = inter[c.primary]["ci"]
        pw = pci[1] - pci[0]
        for b in usable:
            e = inter[b].get("estimate")
            if e is None or b == c.primary:
                continue
            rel_change[b] = num(abs(e - pe) / abs(pe)) if pe else None
            ci = inter[b]["ci"]
            width_change[b] = num((ci[1] - ci[0]) / pw - 1) if pw else None
        preg = prim.significance_region
        for b, r in usable.items():
            if b == c.primary or preg is None or r.significance_region is None:
                continue
            obs = preg["observed_range"]
            span = (obs[1] - obs[0]) or 1.0
            # Compare the boundaries a reader acts on: those inside the observed moderator range
            # (beyond it a region is extrapolation, and fit kinds search different distances).
            pb = [v for v in preg["boundaries"] if obs[0] <= v <= obs[1]]
            ob = [v for v in r.significance_region["boundaries"] if obs[0] <= v <= obs[1]]
            if len(pb) == len(ob):
                shift = max((abs(x - y) for x, y in zip(pb, ob, strict=False)), default=0.0)
                boundary_shift[b] = {"max_shift": num(shift), "share_of_observed_range": num(shift / span),
                                     "same_shape": True}
            else:
                boundary_shift[b] = {"max_shift": None, "share_of_observed_range": None, "same_shape": False}
    primary_supported = bool(prim is not None and inter[c.primary]["supported"])
    robust_usable = [b for b in usable if b not in CONSTANT_VARIANCE]
    leverage_one = leverage_one_note(c.design) is not None
    survives = bool(primary_supported and sign_consistent and robust_usable and not leverage_one
                    and all(inter[b]["supported"] for b in robust_usable))
    sentence = _sentence(c, usable, supported, not_supported, unreliable, sign_consistent, survives, primary_supported)
    if rowwise:
        said = [f"{b} ({'supports' if (res[b].interaction or {}).get('supported') else 'does not support'} it)"
                for b in rowwise]
        sentence = sentence.replace(" Agreement speaks", f" Not counted because they assume independent rows, which "
                                    f"the clusters of {c.design.cluster_name!r} are not: {', '.join(said)}."
                                    " Agreement speaks")
    if leverage_one:
        sentence += (" Some rows have leverage 1, so back-ends built from each row's residual are degenerate and not "
                     "counted; no verdict on survival is drawn until those rows are dealt with (see the warnings).")
    return {
        "primary": c.primary, "supported_by": supported, "not_supported_by": not_supported, "unreliable": unreliable,
        "assumes_independent_rows": rowwise,
        "sign_consistent": sign_consistent, "survives": survives, "primary_supported": primary_supported,
        "relative_change_of_estimate": rel_change, "relative_change_of_interval_width": width_change,
        "boundary_shift": boundary_shift, "alpha": alpha, "sentence": sentence,
    }


#: Keys of the results contract's ``model.cluster`` entry.
CLUSTER_MODEL_KEYS = ("column", "n_clusters", "size_min", "size_median", "size_max")


def row_independent(c: Comparison) -> list[str]:
    """Back-ends run on clustered rows that treat the rows as independent: registered as assuming
    independent rows and their fit did not use the clusters (no ``n_clusters`` in its extras)."""
    if c.design.clusters is None:
        return []
    ids = independent_rows_ids()
    return [b for b, r in c.results.items() if b in ids and "n_clusters" not in r.extras]


def _smallest_df(c: Comparison) -> dict[str, Any] | None:
    """The smallest per-contrast (Satterthwaite) df among the product term and the reported slopes."""
    best: dict[str, Any] | None = None
    for b, r in c.results.items():
        if not str(r.extras.get("df_rule", "")).startswith("Satterthwaite"):
            continue
        for point in [r.interaction or {}, *r.conditional_effects]:
            df = point.get("df")
            if df is not None and (best is None or df < best["df"]):
                best = {"backend": b, "df": df}
    return best


def clustering_summary(c: Comparison) -> dict[str, Any] | None:
    """Column, number and sizes of clusters, the ICC of the OLS residuals, the smallest df, the caution."""
    d = c.design
    if d.clusters is None:
        return None
    smallest, median, largest = cluster_sizes(d.clusters)
    G = int(d.clusters.max()) + 1
    Q, _ = d.qr
    resid = d.y - Q @ (Q.T @ d.y)
    caution = (f"Only {G} clusters: cluster-robust inference is unreliable with fewer than about {FEW_CLUSTERS} "
               "clusters; prefer cr2 with its Satterthwaite df and the wild cluster bootstrap, and treat small "
               "df (below about 4) as a warning sign (Pustejovsky & Tipton 2018)." if G < FEW_CLUSTERS else None)
    return {"column": d.cluster_name, "n_clusters": G, "size_min": smallest, "size_median": median,
            "size_max": largest, "residual_icc": num(residual_icc(resid, d.clusters)),
            "smallest_df": _smallest_df(c), "few_clusters_caution": caution}


def _sentence(c: Comparison, usable: dict[str, BackendResult], supported: list[str], not_supported: list[str],
              unreliable: list[str], sign_consistent: bool, survives: bool, primary_supported: bool) -> str:
    terms = " + ".join(c.design.interaction_terms)
    n = len(usable)
    parts = [f"The product term {terms} is supported at alpha = {c.spec.alpha:g} by {len(supported)} of {n} usable back-end(s)"]
    if supported:
        parts[-1] += f" ({', '.join(supported)})"
    if not_supported:
        parts.append(f"not by {', '.join(not_supported)}")
    s = "; ".join(parts) + "."
    if supported and set(supported) <= CONSTANT_VARIANCE:
        s += (f" Only {', '.join(supported)}, which assumes constant variance, supports it — the test that "
              "non-constant variance distorts.")
    if unreliable:
        s += f" Not counted (unavailable or failed their own diagnostics): {', '.join(unreliable)}."
    if not sign_consistent:
        s += " The back-ends disagree on the sign of the estimate."
    prim = usable.get(c.primary)
    if prim is None and c.primary in row_independent(c):
        s += (f" The primary back-end ({c.primary}) assumes independent rows, which clustered rows are not, so no "
              "verdict is drawn; a cluster-aware primary (e.g. cr2) would be needed.")
    elif prim is None:
        s += f" The primary back-end ({c.primary}) gave no usable answer, so no verdict is drawn."
    elif survives:
        s += (f" The primary back-end ({c.primary}) and every back-end that allows non-constant variance agree: "
              "the finding does not hinge on how the variance is treated.")
    elif primary_supported:
        s += (f" The primary back-end ({c.primary}) supports it, but not every variance treatment does: "
              "report the finding as sensitive to the variance assumption.")
    else:
        s += f" The primary back-end ({c.primary}) does not support it."
    s += " Agreement speaks to robustness to the variance treatment only, not to causation."
    return s


def compare(
    data: pd.DataFrame | str | Path,
    formula: str,
    focal: str,
    moderator: str | Sequence[str],
    *,
    backends: Sequence[str] | None = None,
    primary: str | None = None,
    probe: Any = None,
    alpha: float = ALPHA,
    seed: int = SEED,
    center: bool = False,
    cluster: str | None = None,
    options: Mapping[str, Mapping[str, Any]] | None = None,
    calibration: int | None = None,
    calibrate_costly: bool = False,
    workers: int | None = None,
    engine: str | Engine = "local",
    scheduler: str | None = None,
    announce: Callable[[str], None] | None = None,
    progress: bool = False,
    on_step: StepCallback | None = None,
    na_values: NaValues = None,
    sep: str | None = None,
    decimal: str | None = None,
    sheet: str | int | None = None,
    stream: bool | None = None,
    memory: int | str | None = None,
) -> Comparison:
    """Fit the moderation model with several back-ends and compare them.

    Parameters
    ----------
    data : DataFrame or path
        The data (CSV, TSV, Parquet, xlsx, Stata .dta or SPSS .sav when a path); never modified.
    formula : str
        Wilkinson formula such as ``"y ~ x * w + age"`` (allow-listed transforms only).
    focal, moderator : str
        The focal predictor and one or two moderators.
    backends : list of str, optional
        Back-end ids (see ``robustmod.backends.available_ids()``); default
        ``robustmod.defaults.BACKENDS``, or ``robustmod.defaults.CLUSTER_BACKENDS`` with a cluster
        column. The primary is always included.
    primary : str, optional
        The back-end chosen *before* looking at the results; default ``robustmod.defaults.PRIMARY``,
        or ``robustmod.defaults.CLUSTER_PRIMARY`` with a cluster column.
    probe : "sd", "percentiles", list or dict, optional
        Probe values of the moderator(s); see :class:`ModelSpec`.
    alpha : float, default=robustmod.defaults.ALPHA
    seed : int, default=robustmod.defaults.SEED
        Seeds every random step (bootstrap, sampler, calibration).
    center : bool, default=False
        Mean-centre focal and moderators (coefficients then refer to the centred scale).
    cluster : str, optional
        Column of cluster ids; the cluster-robust back-ends (cr0 … cr3), the wild (cluster) bootstrap and
        WLS (CR2) use it. Back-ends that assume independent rows (ols, hc0 … hc5) still run when asked
        but never count as support in the summary.
    options : dict of dicts, optional
        Per back-end options, e.g. ``{"wild": {"replications": 999}}``.
    calibration : int, optional
        Number of simulated datasets for the false-positive / power study.
    calibrate_costly : bool, default=False
        Also calibrate back-ends that need a full fit per dataset (the sampler), on a few datasets.
    workers : int, optional
        Workers for the calibration (default: the available cores); the numbers do not depend on it.
    engine : "local", "dask" or robustmod.engines.Engine, default="local"
        Where the calibration's tasks (and the passes over a file read in chunks) run: this machine's
        processes, or a dask.distributed cluster (``scheduler``, or else a LocalCluster on 127.0.0.1 of
        ``workers`` workers, started only for a calibration or a file read in chunks, and closed after
        it). An Engine object is used as it is and left open. For a file read in chunks (``stream``)
        the dask engine runs every pass as one task per partition of the file (row groups of Parquet,
        byte blocks of CSV), merged by a tree reduction; every worker must be able to read the file
        at the same path.
    scheduler : str, optional
        Address of a running Dask scheduler, e.g. ``"tcp://scheduler-host:8786"`` (dask engine only).
    announce : callable, optional
        Receives one line when a cluster is started (its dashboard address).
    progress : bool, default=False
        Show progress bars for long steps.
    on_step : callable, optional
        ``on_step(step, seconds)`` as each slow step finishes (design, each back-end,
        diagnostics, calibration); see :mod:`robustmod.steps`.
    na_values : str or list of str, optional
        Codes that mean "missing" besides empty cells, e.g. ``"."`` or ``[".", "-99"]`` (file or DataFrame).
    sep, decimal : str, optional
        Separator and decimal mark of a CSV/TSV file (detected when not given).
    sheet : str or int, optional
        Sheet of an Excel workbook by name or 0-based position (default: the first).
    stream : bool, optional
        Read a Parquet file, a folder of Parquet files or a CSV file in chunks (True), into memory
        (False), or decide (None, the default): stream when the frame of the model's columns
        (rows × columns × 8 bytes) times ``robustmod.defaults.STREAM_MEMORY_FACTOR`` exceeds the
        memory budget. See :mod:`robustmod.stream` and docs/scale.md.
    memory : int or str, optional
        The memory budget: bytes, or "2GB", "512MB" (powers of 1024). Default: a quarter
        (``robustmod.defaults.MEMORY_SHARE``) of the memory available when the run starts.

    Returns
    -------
    Comparison
        ``to_dict()`` follows the results contract (schema ``robustmod/results-v1``).

    Notes
    -----
    Every back-end answers for rows L of the coefficients (docs/methods.md): the product term is a unit
    row, a conditional slope is L = X(x + 1, w) − X(x, w), the Johnson–Neyman region is where the
    (1 − alpha) interval of L(w)β excludes zero (Johnson & Neyman 1936; Bauer & Curran 2005). A
    back-end that is unavailable or fails its own diagnostics is listed as unreliable and not counted.

    Examples
    --------
    >>> from robustmod.demo import demo_data
    >>> res = compare(demo_data(), "grain_yield ~ fertiliser * soil_moisture", "fertiliser", "soil_moisture",
    ...               backends=["ols", "hc3", "wild"], options={"wild": {"replications": 999}})
    >>> res.summary["primary"], sorted(res.results)
    ('hc3', ['hc3', 'ols', 'wild'])
    >>> res.results["hc3"].interaction["supported"]
    True
    """
    started = time.perf_counter()
    mods = (moderator,) if isinstance(moderator, str) else tuple(moderator)
    spec = ModelSpec(formula=formula, focal=focal, moderators=mods, probe=probe if probe is not None else {},
                     alpha=alpha, seed=seed, center=center, cluster=cluster)
    from .stream import choose_stream, memory_budget, stream_compare  # noqa: PLC0415  (pyarrow only for files)

    budget = memory_budget(memory)
    streamed = choose_stream(data, stream, budget, spec, {"na_values": na_values, "sep": sep, "decimal": decimal,
                                                          "sheet": sheet})
    if not streamed:
        frame, source = load_data(data, na_values=na_values, sep=sep, decimal=decimal, sheet=sheet)
    clustered = cluster is not None
    ids = check_ids(list(backends) if backends is not None else list(CLUSTER_BACKENDS if clustered else BACKENDS))
    (primary,) = check_ids([primary or (CLUSTER_PRIMARY if clustered else PRIMARY)])
    if primary not in ids:
        ids.insert(0, primary)
    options = dict(options or {})
    for key in options:
        if key not in ids:
            raise option_error("options", f"keyed by back-ends being run ({', '.join(ids)})", key)
    if calibration is not None and (isinstance(calibration, bool) or not isinstance(calibration, int)
                                    or not MIN_DATASETS <= calibration <= MAX_DATASETS):
        raise option_error("calibration", f"a whole number of simulated datasets from {MIN_DATASETS} to "
                           f"{MAX_DATASETS:,}", calibration)
    if not isinstance(engine, Engine):
        check_engine_choice(engine, scheduler)
    if streamed:
        assert isinstance(data, (str, Path))  # choose_stream streams only a file path
        with ExitStack() as stack:  # the dask engine runs the passes over the file's partitions
            eng = _open_engine(engine, scheduler, workers, announce, stack)
            return stream_compare(data, spec, ids, primary, options, budget=budget, calibration=calibration,
                                  progress=progress, on_step=on_step, started=started, engine=eng)
    with ExitStack() as stack:  # a cluster is reached (or started) before the fitting, and closed at the end
        eng = _open_engine(engine, scheduler, workers, announce, stack) if calibration is not None else None
        if eng is not None and not isinstance(engine, Engine):
            report_step(on_step, f"{eng.name} engine", started)
            started = time.perf_counter()
        return _run(frame, source, spec, ids, primary, options, calibration=calibration, engine=eng,
                    workers=workers, calibrate_costly=calibrate_costly, progress=progress, on_step=on_step,
                    started=started)


def _run(frame: pd.DataFrame, source: str | None, spec: ModelSpec, ids: list[str], primary: str,
         options: dict[str, Any], *, calibration: int | None, engine: Engine | None, workers: int | None,
         calibrate_costly: bool, progress: bool, on_step: StepCallback | None, started: float) -> Comparison:
    """Design, every back-end, the diagnostics and the calibration: the work of :func:`compare`."""
    with one_blas_thread():
        design = build_design(frame, spec)
    report_step(on_step, "design", started)
    backends = {bid: make_backend(bid, **dict(options.get(bid, {}))) for bid in ids}
    fitted: dict[str, BackendResult] = {}
    took: dict[str, float] = {}

    def fit(bid: str) -> None:
        t0 = time.perf_counter()
        fitted[bid] = evaluate_fit(backends[bid].fit(design, seed=spec.seed, progress=progress), design,
                                   spec.alpha, time.perf_counter() - t0)
        took[bid] = time.perf_counter() - t0

    started = time.perf_counter()
    # The cheap back-ends (small products) and the parts of the diagnostics read the design only:
    # on large data they share two threads, on one BLAS thread each. The wild bootstrap and the
    # sampler choose their own threads, so they fit afterwards.
    parts, assemble = diagnostics_parts(design, spec.alpha)
    cheap = [(f"back-end {bid}", partial(fit, bid)) for bid in ids if backends[bid].cost == "cheap"]
    with one_blas_thread():
        got = run_parts([*cheap, *parts], design.X.shape[0])
        diagnostics = assemble(got)
    if on_step is not None:  # in the order the back-ends were asked for, each with its own time
        for bid in ids:
            if bid in took:
                on_step(f"back-end {bid}", took[bid])
    report_step(on_step, "diagnostics", started)
    for bid in ids:
        if bid not in fitted:
            fit(bid)
            if on_step is not None:
                on_step(f"back-end {bid}", took[bid])
    results = {bid: fitted[bid] for bid in ids}
    leverage_note = leverage_one_note(design)
    if leverage_note is not None:
        results = mark_degenerate(results, leverage_note)
    if not results[primary].available:
        if leverage_note is not None:
            raise InputError(f"The primary back-end {primary!r} cannot answer on these data: {leverage_note}")
        raise InputError(
            f"The primary back-end {primary!r} cannot answer on these data ({results[primary].reason}) "
            "Choose another primary back-end (e.g. hc0) or fix the data."
        )
    calib = None
    if calibration is not None:
        started = time.perf_counter()
        calib = calibrate(design, ids, n_datasets=calibration, seed=spec.seed, include_costly=calibrate_costly,
                          workers=workers, engine=engine, options=options, progress=progress)
        report_step(on_step, f"calibration ({calibration} datasets)", started)
    warnings = tuple(design.warnings) + ((leverage_note,) if leverage_note else ())
    return Comparison(spec, design, results, primary, diagnostics, calib, warnings, source)


def _open_engine(engine: str | Engine, scheduler: str | None, workers: int | None,
                 announce: Callable[[str], None] | None, stack: ExitStack) -> Engine | None:
    """The calibration's engine: None for "local" (this machine's processes, used only when that pays);
    a Dask engine opened here, closed by ``stack``; an Engine object as given (the caller closes it)."""
    if isinstance(engine, Engine):
        return engine
    if check_engine_choice(engine, scheduler) == "local":
        return None
    return stack.enter_context(make_engine(engine, scheduler=scheduler, workers=workers, announce=announce))


def mark_degenerate(results: dict[str, BackendResult], note: str) -> dict[str, BackendResult]:
    """Back-ends whose standard errors need each row's residual are unreliable when a row has
    leverage one (its residual is zero whatever the variance there): kept, shown, never counted."""
    degenerate = residual_per_row_ids()
    return {bid: dataclasses.replace(r, reliable=False, warnings=(*r.warnings, note))
            if bid in degenerate else r for bid, r in results.items()}
