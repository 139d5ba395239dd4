"""`robustmod check` on Parquet files of 10⁷ and 10⁸ rows read in chunks: whole-process time and peak memory.

    nice -n 10 python validation/bench_bigfile.py                  # both files, then the bad-value copy
    python validation/bench_bigfile.py --rows 1e7                   # one size only
    python validation/bench_bigfile.py --skip-bad                   # without the infinite-value run

What the user runs is timed: the whole CLI process (`robustmod check FILE --formula 'y ~ x * w + a + b'
--focal x --moderator w --backends hc3,wls --memory 2GB --json`), its peak resident memory read from
the child's resource usage (os.wait4). Goals (tracker issue 15): peak RSS ≤ 2 GB at 10⁸ rows; time at
10⁸ within 2× of ten times the time at 10⁷ (both measured in this run). Then a copy of the 10⁸ file with
an infinite value in column x at data row 73,000,001 (only that row group rewritten; the others are
copied as they are) must give the one-line error of a small file, with that row number and exit status 2.

The files are the invented known-truth data of `validation/bench_stream.py` (its `simulate()`,
5 float columns y, x, w, a, b in row groups of 2·10⁶ rows); a missing file is written first.
Results: validation/results/bench_bigfile.md.
"""
from __future__ import annotations

import argparse
import os
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_stream import write_parquet  # noqa: E402

#: Folder of the generated Parquet files (several GiB); set ROBUSTMOD_BENCH_DATA to put them elsewhere.
DATA = Path(os.environ.get("ROBUSTMOD_BENCH_DATA", Path(__file__).resolve().parent / "data"))
FILES = {10**7: DATA / "big1e7.parquet", 10**8: DATA / "big1e8.parquet"}
BAD_ROW = 73_000_001  # data row (1-based) of the infinite value
ARGS = ["--formula", "y ~ x * w + a + b", "--focal", "x", "--moderator", "w", "--backends", "hc3,wls",
        "--memory", "2GB", "--json"]
RESULTS = Path(__file__).resolve().parent / "results" / "bench_bigfile.md"
ROOT = Path(__file__).resolve().parents[1]


def run_check(path: Path, out: Path) -> dict[str, object]:
    """One `robustmod check` process: wall seconds, peak RSS (bytes), exit status, last stderr line."""
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    cmd = [sys.executable, "-m", "robustmod.cli", "check", str(path), *ARGS]
    load = os.getloadavg()
    t0 = time.perf_counter()
    with open(out, "w") as fo, open(out.with_suffix(".err"), "w") as fe:
        proc = subprocess.Popen(cmd, stdout=fo, stderr=fe, env=env)
        _, status, usage = os.wait4(proc.pid, 0)
    seconds = time.perf_counter() - t0
    err = out.with_suffix(".err").read_text().strip().splitlines()
    return {"seconds": seconds, "rss": usage.ru_maxrss * 1024, "status": os.waitstatus_to_exitcode(status),
            "stderr": err[-1] if err else "", "stderr_lines": len(err), "load_before": load,
            "load_after": os.getloadavg()}


def bad_copy(src: Path, dst: Path, row: int) -> None:
    """A copy of ``src`` with x = inf at data row ``row``: row groups copied, only the one holding the row
    rewritten (never more than one row group in memory)."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    pf = pq.ParquetFile(str(src))
    tmp = dst.with_name(dst.name + ".part")
    start = 0
    with pq.ParquetWriter(str(tmp), pf.schema_arrow, compression="none") as writer:
        for g in range(pf.num_row_groups):
            table = pf.read_row_group(g)
            m = table.num_rows
            if start <= row - 1 < start + m:
                x = table.column("x").to_numpy().copy()
                x[row - 1 - start] = np.inf
                table = table.set_column(table.schema.get_field_index("x"), "x", pa.array(x))
            writer.write_table(table)
            start += m
    tmp.replace(dst)


def report(runs: dict[int, dict[str, object]], bad: dict[str, object] | None, commit: str) -> None:
    """Write validation/results/bench_bigfile.md from the runs so far."""
    lines = ["# `robustmod check` on Parquet files read in chunks", "",
             "`nice -n 10 python validation/bench_bigfile.py`; hc3 and wls with every default diagnostic, "
             f"`--memory 2GB --json`, whole CLI process (peak RSS of the child from os.wait4); commit {commit}.", "",
             "| rows | wall time (s) | peak RSS (GiB) | exit | load average before → after |",
             "|---|---|---|---|---|"]
    for n, r in runs.items():
        lb, la = r["load_before"], r["load_after"]
        assert isinstance(lb, tuple) and isinstance(la, tuple)
        lines.append(f"| {n:,} | {float(str(r['seconds'])):.1f} | {float(str(r['rss'])) / 2**30:.2f} | {r['status']} | "
                     f"{lb[0]:.2f} → {la[0]:.2f} |")
    if 10**7 in runs and 10**8 in runs:
        ratio = float(str(runs[10**8]["seconds"])) / (10 * float(str(runs[10**7]["seconds"])))
        rss = float(str(runs[10**8]["rss"]))
        lines += ["", f"Time at 10⁸ over ten times the time at 10⁷: **{ratio:.2f}** (goal ≤ 2, "
                      f"{'met' if ratio <= 2 else 'not met'}); peak RSS at 10⁸: **{rss / 2**30:.2f} GiB** (goal ≤ 2 GB, "
                      f"{'met' if rss <= 2e9 else 'not met'})."]
        print(lines[-1])
    if bad is not None:
        lines += ["", f"Copy of the 10⁸ file with x = inf at data row {BAD_ROW:,}: exit status {bad['status']} after "
                      f"{float(str(bad['seconds'])):.1f} s, {bad['stderr_lines']} line on stderr:", "",
                  f"    {bad['stderr']}"]
    RESULTS.write_text("\n".join(lines) + "\n")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=float, action="append", help="10000000 and/or 100000000 (default: both)")
    parser.add_argument("--skip-bad", action="store_true", help="no run on the copy with an infinite value")
    parser.add_argument("--work", type=Path, default=Path("/tmp"), help="folder for outputs and the bad copy")
    args = parser.parse_args(argv)
    commit = subprocess.run(["git", "rev-parse", "--short", "HEAD"], check=False, capture_output=True, text=True,
                            cwd=ROOT).stdout.strip()
    sizes = sorted(int(r) for r in (args.rows or FILES))
    for n in sizes:
        if not FILES[n].exists():
            FILES[n].parent.mkdir(parents=True, exist_ok=True)
            write_parquet(FILES[n], n)
    runs: dict[int, dict[str, object]] = {}
    bad = None
    # The small file first, then the bad copy (a single pass that stops at the bad row), then the long run.
    for step in [*(n for n in sizes if n < 10**8), "bad", *(n for n in sizes if n >= 10**8)]:
        if step == "bad":
            if args.skip_bad or not FILES[10**8].exists():
                continue
            dst = args.work / "big1e8_inf.parquet"
            t0 = time.perf_counter()
            bad_copy(FILES[10**8], dst, BAD_ROW)
            print(f"bad copy written in {time.perf_counter() - t0:.0f} s", flush=True)
            bad = run_check(dst, args.work / "bigfile_bad.json")
            dst.unlink()
            print(f"bad value: exit {bad['status']} after {float(str(bad['seconds'])):.1f} s; stderr "
                  f"({bad['stderr_lines']} line): {bad['stderr']}", flush=True)
        else:
            assert isinstance(step, int)
            r = run_check(FILES[step], args.work / f"bigfile_{step}.json")
            runs[step] = r
            lb, la = r["load_before"], r["load_after"]
            assert isinstance(lb, tuple) and isinstance(la, tuple)
            print(f"n = {step:,}: {float(str(r['seconds'])):.1f} s, peak RSS {float(str(r['rss'])) / 2**30:.2f} GiB, "
                  f"exit {r['status']}, load {lb[0]:.2f} → {la[0]:.2f}", flush=True)
        report(runs, bad, commit)
    print(f"written {RESULTS}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
