"""Size and coverage study in the style of Long & Ervin (2000).

For each sample size, variance pattern and error distribution, simulate datasets with a true-null
product term from y = 1 + x + w + 0·x·w + σ(x, w)·ε on fixed regressors and record, for every back-end,

* the rejection rate of the product term at 5 % (its Monte Carlo SE is sqrt(p(1 − p)/D)), and
* the coverage of the 95 % interval of the conditional slope of x at w = mean + 1 SD (true value 1).

Variance patterns: constant (σ = 1); SD rising with the focal predictor (σ = 0.25 + x, x ~ U(0, 3));
SD rising with the moderator (σ = 0.25 + w, w ~ U(0, 3)). Errors: standard normal, and a skewed
standardised χ²₂ ((χ²₂ − 2)/2). Seeded throughout.

Run: python validation/size_study.py            (full study, up to an hour on 2 cores)
     python validation/size_study.py --quick    (a reduced version, a minute or two)
Writes validation/results/size_study.md (or size_study_quick.md).
"""
from __future__ import annotations

import argparse
import dataclasses
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from robustmod.backends.base import Unavailable
from robustmod.backends.registry import make_backend
from robustmod.design import Design, build_design
from robustmod.spec import ModelSpec

HERE = Path(__file__).resolve().parent
#: (label, back-end id, options)
BACKENDS: list[tuple[str, str, dict[str, Any]]] = [
    ("ols", "ols", {}), ("hc0", "hc0", {}), ("hc1", "hc1", {}), ("hc2", "hc2", {}), ("hc3", "hc3", {}),
    ("hc4", "hc4", {}), ("hc4m", "hc4m", {}), ("hc5", "hc5", {}),
    ("wild", "wild", {"replications": 399}),
    ("wls (robust SE)", "wls", {"se": "robust"}), ("wls (model SE)", "wls", {"se": "model"}),
]
PATTERNS = ("constant", "focal", "moderator")
ERRORS = ("normal", "skewed")


def make_design(n: int, pattern: str, seed: int) -> tuple[Design, np.ndarray, np.ndarray]:
    """Fixed regressors for one cell; returns the design, the mean and the error SD of every row."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(0, 3, n)
    w = rng.uniform(0, 3, n)
    sigma = {"constant": np.ones(n), "focal": 0.25 + x, "moderator": 0.25 + w}[pattern]
    mean = 1 + x + w
    frame = pd.DataFrame({"y": mean + sigma * rng.normal(size=n), "x": x, "w": w})
    return build_design(frame, ModelSpec("y ~ x * w", "x", ("w",))), mean, sigma


def errors(kind: str, size: tuple[int, int], rng: np.random.Generator) -> np.ndarray:
    if kind == "normal":
        return rng.normal(size=size)
    return (rng.chisquare(2, size=size) - 2.0) / 2.0


def run_cell(n: int, pattern: str, err: str, n_datasets: int, seed: int, backends) -> list[dict[str, Any]]:
    design, mean, sigma = make_design(n, pattern, seed)
    rng = np.random.default_rng(seed + 1)
    Y = mean[:, None] + sigma[:, None] * errors(err, (n, n_datasets), rng)
    info = design.moderators["w"]
    w0 = info.mean + info.sd
    L_slope = design.slope_rows_along("w", np.array([w0]))
    rows = []
    for label, bid, opts in backends:
        backend = make_backend(bid, **opts)
        reject = np.zeros(n_datasets, dtype=bool)
        cover = np.zeros(n_datasets, dtype=bool)
        failed = 0
        t0 = time.perf_counter()
        for j in range(n_datasets):
            dj = dataclasses.replace(design, y=Y[:, j].copy())
            fit = backend.fit(dj, seed=seed + 7 * j)
            if isinstance(fit, Unavailable):
                failed += 1
                continue
            test = fit.test_coefficients(design.interaction_columns, 0.05)
            reject[j] = bool(test.p < 0.05) if test.p is not None else test.supported
            est = fit.estimate(L_slope, 0.05)
            cover[j] = bool(est.lower[0] <= 1.0 <= est.upper[0])
        used = n_datasets - failed
        rate = reject.sum() / used if used else float("nan")
        cov = cover.sum() / used if used else float("nan")
        rows.append({"n": n, "pattern": pattern, "errors": err, "backend": label, "datasets": used,
                     "size": rate, "size_mc_se": np.sqrt(rate * (1 - rate) / used) if used else float("nan"),
                     "coverage": cov, "coverage_mc_se": np.sqrt(cov * (1 - cov) / used) if used else float("nan"),
                     "seconds": time.perf_counter() - t0})
    return rows


def to_markdown(df: pd.DataFrame, title: str, n_datasets: int) -> str:
    lines = [f"# {title}", "",
             f"{n_datasets} datasets per cell; nominal size 0.05, nominal coverage 0.95. A rate is flagged with * "
             "when it lies more than 2 Monte Carlo SEs from nominal (computed at the nominal rate); by chance alone "
             "about 1 flag in 20 is expected, and the back-ends of one cell share their datasets, so their "
             "deviations move together.", ""]
    for (pattern, err), block in df.groupby(["pattern", "errors"], sort=False):
        lines += [f"## SD pattern: {pattern}; errors: {err}", "",
                  "| back-end | " + " | ".join(f"n={n} size" for n in sorted(block.n.unique())) + " | "
                  + " | ".join(f"n={n} coverage" for n in sorted(block.n.unique())) + " |",
                  "|---|" + "---|" * (2 * block.n.nunique())]
        for label, group in block.groupby("backend", sort=False):
            b = group.sort_values("n")
            se_size = np.sqrt(0.05 * 0.95 / b.datasets)
            se_cov = np.sqrt(0.95 * 0.05 / b.datasets)
            sizes = [f"{s:.3f}{'*' if abs(s - 0.05) > 2 * e else ''}" for s, e in zip(b["size"], se_size, strict=False)]
            covs = [f"{c:.3f}{'*' if abs(c - 0.95) > 2 * e else ''}" for c, e in zip(b["coverage"], se_cov, strict=False)]
            lines.append(f"| {label} | " + " | ".join(sizes) + " | " + " | ".join(covs) + " |")
        lines.append("")
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> pd.DataFrame:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="reduced study (n = 25, 100; two patterns; 200 datasets)")
    ap.add_argument("--datasets", type=int, default=None, help="datasets per cell (default 1000; quick 200)")
    ap.add_argument("--seed", type=int, default=2000, help="base seed (default 2000)")
    ap.add_argument("--out", default=None, help="markdown output path")
    args = ap.parse_args(argv)
    sizes = (25, 100) if args.quick else (25, 50, 100, 250, 500)
    patterns = ("constant", "moderator") if args.quick else PATTERNS
    errs = ("normal",) if args.quick else ERRORS
    D = args.datasets or (200 if args.quick else 1000)
    rows = []
    t0 = time.perf_counter()
    for pattern in patterns:
        for err in errs:
            for i, n in enumerate(sizes):
                rows += run_cell(n, pattern, err, D, args.seed + 100 * i, BACKENDS)
                print(f"done n={n} pattern={pattern} errors={err} ({time.perf_counter() - t0:.0f} s)", flush=True)
    df = pd.DataFrame(rows)
    title = "Size and coverage study" + (" (reduced)" if args.quick else "")
    md = to_markdown(df, title, D)
    out = Path(args.out) if args.out else HERE / "results" / ("size_study_quick.md" if args.quick else "size_study.md")
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(md)
    print(md)
    return df


if __name__ == "__main__":
    main(sys.argv[1:])
