"""The working tree against the previous release (0.1.0, commit 8c22332), side by side in one run.

The previous release is extracted with ``git archive`` into a temporary folder; every
measurement runs in a fresh subprocess whose PYTHONPATH points at one tree, so both are timed
the same way, one after the other, on the same machine and load:

1. ``robustmod check`` with its default back-ends on 1,000 rows of the demo data (invented
   field-trial data, ``robustmod.demo.demo_data(1000)``): wall time of the whole command,
   imports and process exit included, as a user sees it (each tree through the function its
   installed ``robustmod`` command calls). Goal: at most 1/3 of the previous time. Both trees keep
   compiled code on disk (PyTensor's C modules; this tree also the sampler's numba functions, in
   robustmod's cache folder, here a fresh temporary one): each tree's check runs once untimed
   first, so both are timed warm, as on a user's second run; this tree's first run (empty cache,
   as on a fresh machine) is reported beside it.
2. ``robustmod demo`` (appendix of the built-in demo, its default settings): wall time of the
   command, after the check (so warm). Goal: at most 1/2 of the previous time.
3. The wild bootstrap through ``compare()`` (B = 9999, n = 10⁴, invented data with SD growing
   with the moderator): median of two timed calls after a warm-up call, against a statsmodels
   refit loop doing the same work per replicate (unrestricted and null-imposed y*, each refitted
   with ``OLS(...).fit(cov_type="HC3")``), timed on ``--loop-replicates`` replicates and scaled
   to B. Goal: at least 50 times faster.

Run: python validation/bench_release.py [--skip-demo] (several minutes on 2 cores).
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tarfile
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
TREE = HERE.parent
RELEASE = "8c22332"
GOAL = {"check": 1 / 3, "demo": 1 / 2, "wild": 50.0}
WILD_N, WILD_B = 10_000, 9999

# What the installed ``robustmod`` command runs in each tree: its console entry point
# (``robustmod.cli:run`` here, ``robustmod.cli:main`` wrapped in ``sys.exit`` in 0.1.0).
CLI = ("import sys; import robustmod.cli as c; "
       "c.run() if hasattr(c, 'run') else sys.exit(c.main(sys.argv[1:]))")
WILD = """
import json, sys, time, warnings
import numpy as np, pandas as pd
warnings.filterwarnings("ignore")
from robustmod.compare import compare
rng = np.random.default_rng(7)
n = {n}
x, w = rng.normal(size=n), rng.normal(size=n)
y = 1 + 0.5 * x + 0.3 * w + 0.1 * x * w + rng.normal(size=n) * np.exp(0.5 * w)
df = pd.DataFrame({{"y": y, "x": x, "w": w}})
opts = {{"wild": {{"replications": {B}}}}}
compare(df, "y ~ x * w", "x", "w", backends=["wild"], options=opts, seed=1)
times = []
for s in (2, 3):
    t0 = time.perf_counter()
    compare(df, "y ~ x * w", "x", "w", backends=["wild"], options=opts, seed=s)
    times.append(time.perf_counter() - t0)
print(json.dumps({{"seconds": float(np.median(times))}}))
"""


def extract_release(folder: Path) -> Path:
    """``git archive`` of the release commit, unpacked into ``folder``."""
    archive = folder / "release.tar"
    with archive.open("wb") as fh:
        subprocess.run(["git", "-C", str(TREE), "archive", "--format=tar", RELEASE], stdout=fh, check=True)
    with tarfile.open(archive) as tar:
        tar.extractall(folder / "release", filter="data")
    return folder / "release"


def run(tree: Path, args: list[str], cwd: Path) -> tuple[float, str]:
    """Wall time of ``python args`` with ``tree`` first on the path; stdout returned."""
    env = {**os.environ, "PYTHONPATH": str(tree), "PYTHONWARNINGS": "ignore", "MPLBACKEND": "Agg",
           "ROBUSTMOD_CACHE_DIR": str(cwd / "robustmod-cache")}
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, *args], cwd=cwd, env=env, capture_output=True, text=True,
                          check=False)
    seconds = time.perf_counter() - t0
    if proc.returncode != 0:
        raise SystemExit(f"{' '.join(args[:3])} failed under {tree}: {proc.stderr.strip()[-1500:]}")
    return seconds, proc.stdout


def loop_seconds_per_replicate(replicates: int, seed: int = 7) -> float:
    """statsmodels refit loop (two HC3 refits per replicate, Rademacher weights) on the wild data."""
    import statsmodels.api as sm

    rng = np.random.default_rng(seed)
    x, w = rng.normal(size=WILD_N), rng.normal(size=WILD_N)
    y = 1 + 0.5 * x + 0.3 * w + 0.1 * x * w + rng.normal(size=WILD_N) * np.exp(0.5 * w)
    X = np.column_stack([np.ones(WILD_N), x, w, x * w])
    X0 = X[:, :3]

    def hc2_scaled(model_X: np.ndarray, fit) -> np.ndarray:
        h = np.einsum("ij,ij->i", *(2 * [np.linalg.qr(model_X)[0]]))
        return fit.resid / np.sqrt(1 - h)

    base, restricted = sm.OLS(y, X).fit(), sm.OLS(y, X0).fit()
    e, e0 = hc2_scaled(X, base), hc2_scaled(X0, restricted)
    V = np.where(np.random.default_rng(2).random((replicates, WILD_N)) < 0.5, -1.0, 1.0)
    t0 = time.perf_counter()
    for v in V:
        r = sm.OLS(base.fittedvalues + e * v, X).fit(cov_type="HC3")
        _ = (r.params - base.params) / r.bse
        r0 = sm.OLS(restricted.fittedvalues + e0 * v, X).fit(cov_type="HC3")
        _ = r0.params[3] / r0.bse[3]
    return (time.perf_counter() - t0) / replicates


def measure(trees: dict[str, Path], work: Path, skip_demo: bool) -> dict[str, dict[str, float]]:
    sys.path.insert(0, str(TREE))
    from robustmod.demo import DEMO_FOCAL, DEMO_FORMULA, DEMO_MODERATOR, demo_data

    csv = work / "demo_1000.csv"
    demo_data(1000).to_csv(csv, index=False)
    out: dict[str, dict[str, float]] = {name: {} for name in trees}
    check = ["-c", CLI, "check", str(csv), "--formula", DEMO_FORMULA, "--focal", DEMO_FOCAL,
             "--moderator", DEMO_MODERATOR]
    for name, tree in trees.items():
        out[name]["check_first"], _ = run(tree, check, work)
        print(f"check, {name}, first run: {out[name]['check_first']:.1f} s", flush=True)
        out[name]["check"], _ = run(tree, check, work)
        print(f"check, {name}: {out[name]['check']:.1f} s", flush=True)
        if not skip_demo:
            out[name]["demo"], _ = run(tree, ["-c", CLI, "demo", "--out", str(work / f"demo-{name}"), "--quiet"], work)
            print(f"demo, {name}: {out[name]['demo']:.1f} s", flush=True)
        _, text = run(tree, ["-c", WILD.format(n=WILD_N, B=WILD_B)], work)
        out[name]["wild"] = json.loads(text.strip().splitlines()[-1])["seconds"]
        print(f"wild compare(), {name}: {out[name]['wild']:.2f} s", flush=True)
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--loop-replicates", type=int, default=200)
    ap.add_argument("--skip-demo", action="store_true", help="leave out the demo command (the slowest part)")
    ap.add_argument("--out", default=str(HERE / "results" / "bench_release.md"))
    a = ap.parse_args()
    load_start = os.getloadavg()[0]
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        trees = {"previous": extract_release(work), "current": TREE}
        t = measure(trees, work, a.skip_demo)
    loop = loop_seconds_per_replicate(a.loop_replicates) * WILD_B
    load = os.getloadavg()[0]
    lines = [(f"Previous release {RELEASE} (0.1.0) against the working tree; {os.cpu_count()} CPUs, load average "
              f"{load_start:.1f} at the start and {load:.1f} at the end."), "",
             "| measurement | previous s | current s | ratio | goal | met |", "|---|---|---|---|---|---|"]
    met_all = True
    lines.append(f"| default `check`, 1,000 demo rows, first run (this tree: empty cache) | "
                 f"{t['previous']['check_first']:.1f} | {t['current']['check_first']:.1f} | "
                 f"{t['current']['check_first'] / t['previous']['check_first']:.2f} (current / previous) | — | — |")
    for key, label in (("check", "default `check`, 1,000 demo rows, warm"), ("demo", "`robustmod demo`")):
        if key not in t["current"]:
            continue
        ratio = t["current"][key] / t["previous"][key]
        met = ratio <= GOAL[key]
        met_all &= met
        lines.append(f"| {label} | {t['previous'][key]:.1f} | {t['current'][key]:.1f} | {ratio:.2f} (current / "
                     f"previous) | <= {GOAL[key]:.2f} | {'yes' if met else 'no'} |")
    speed = {name: loop / t[name]["wild"] for name in t}
    met = speed["current"] >= GOAL["wild"]
    met_all &= met
    lines.append(f"| wild bootstrap via `compare()`, B = {WILD_B}, n = {WILD_N} | {t['previous']['wild']:.2f} | "
                 f"{t['current']['wild']:.2f} | {speed['previous']:.0f}x / {speed['current']:.0f}x faster than the "
                 f"statsmodels loop ({loop:.0f} s, scaled from {a.loop_replicates} replicates) | >= {GOAL['wild']:g}x | "
                 f"{'yes' if met else 'no'} |")
    print("\n".join(lines))
    path = Path(a.out)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("# Release benchmark\n\nGenerated by `validation/bench_release.py` on "
                    f"{time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}.\n\n" + "\n".join(lines) + "\n")
    return 0 if met_all else 1


if __name__ == "__main__":
    sys.exit(main())
