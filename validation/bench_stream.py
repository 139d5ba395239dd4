"""Benchmark of the streaming kernels, and a file larger than memory.

    python validation/bench_stream.py                 # in memory: n = 10⁶ and 10⁷, k = 7
    python validation/bench_stream.py --n 1000000     # one size only
    python validation/bench_stream.py write PATH [--rows 100000000]   # Parquet file, row group by row group
    python validation/bench_stream.py stream PATH [--white] [--no-wls]   # streaming HC3 + BP and WLS over PATH

In memory, the kernels (OLS + HC3 with Breusch–Pagan and White in the residual pass; WLS-ML of a
log-linear variance model) are timed beside numpy's lstsq on the same X in the same run, and
their peak memory above the input (tracemalloc, which sees numpy's buffers) is set against the
size of X. Goals: OLS + HC3 + BP + White ≤ 2 × lstsq time; memory above the input a small
fraction of X. The file case reports wall time per stage and the peak RSS of the process (goal ≤ 2 GB).
The data are invented (a known-truth simulation: variance growing with the moderator).
"""
from __future__ import annotations

import argparse
import resource
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from measure import measured  # noqa: E402

from robustmod.diagnostics import breusch_pagan_lm, white_lm
from robustmod.kernels.chunks import array_chunks, rows_per_chunk
from robustmod.kernels.lmtests import AuxiliaryRegression
from robustmod.kernels.ols import streamed_ols
from robustmod.kernels.wls import streamed_wls

#: Memory budget of one chunk in these runs (bytes).
BUDGET = 64 * 2**20
SEED = 20240917


def simulate(rng: np.random.Generator, m: int) -> dict[str, np.ndarray]:
    """Invented rows: y = 1 + x + 0.5w + 0.2xw + 0.3a + ε, SD(ε) = exp(0.2 + 0.3w)."""
    x, w, a, b = (rng.normal(size=m) for _ in range(4))
    y = 1 + x + 0.5 * w + 0.2 * x * w + 0.3 * a + rng.normal(size=m) * np.exp(0.2 + 0.3 * w)
    return {"y": y, "x": x, "w": w, "a": a, "b": b}


#: Above this n the in-memory tests (n × 36 White matrix and its Q) are not run beside the kernels.
IN_MEMORY_TESTS_MAX_N = 2_000_000


def in_memory(n: int) -> dict[str, float]:
    d = simulate(np.random.default_rng(SEED), n)
    X = np.column_stack([np.ones(n), d["x"], d["w"], d["x"] * d["w"], d["a"], d["b"], d["a"] * d["b"]])
    y = d["y"]
    Z = np.column_stack([np.ones(n), d["x"], d["w"]])
    k = X.shape[1]
    rows = rows_per_chunk(BUDGET, 1 + k + k * (k + 1) // 2)
    chunks = array_chunks(X, y, chunk_rows=rows, columns={"Z": Z})

    def ols_tests() -> Any:
        bp, wh = AuxiliaryRegression(), AuxiliaryRegression(white=True)
        fit = streamed_ols(chunks, ["hc3"], consumers=[bp, wh])
        return fit, bp.result(), wh.result()

    _, t_lstsq, m_lstsq = measured(lambda: np.linalg.lstsq(X, y, rcond=None))
    _, t_hc3, m_hc3 = measured(lambda: streamed_ols(chunks, ["hc3"]))
    _, t_all, m_all = measured(ols_tests)
    wls, t_wls, m_wls = measured(lambda: streamed_wls(chunks))
    t_mem = m_mem = float("nan")
    if n <= IN_MEMORY_TESTS_MAX_N:
        e = y - X @ np.linalg.lstsq(X, y, rcond=None)[0]
        _, t_mem, m_mem = measured(lambda: (breusch_pagan_lm(e, X), white_lm(e, X)))
    size_x = X.nbytes
    print(f"n = {n:,}, k = {k}, X = {size_x / 2**20:.0f} MiB, chunk = {rows:,} rows (budget {BUDGET / 2**20:.0f} MiB)")
    print(f"numpy lstsq on X:               {t_lstsq:7.2f} s   peak above input {m_lstsq / 2**20:7.1f} MiB")
    print(f"streamed OLS + HC3:             {t_hc3:7.2f} s   peak above input {m_hc3 / 2**20:7.1f} MiB   "
          f"time / lstsq = {t_hc3 / t_lstsq:.2f}")
    print(f"streamed OLS + HC3 + BP + White:{t_all:7.2f} s   peak above input {m_all / 2**20:7.1f} MiB   "
          f"time / lstsq = {t_all / t_lstsq:.2f} (goal <= 2)")
    print(f"streamed WLS-ML (log-linear):   {t_wls:7.2f} s   peak above input {m_wls / 2**20:7.1f} MiB   "
          f"({wls.iterations} scoring steps)   time / lstsq = {t_wls / t_lstsq:.2f}")
    print(f"in-memory BP + White (diagnostics module): {t_mem:7.2f} s   peak above input {m_mem / 2**20:7.1f} MiB   "
          f"streamed OLS+HC3+BP+White / in-memory BP+White = {t_all / t_mem:.2f}")
    print(f"peak above input / size of X:   OLS+tests {m_all / size_x:.3f}, WLS {m_wls / size_x:.3f}")
    return {"hc3_tests_over_lstsq": t_all / t_lstsq, "streamed_over_in_memory_tests": t_all / t_mem,
            "memory_over_x": max(m_all, m_wls) / size_x}


def write_parquet(path: Path, rows: int, group: int = 2_000_000) -> None:
    """Write ``rows`` invented rows × 5 columns in row groups of ``group`` rows (never all in memory)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng(SEED)
    t0 = time.perf_counter()
    schema = pa.schema([(name, pa.float64()) for name in ("y", "x", "w", "a", "b")])
    tmp = path.with_name(path.name + ".part")
    with pq.ParquetWriter(str(tmp), schema, compression="none") as writer:
        for start in range(0, rows, group):
            writer.write_table(pa.table(simulate(rng, min(group, rows - start)), schema=schema))
    tmp.replace(path)
    print(f"wrote {rows:,} rows to {path.name}: {path.stat().st_size / 2**30:.2f} GiB in {time.perf_counter() - t0:.0f} s")


def stream_file(path: Path, *, white: bool = False, wls: bool = True, wls_steps: int | None = None) -> None:
    """Streaming OLS + HC3 (with BP, and White when asked) and WLS-ML over a Parquet file; wall time, peak RSS."""
    from robustmod import ModelSpec
    from robustmod.source import ModelChunks, Source

    spec = ModelSpec(formula="y ~ x * w + a + b", focal="x", moderators=("w",))
    t0 = time.perf_counter()
    chunks = ModelChunks(Source(path, batch_rows=1 << 18), spec)
    t_profile = time.perf_counter() - t0
    consumers = [AuxiliaryRegression()] + ([AuxiliaryRegression(white=True)] if white else [])
    t1 = time.perf_counter()
    fit = streamed_ols(chunks, ["hc3"], consumers=consumers)
    t_ols = time.perf_counter() - t1
    j = chunks.term_names.index("x:w")
    print(f"file {path.name}: {chunks.profile.n_complete:,} rows, k = {fit.k}")
    print(f"first pass (levels, missing, summaries): {t_profile:7.1f} s")
    print(f"OLS + HC3 + BP{' + White' if white else ''} (2 passes):          {t_ols:7.1f} s   interaction "
          f"{fit.beta[j]:.5f} (HC3 SE {np.sqrt(fit.cov['hc3'][j, j]):.2e}); "
          f"BP {consumers[0].result()['statistic']:.1f}", flush=True)
    if wls:
        t2 = time.perf_counter()
        fit_w = streamed_wls(chunks) if wls_steps is None else streamed_wls(chunks, max_iter=wls_steps)
        t_wls = time.perf_counter() - t2
        state = "converged" if fit_w.converged else "stopped, two-step estimates reported"
        print(f"WLS-ML log-linear ({fit_w.iterations} scoring steps, {state}): {t_wls:7.1f} s   "
              f"gamma {np.round(fit_w.gamma, 4)}   interaction {fit_w.beta[j]:.5f}")
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    print(f"peak RSS of the process: {rss / 2**30:.2f} GiB (goal <= 2)")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("command", nargs="?", choices=["memory", "write", "stream"], default="memory")
    parser.add_argument("path", nargs="?", type=Path)
    parser.add_argument("--n", type=int, action="append")
    parser.add_argument("--rows", type=int, default=100_000_000)
    parser.add_argument("--white", action="store_true", help="add White's test to the file pass")
    parser.add_argument("--no-wls", action="store_true", help="skip the WLS passes over the file")
    parser.add_argument("--wls-steps", type=int, help="stop the WLS scoring after this many steps (to time the passes)")
    args = parser.parse_args(argv)
    if args.command == "memory":
        for n in args.n or [1_000_000, 10_000_000]:
            in_memory(n)
        return 0
    if args.path is None:
        parser.error(f"'{args.command}' needs a file path")
    if args.command == "write":
        write_parquet(args.path, args.rows)
    else:
        stream_file(args.path, white=args.white, wls=not args.no_wls, wls_steps=args.wls_steps)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
