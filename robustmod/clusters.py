"""Cluster ids of the rows a model uses: integer codes, listwise deletion, and the level of each moderator.

Rows sharing a cluster id (pupils of one class, employees of one team, repeated measures of one
person) are not independent. The design carries integer codes 0 … G − 1 per used row; rows with
no cluster id are dropped like any other incomplete row.
"""
from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd

from .data import DROP_WARNING_SHARE, PreparedData
from .errors import InputError, close_matches
from .spec import ModelSpec

#: Below this many clusters cluster-robust standard errors are too small unless bias-reduced
#: (CR2 with Satterthwaite df) or bootstrapped (Cameron & Miller 2015; Pustejovsky & Tipton 2018).
FEW_CLUSTERS = 30


@dataclasses.dataclass(frozen=True)
class ClusterCodes:
    """Integer cluster codes per used row, the number of clusters and notes for the design."""

    codes: np.ndarray
    n_clusters: int
    name: str
    notes: tuple[str, ...]


def attach_clusters(prepared: PreparedData, spec: ModelSpec) -> tuple[PreparedData, ClusterCodes | None]:
    """Drop rows without a cluster id (counted with the other dropped rows) and code the ids 0 … G − 1."""
    name = spec.cluster
    if name is None:
        return prepared, None
    source = prepared.source
    columns = [] if source is None else [str(c) for c in source.columns]
    if source is None or name not in columns:
        raise InputError(f"The cluster column {name!r} is not in the data.{close_matches(name, columns)}")
    ids = source[name].iloc[prepared.frame.index.to_numpy()]
    missing = ids.isna().to_numpy()
    notes: list[str] = []
    if missing.any():
        extra = tuple(int(i) + 1 for i in prepared.frame.index.to_numpy()[missing])
        dropped = tuple(sorted(prepared.dropped_rows + extra))
        frame = prepared.frame.loc[~missing]
        if frame.shape[0] == 0:
            raise InputError(f"Every row misses its cluster id in {name!r}; fill the column or drop the cluster option.")
        share = len(dropped) / prepared.n_input
        notes.append(f"{len(extra)} row(s) without a cluster id in {name!r} were dropped"
                     + (f" ({100 * share:.0f}% of all rows dropped)" if share > DROP_WARNING_SHARE else "") + ".")
        prepared = dataclasses.replace(prepared, frame=frame, dropped_rows=dropped)
        ids = ids.loc[~missing]
    codes, uniques = pd.factorize(ids, sort=True)
    G = len(uniques)
    if G < 2:
        raise InputError(f"The cluster column {name!r} holds a single cluster ({uniques[0]!r}) in the rows used; "
                         "cluster-robust inference needs at least two (ideally 30 or more) clusters.")
    sizes = np.bincount(codes, minlength=G)
    notes.append(f"Rows are clustered by {name!r}: {G} clusters of {sizes.min()}–{sizes.max()} rows.")
    if G < FEW_CLUSTERS:
        notes.append(f"Only {G} clusters in {name!r}: CR0/CR1 standard errors are too small with fewer than about "
                     f"{FEW_CLUSTERS} clusters; cr2 (Satterthwaite df) and the wild cluster bootstrap (wild) hold up better.")
    return prepared, ClusterCodes(codes.astype(np.intp), G, name, tuple(notes))


def moderator_levels(frame: pd.DataFrame, codes: np.ndarray, names: tuple[str, ...], cluster: str) -> tuple[str, ...]:
    """A note per moderator: at the cluster level (constant within every cluster) or varying within clusters."""
    notes = []
    for name in names:
        within = pd.Series(frame[name].to_numpy()).groupby(codes).nunique(dropna=False)
        if bool((within <= 1).all()):
            notes.append(f"The moderator {name!r} is at the cluster level (constant within every cluster of "
                         f"{cluster!r}); its product term is informed by between-cluster differences.")
        else:
            notes.append(f"The moderator {name!r} varies within clusters of {cluster!r} (a row-level moderator).")
    return tuple(notes)


def cluster_sizes(codes: np.ndarray) -> tuple[int, float, int]:
    """(smallest, median, largest) number of rows per cluster."""
    sizes = np.bincount(codes)
    return int(sizes.min()), float(np.median(sizes)), int(sizes.max())


def residual_icc(resid: np.ndarray, codes: np.ndarray) -> float:
    """One-way ANOVA intra-class correlation of residuals, ICC(1) (Shrout & Fleiss 1979; Donner 1986).

    ICC = (MSB − MSW) / (MSB + (n₀ − 1)·MSW), MSB and MSW the between- and within-cluster mean
    squares, n₀ = (n − Σ n_g²/n)/(G − 1) the effective cluster size; may be negative.
    """
    resid = np.asarray(resid, dtype=float)
    sizes = np.bincount(codes).astype(float)
    G, n = sizes.size, resid.size
    means = np.bincount(codes, weights=resid) / sizes
    msb = float(sizes @ (means - resid.mean()) ** 2) / (G - 1)
    msw = float(((resid - means[codes]) ** 2).sum()) / (n - G) if n > G else float("nan")
    n0 = (n - float(sizes @ sizes) / n) / (G - 1)
    den = msb + (n0 - 1) * msw
    return (msb - msw) / den if den > 0 else float("nan")
