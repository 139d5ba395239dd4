"""Spread of the OLS residuals within moderator bins, gathered during the OLS residual pass.

The streamed counterpart of :func:`robustmod.diagnostics.residual_spread` for a continuous
moderator: quantile cut points from :func:`robustmod.kernels.order.quantiles` (before the pass),
right-closed bins as ``pandas.cut``, and per bin the row count, the range of the moderator and
the SD (ddof 1) of the residuals from merged running moments.
"""
from __future__ import annotations

from typing import Any

import numpy as np

from ..jsonvalues import num
from .accumulate import RunningMoments
from .chunks import Chunk, ChunkColumn, ChunkSource
from .order import bin_numbers, quantiles


class ResidualSpread:
    """A residual consumer: SD of the residuals in each bin of ``moderator`` cut at ``cuts``."""

    def __init__(self, moderator: str, cuts: np.ndarray, sorted_values: np.ndarray | None = None) -> None:
        self.moderator, self.cuts = moderator, np.asarray(cuts, dtype=float)
        nb = self.cuts.size + 1
        self.moments = [RunningMoments(1) for _ in range(nb)]
        self.low, self.high = np.full(nb, np.inf), np.full(nb, -np.inf)
        self.known_ranges = sorted_values is not None and sorted_values.size > 0
        if sorted_values is not None and sorted_values.size:  # bin j holds cuts[j − 1] < w ≤ cuts[j]: a run of them
            ends = np.concatenate([np.searchsorted(sorted_values, self.cuts, side="right"), [sorted_values.size]])
            starts = np.concatenate([[0], ends[:-1]])
            full = ends > starts
            self.low[full], self.high[full] = sorted_values[starts[full]], sorted_values[ends[full] - 1]

    @classmethod
    def quantile_bins(cls, chunks: ChunkSource, moderator: str, bins: int = 3, *,
                      sorted_values: np.ndarray | None = None) -> ResidualSpread:
        """Bins at the 1/bins … (bins − 1)/bins quantiles of the streamed moderator (read off
        ``sorted_values``, the whole column in ascending order, when at hand; the bins' ranges then too)."""
        cuts = quantiles(ChunkColumn(chunks, moderator), list(np.arange(1, bins) / bins), sorted_values=sorted_values)
        return cls(moderator, cuts, sorted_values)

    def add(self, chunk: Chunk, resid: np.ndarray) -> None:
        w = np.asarray(chunk.columns[self.moderator], dtype=float)
        nb = self.cuts.size + 1
        idx = bin_numbers(self.cuts, w)
        # Each bin's count, mean and centred sum of squares in this chunk, from weighted counts
        # (a few passes over the rows, whatever the number of bins), merged into the running moments.
        counts = np.bincount(idx, minlength=nb)
        means: np.ndarray = np.bincount(idx, weights=resid, minlength=nb) / np.maximum(counts, 1)
        dev = resid - means[idx]
        m2 = np.bincount(idx, weights=dev * dev, minlength=nb).astype(float)
        for j in np.flatnonzero(counts):  # bins, not rows
            part = RunningMoments(1)
            part.n, part.mean, part.m2 = int(counts[j]), means[j:j + 1].copy(), m2[j:j + 1].copy()
            self.moments[j].merge(part)
        if not self.known_ranges:
            np.minimum.at(self.low, idx, w)
            np.maximum.at(self.high, idx, w)

    def merge(self, other: ResidualSpread) -> ResidualSpread:
        """Self updated with the bins ``other`` gathered from later rows (same cuts); returns self."""
        for mine, theirs in zip(self.moments, other.moments, strict=True):
            mine.merge(theirs)
        np.minimum(self.low, other.low, out=self.low)
        np.maximum(self.high, other.high, out=self.high)
        return self

    def result(self) -> dict[str, Any]:
        """{moderator, bins: [{level, range, n, sd}], ratio} as the in-memory table gives them."""
        rows: list[dict[str, Any]] = []
        for j, m in enumerate(self.moments):
            if m.n:
                sd = num(np.sqrt(m.m2[0] / (m.n - 1))) if m.n > 1 else None
                rows.append({"level": None, "range": [float(self.low[j]), float(self.high[j])], "n": int(m.n), "sd": sd})
        sds: list[float] = [r["sd"] for r in rows if r["sd"] is not None]
        ratio = num(max(sds) / min(sds)) if len(sds) >= 2 and min(sds) > 0 else None
        return {"moderator": self.moderator, "bins": rows, "ratio": ratio}
