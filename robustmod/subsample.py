"""Fitting a costly back-end on a seeded random subsample of the rows, and saying so everywhere.

The rule (the same rows in memory and when the file is read in chunks): among the n rows the model
uses (complete rows, in data order, counted from 0), the subsample is

    sorted(numpy.random.default_rng([seed, 0x5ab5]).choice(n, size=m, replace=False))

with the analysis seed. In memory those rows of the design are taken; from a file they are read
in one pass. The fit is then the back-end's ordinary in-memory fit on those rows (same model
matrix columns, centring and levels as the whole data), and its extras (``subsample``), warnings
and report tables state the subsample.
"""
from __future__ import annotations

import dataclasses
from typing import TYPE_CHECKING, Any

import numpy as np

from .backends.base import Backend, Fit, Unavailable, one_row_table
from .defaults import BAYES_MAX_ROWS
from .design import Design
from .errors import InputError
from .thin_qr import factor

if TYPE_CHECKING:  # pragma: no cover
    from .stream import StreamData
    from .tables import Table

#: Second word of the subsample's seed, so the draw is its own random stream.
STREAM_WORD = 0x5AB5
#: The rule in words, as every display states it.
RULE = (f"numpy default_rng([seed, {STREAM_WORD:#x}]).choice(n, m, replace=False), sorted, among the complete rows "
        "in data order")
#: A suggested subsample size in messages.
SUGGESTED = 50_000


def subsample_positions(n: int, m: int, seed: int) -> np.ndarray:
    """The m positions (0-based, ascending) among n rows the seeded rule picks."""
    return np.sort(np.random.default_rng([int(seed), STREAM_WORD]).choice(int(n), size=int(m), replace=False))


def refusal(backend: Backend, n: int) -> Unavailable:
    """The one-line reason a back-end with a row limit gives for data beyond it, naming the option."""
    return Unavailable(backend.id, backend.label,
                       f"{backend.label} fits at most {BAYES_MAX_ROWS:,} rows and these data have {n:,}; fit it on a "
                       f"seeded random subsample with --set {backend.id}.subsample={SUGGESTED} "
                       f"(options={{'{backend.id}': {{'subsample': {SUGGESTED}}}}} in Python).")


def _clone(backend: Backend) -> Any:
    return type(backend)(**{**backend.get_options(), "subsample": None})


def subsample_design(design: Design, positions: np.ndarray) -> Design:
    """The design restricted to the rows at ``positions`` (its columns, centring and levels kept)."""
    X, y = design.X[positions], design.y[positions]
    clusters = None
    if design.clusters is not None:
        clusters = np.unique(design.clusters[positions], return_inverse=True)[1].astype(design.clusters.dtype)
    data = dataclasses.replace(design.data, frame=design.data.frame.iloc[positions])
    return dataclasses.replace(design, X=X, y=y, qr=factor(X), data=data, clusters=clusters)


def _rank_ok(design: Design) -> str | None:
    R = design.qr[1]
    norms = np.linalg.norm(design.X, axis=0)
    rel = np.abs(np.diag(R)) / np.where(norms > 0, norms, 1.0)
    bad = [design.term_names[j] for j in np.flatnonzero((rel < 1e-11) | (norms == 0))]
    return None if not bad else (f"the subsample leaves {', '.join(repr(b) for b in bad)} aliased (e.g. a rare level "
                                 "is missing); choose a larger subsample")


def state(fit: Fit | Unavailable, backend: Backend, m: int, n: int, seed: int) -> Fit | Unavailable:
    """The subsample in the fit's extras, warnings (and so every display); an Unavailable says it too."""
    what = (f"Fitted on a seeded random subsample of {m:,} of the {n:,} rows used (seed {seed}, option "
            f"{backend.id}.subsample); its intervals reflect {m:,} rows, not {n:,}.")
    if isinstance(fit, Unavailable):
        return dataclasses.replace(fit, warnings=(*fit.warnings, what))
    fit.extras["subsample"] = {"rows": int(m), "of_rows": int(n), "seed": int(seed), "rule": RULE}
    fit.warnings = (*fit.warnings, what)
    fit.label = f"{fit.label}, subsample of {m:,} rows"
    return fit


def fit_on_subsample(backend: Backend, design: Design, *, seed: int, progress: bool = False) -> Fit | Unavailable:
    """The back-end's fit on the rows its ``subsample`` option asks for (or its refusal beyond the limit)."""
    n = design.n_obs
    m = getattr(backend, "subsample", None)
    if m is None:
        return refusal(backend, n)
    clone = _clone(backend)
    if m >= n:
        fit = clone.fit(design, seed=seed, progress=progress)
        if not isinstance(fit, Unavailable):
            fit.warnings = (*fit.warnings, f"The subsample of {m:,} rows asked for is not smaller than the {n:,} "
                                           "rows used; every row was fitted.")
        return fit
    sub = subsample_design(design, subsample_positions(n, m, seed))
    if (why := _rank_ok(sub)) is not None:
        return state(Unavailable(backend.id, backend.label, f"No fit on the subsample: {why}."), backend, m, n, seed)
    return state(clone.fit(sub, seed=seed, progress=progress), backend, m, n, seed)


def fit_stream_rows(backend: Backend, data: StreamData, *, seed: int, progress: bool = False) -> Fit | Unavailable:
    """A back-end with a row limit on data read in chunks: the subsample's rows (or every row, when they
    are within the limit) read in one pass, then its in-memory fit."""
    n = data.design.n_obs
    m = getattr(backend, "subsample", None)
    if m is None and n > BAYES_MAX_ROWS:
        return refusal(backend, n)
    take = m is not None and m < n
    positions = subsample_positions(n, m, seed) if m is not None and take else None
    with data.stage(f"rows for {backend.id}" + (f" (subsample of {m:,})" if take else "")):
        try:
            sub = data.rows_design(positions)
        except InputError as exc:
            return Unavailable(backend.id, backend.label, str(exc))
    if (why := _rank_ok(sub)) is not None:
        return Unavailable(backend.id, backend.label, f"No fit on these rows: {why}.")
    fit = _clone(backend).fit(sub, seed=seed, progress=progress)
    return state(fit, backend, m, n, seed) if m is not None and take else fit


def subsample_tables(extras: dict[str, Any], src: str) -> list[Table]:
    """The subsample a fit used, as a one-row table of the back-end's own (none without a subsample)."""
    sub = extras.get("subsample")
    if not isinstance(sub, dict):
        return []
    cells = [("rows", "Rows fitted", "integer", sub.get("rows")), ("of_rows", "Of rows used", "integer", sub.get("of_rows")),
             ("seed", "Seed", "integer", sub.get("seed")), ("rule", "Rule", "text", sub.get("rule"))]
    return [one_row_table(f"{src}.subsample", "Seeded random subsample of the rows", src, cells,
                          ["The back-end was fitted on these rows only; its intervals reflect their number."])]
