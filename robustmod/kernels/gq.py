"""Goldfeld–Quandt (1965) over chunks, split along a moderator with ties kept together.

Streaming rule. With n rows, drop = round(share·n) and n₁ = ⌊(n − drop)/2⌋, let c_lo be the
n₁-th smallest moderator value and c_hi the n₁-th largest (exact order statistics, see
:mod:`robustmod.kernels.order`). The low group is every row with w ≤ c_lo, the high group every
row with w ≥ c_hi; rows tied at a cut value all go to the same group, so the split does not
depend on the order of the rows in the file. When no value is tied at a cut, each group has
exactly n₁ rows and the test equals the in-memory one (rows sorted by w, first and last n₁).
With ties the groups can be larger than n₁; when c_lo ≥ c_hi the groups would share rows and
no test is reported. Each group's OLS residual variance s² = RSS/(n_g − k) comes from a TSQR
factor of [X y] (RSS = R²_{k+1,k+1}); F = s²(high)/s²(low) with (n_high − k, n_low − k) df,
two-sided p = 2·min(P(F' ≥ F), P(F' ≤ F)).
"""
from __future__ import annotations

from typing import Any

import numpy as np
from scipy import stats

from ..jsonvalues import num
from .accumulate import TSQR
from .chunks import ChunkSource
from .order import column_summary, order_statistics

#: Share of middle rows dropped (the in-memory test's value, robustmod.diagnostics.GQ_DROP).
DROP_SHARE = 0.2


def goldfeld_quandt(chunks: ChunkSource, moderator: str, *, drop_share: float = DROP_SHARE) -> dict[str, Any] | None:
    """F test of the residual variances of the high and low moderator groups; None when too few rows.

    ``moderator`` names the chunk column holding the moderator's raw values.
    """
    def values() -> Any:
        return (np.asarray(c.columns[moderator], dtype=float) for c in chunks())

    summary = column_summary(values)
    n = summary[0]
    first = next(iter(chunks()))
    k = first.X.shape[1]
    drop = round(drop_share * n)
    n1 = (n - drop) // 2
    if n1 <= k + 1:
        return None
    c_lo, c_hi = order_statistics(values, [n1 - 1, n - n1], summary=summary)
    if c_lo >= c_hi:
        return None
    groups = {"low": TSQR(k + 1), "high": TSQR(k + 1)}
    sizes = {"low": 0, "high": 0}
    for c in chunks():
        w = np.asarray(c.columns[moderator], dtype=float)
        for name, mask in (("low", w <= c_lo), ("high", w >= c_hi)):
            if mask.any():
                groups[name].add(np.column_stack([c.X[mask], c.y[mask]]))
                sizes[name] += int(mask.sum())
    s2 = {name: float(acc.factor()[k, k] ** 2) / (sizes[name] - k) for name, acc in groups.items()}
    if s2["low"] <= 0:
        return None
    F = s2["high"] / s2["low"]
    d_hi, d_lo = sizes["high"] - k, sizes["low"] - k
    p = 2 * min(stats.f.sf(F, d_hi, d_lo), stats.f.cdf(F, d_hi, d_lo))
    return {"statistic": num(F), "df": [int(d_hi), int(d_lo)], "p": num(min(1.0, p)), "moderator": moderator,
            "n_dropped_middle": int(n - sizes["low"] - sizes["high"]),
            "group_sizes": {"low": sizes["low"], "high": sizes["high"]},
            "split": {"low_at_most": float(c_lo), "high_at_least": float(c_hi)}}
