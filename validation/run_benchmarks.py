"""Run every benchmark script in this folder and print each ratio next to its goal.

Each bench_*.py measures robustmod and its baseline in the same run, so the ratios are comparable
across machines; absolute times are not. Output is also written to results/benchmarks.md.
Run: python validation/run_benchmarks.py [name ...]
"""
from __future__ import annotations

import os
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent


def main(argv: list[str]) -> int:
    scripts = sorted(HERE.glob("bench_*.py"))
    if argv:
        scripts = [s for s in scripts if any(a in s.name for a in argv)]
    env = {**os.environ, "PYTHONWARNINGS": "ignore", "MPLBACKEND": "Agg"}
    lines = ["# Benchmarks", "", f"Run on {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}, "
             f"{os.cpu_count()} CPU(s). Ratios are measured against a baseline in the same run.", ""]
    failed = 0
    for script in scripts:
        print(f"== {script.name}", flush=True)
        t0 = time.perf_counter()
        proc = subprocess.run([sys.executable, str(script)], capture_output=True, text=True, env=env, check=False)
        out = proc.stdout.strip()
        print(out)
        if proc.returncode != 0:
            failed += 1
            print(proc.stderr.strip()[-2000:], file=sys.stderr)
        lines += [f"## {script.name} ({time.perf_counter() - t0:.0f} s, exit {proc.returncode})", "", "```", out, "```", ""]
    (HERE / "results").mkdir(exist_ok=True)
    (HERE / "results" / "benchmarks.md").write_text("\n".join(lines) + "\n")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
