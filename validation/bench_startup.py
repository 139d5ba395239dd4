"""Benchmark: start-up of ``robustmod --help`` against ``python -c "import numpy"``.

Both are run as fresh interpreters, interleaved, in this run; the script prints the median wall
time of each and their ratio (goal ≤ 2×). ``python -m robustmod.cli`` runs the same ``main`` as
the ``robustmod`` console script. The parser is built without pandas, scipy or any back-end,
so the ratio stays small.
Run: python validation/bench_startup.py [--runs N]
"""
from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import time

GOAL = 2.0


def wall(cmd: list[str]) -> float:
    t0 = time.perf_counter()
    subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return time.perf_counter() - t0


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=15, help="runs of each command (default: 15)")
    args = parser.parse_args()
    ours_cmd = [sys.executable, "-m", "robustmod.cli", "--help"]
    base_cmd = [sys.executable, "-c", "import numpy"]
    wall(ours_cmd), wall(base_cmd)  # warm the file cache before timing
    ours, base = [], []
    for _ in range(args.runs):
        ours.append(wall(ours_cmd))
        base.append(wall(base_cmd))
    m_ours, m_base = statistics.median(ours), statistics.median(base)
    ratio = m_ours / m_base
    print(f"robustmod --help: median {m_ours * 1000:.0f} ms; python -c 'import numpy': median "
          f"{m_base * 1000:.0f} ms ({args.runs} runs each)")
    print(f"start-up ratio: {ratio:.2f}x (goal <= {GOAL:g}x: {'met' if ratio <= GOAL else 'NOT met'})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
