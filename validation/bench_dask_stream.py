"""`robustmod check --stream` on a big Parquet file through a 2-worker Dask LocalCluster, beside the local path.

    nice -n 10 python validation/bench_dask_stream.py --rows 1e7            # local, then dask, same run
    nice -n 10 python validation/bench_dask_stream.py --rows 1e8 --mode dask --reference /tmp/dask_stream_local_100000000.json

What the user runs is timed: the whole CLI process (`robustmod check FILE --stream --formula 'y ~ x * w + a + b'
--focal x --moderator w --backends hc3,wls --memory 2GB --json`, plus `--engine dask --workers 2` for the
cluster run, which starts its own LocalCluster on 127.0.0.1). Memory: every process of the run's process tree
(the CLI process, which is the Dask client and holds the nannies, and each worker process the nannies spawn)
is sampled every 0.2 s with psutil; a process's peak is the largest of its sampled resident set and its
kernel high-water mark (VmHWM in /proc, exact up to the last sample). Goals (tracker issue 16): peak memory
per worker ≤ 2 GB, and every number of the results JSON equal to the local streaming path's to 1e-9 relative
(the local run is made in the same run, or read from ``--reference``, a local run's JSON of the same day).

The files are the invented known-truth data of `validation/bench_stream.py` (5 float columns y, x, w, a, b);
the default folder is validation/data beside this script, or ROBUSTMOD_BENCH_DATA. Results: validation/results/bench_dask_stream.md.
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import psutil  # type: ignore[import-untyped]

sys.path.insert(0, str(Path(__file__).resolve().parent))

ROOT = Path(__file__).resolve().parents[1]
DATA = Path(os.environ.get("ROBUSTMOD_BENCH_DATA", Path(__file__).resolve().parent / "data"))
ARGS = ["--stream", "--formula", "y ~ x * w + a + b", "--focal", "x", "--moderator", "w", "--backends", "hc3,wls",
        "--memory", "2GB", "--json"]
RESULTS = Path(__file__).resolve().parent / "results" / "bench_dask_stream.md"
#: Keys whose values are timings or describe the run, not the data (left out of the comparison).
NOT_NUMBERS = {"seconds", "provenance", "warnings"}
TOLERANCE = 1e-9
SAMPLE_SECONDS = 0.2


def _hwm(pid: int) -> int:
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) * 1024
    except OSError:
        pass
    return 0


def run_check(path: Path, extra: list[str], out: Path) -> dict[str, Any]:
    """One CLI process: wall seconds, exit status, stderr, and the peak memory of each process of its tree."""
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    cmd = [sys.executable, "-m", "robustmod.cli", "check", str(path), *ARGS, *extra]
    load = os.getloadavg()
    peaks: dict[int, dict[str, Any]] = {}
    t0 = time.perf_counter()
    with open(out, "w") as fo, open(out.with_suffix(".err"), "w") as fe:
        proc = subprocess.Popen(cmd, stdout=fo, stderr=fe, env=env)
        root = psutil.Process(proc.pid)
        while proc.poll() is None:
            try:
                tree = [root, *root.children(recursive=True)]
            except psutil.NoSuchProcess:
                break
            for p in tree:
                try:
                    rss = p.memory_info().rss
                    entry = peaks.setdefault(p.pid, {"cmd": " ".join(p.cmdline())[:160], "peak": 0})
                except (psutil.NoSuchProcess, psutil.AccessDenied):
                    continue
                entry["peak"] = max(entry["peak"], rss, _hwm(p.pid))
            time.sleep(SAMPLE_SECONDS)
        proc.wait()
    seconds = time.perf_counter() - t0
    err = out.with_suffix(".err").read_text().strip().splitlines()
    client = peaks.pop(proc.pid, {"peak": 0})["peak"]
    workers = sorted((e["peak"] for e in peaks.values() if "spawn" in e["cmd"] or "forkserver" in e["cmd"]),
                     reverse=True)
    return {"seconds": seconds, "status": proc.returncode, "stderr": err, "client_peak": client,
            "worker_peaks": workers, "others": len(peaks) - len(workers), "load_before": load,
            "load_after": os.getloadavg()}


def differences(a: Any, b: Any, path: str = "") -> tuple[float, list[str]]:
    """Largest relative difference of the numbers of two results JSONs, and the places that differ otherwise."""
    worst, other = 0.0, []
    if isinstance(a, dict) and isinstance(b, dict):
        for key in a.keys() | b.keys():
            if key in NOT_NUMBERS:
                continue
            if key not in a or key not in b:
                other.append(f"{path}/{key}: only in one")
                continue
            w, o = differences(a[key], b[key], f"{path}/{key}")
            worst, other = max(worst, w), other + o
    elif isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            return 0.0, [f"{path}: lengths {len(a)} vs {len(b)}"]
        for i, (u, v) in enumerate(zip(a, b, strict=True)):
            w, o = differences(u, v, f"{path}[{i}]")
            worst, other = max(worst, w), other + o
    elif isinstance(a, (int, float)) and isinstance(b, (int, float)) and not isinstance(a, bool):
        scale = max(abs(a), abs(b))
        if scale > 0 and a != b:
            worst = abs(a - b) / scale
    elif a != b:
        other.append(f"{path}: {str(a)[:80]!r} vs {str(b)[:80]!r}")
    return worst, other


def _gib(b: float) -> str:
    return f"{b / 2**30:.2f}"


def report(rows: int, runs: dict[str, dict[str, Any]], worst: float | None, other: list[str], commit: str,
           reference: str | None) -> list[str]:
    lines = [f"## {rows:,} rows ({time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}, commit {commit})", "",
             "| path | wall time (s) | exit | client peak (GiB) | worker peaks (GiB) | load average before → after |",
             "|---|---|---|---|---|---|"]
    for name, r in runs.items():
        lb, la = r["load_before"], r["load_after"]
        workers = ", ".join(_gib(w) for w in r["worker_peaks"]) or "–"
        lines.append(f"| {name} | {r['seconds']:.1f} | {r['status']} | {_gib(r['client_peak'])} | {workers} | "
                     f"{lb[0]:.2f} → {la[0]:.2f} |")
    if "local" in runs and "dask" in runs:
        lines += ["", f"Dask over local wall time: **{runs['dask']['seconds'] / runs['local']['seconds']:.2f}×** "
                      "(both measured in this run)."]
    if "dask" in runs:
        top = max(runs["dask"]["worker_peaks"], default=0)
        lines += ["", f"Largest worker peak: **{_gib(top)} GiB** (goal ≤ 2 GB: {'met' if top <= 2e9 else 'not met'}); "
                      f"client process {_gib(runs['dask']['client_peak'])} GiB."]
    if worst is not None:
        ref = f" (reference: {reference})" if reference else ""
        lines += ["", f"Largest relative difference of any number, dask vs local{ref}: **{worst:.2e}** (goal ≤ 1e-9: "
                      f"{'met' if worst <= TOLERANCE and not other else 'not met'}); other differences: "
                      f"{len(other)}" + (" — " + "; ".join(other[:5]) if other else "") + "."]
    return lines


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=float, default=1e7, help="10000000 or 100000000 (file big1eN.parquet)")
    parser.add_argument("--mode", choices=("both", "local", "dask"), default="both")
    parser.add_argument("--reference", type=Path, help="results JSON of a local run (instead of running it)")
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--work", type=Path, default=Path("/tmp"), help="folder for the outputs")
    args = parser.parse_args(argv)
    rows = int(args.rows)
    path = DATA / f"big1e{len(str(rows)) - 1}.parquet"
    if not path.exists():
        print(f"{path} is missing; write it with: python validation/bench_stream.py write {path} --rows {rows}")
        return 2
    commit = subprocess.run(["git", "rev-parse", "--short", "HEAD"], check=False, capture_output=True, text=True,
                            cwd=ROOT).stdout.strip() or os.environ.get("ROBUSTMOD_COMMIT", "")
    print(f"uptime: {subprocess.run(['uptime'], check=False, capture_output=True, text=True).stdout.strip()}", flush=True)
    runs: dict[str, dict[str, Any]] = {}
    outs: dict[str, Path] = {}
    for name in ("local", "dask"):
        if args.mode not in ("both", name):
            continue
        outs[name] = args.work / f"dask_stream_{name}_{rows}.json"
        extra = ["--engine", "dask", "--workers", str(args.workers)] if name == "dask" else []
        runs[name] = r = run_check(path, extra, outs[name])
        print(f"{name}: {r['seconds']:.1f} s, exit {r['status']}, client {_gib(r['client_peak'])} GiB, workers "
              f"{[_gib(w) for w in r['worker_peaks']]} GiB, load {r['load_before'][0]:.2f} → {r['load_after'][0]:.2f}"
              + (f"; stderr: {r['stderr'][-1]}" if r["stderr"] else ""), flush=True)
    local = outs.get("local", args.reference)
    worst, other = None, []
    if "dask" in outs and local is not None and Path(local).exists() and runs["dask"]["status"] == 0:
        worst, other = differences(json.loads(Path(local).read_text()), json.loads(outs["dask"].read_text()))
        print(f"largest relative difference: {worst:.3e}; other differences: {other[:5]}", flush=True)
    lines = report(rows, runs, worst, other, commit, str(args.reference) if args.reference else None)
    old = RESULTS.read_text().rstrip("\n").split("\n") if RESULTS.exists() else [
        "# `robustmod check --stream` through a Dask LocalCluster", "",
        "`nice -n 10 python validation/bench_dask_stream.py`; hc3 and wls with every default diagnostic, "
        "`--memory 2GB --json`, 2 workers of one thread each; peaks sampled every 0.2 s (RSS and VmHWM).", ""]
    RESULTS.write_text("\n".join([*old, "", *lines]) + "\n")
    print("\n".join(lines))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
