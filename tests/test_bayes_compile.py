"""The on-disk cache of nutpie's compiled functions (robustmod.backends.bayes_compile).

Reference: nutpie's own ``compile_pymc_model(model, backend="numba")``. The cached functions are
the ones nutpie compiles, so the draws for one seed must be bit-identical — in the process that
compiled them and in a new process that loads them from the cache (same seed, same draws:
project rule; common practice, no source).
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from robustmod.cachedir import CACHE_ENV, cache_dir

pytestmark = pytest.mark.slow  # two numba compilations of the model (~10 s on 2 cores)

SAMPLE = """
import json, sys, warnings
import numpy as np
warnings.filterwarnings("ignore")
from robustmod.backends import bayes, bayes_compile
from robustmod.demo import DEMO_FOCAL, DEMO_FORMULA, DEMO_MODERATOR, demo_data
from robustmod.design import build_design
from robustmod.spec import ModelSpec

def model(n):
    d = build_design(demo_data(n), ModelSpec(formula=DEMO_FORMULA, focal=DEMO_FOCAL, moderators=(DEMO_MODERATOR,)))
    prep = bayes.BayesBackend()._standardised(d)
    return bayes.build_model(prep.Xs, prep.ys, prep.Zs)

def draws(compiled, cm):
    import nutpie
    values = {**cm.data, "prior_scale": 1.0, "variance_on": 1.0}
    m = compiled.with_data(**{k: v for k, v in values.items() if k in compiled.shared_data})
    tr = nutpie.sample(m, draws=150, tune=150, chains=2, cores=1, seed=11, progress_bar=False)
    return np.concatenate([tr.posterior[v].values.ravel() for v in sorted(tr.posterior.data_vars)])

cm = model(int(sys.argv[1]))
ours = bayes_compile.compile_pymc_model(cm.model)
out = {"hits": [ours.compiled_logp_func.cache_hits, ours.compiled_expand_func.cache_hits],
       "draws": draws(ours, cm).tolist()}
if sys.argv[2] == "reference":
    import nutpie
    out["reference"] = draws(nutpie.compile_pymc_model(cm.model, backend="numba", freeze_model=False), cm).tolist()
print(json.dumps(out))
"""


def _run(n: int, mode: str, cache: Path | str) -> dict:
    env = {**os.environ, CACHE_ENV: str(cache), "PYTHONWARNINGS": "ignore"}
    proc = subprocess.run([sys.executable, "-c", SAMPLE, str(n), mode], capture_output=True, text=True, env=env,
                          check=False, cwd=Path(__file__).resolve().parents[1])
    assert proc.returncode == 0, proc.stderr[-2000:]
    return json.loads(proc.stdout.strip().splitlines()[-1])


def test_cached_functions_give_nutpies_draws_and_load_in_a_new_process(tmp_path):
    cache = tmp_path / "cache"
    first = _run(300, "reference", cache)
    assert first["hits"] == [0, 0]  # empty cache: compiled here, and written
    np.testing.assert_array_equal(first["draws"], first["reference"])  # bit-identical to nutpie's compile
    files = sorted(p.name for p in (cache / "numba").iterdir())
    assert any(f.endswith(".nbc") for f in files) and not any(".tmp." in f for f in files)
    again = _run(300, "ours", cache)
    assert again["hits"] == [1, 1]  # a new process loads both functions, compiles nothing
    np.testing.assert_array_equal(again["draws"], first["draws"])
    other_n = _run(200, "ours", cache)  # other data of the same columns: the same compiled functions
    assert other_n["hits"] == [1, 1]
    assert sorted(p.name for p in (cache / "numba").iterdir()) == files


def test_cache_off_or_unwritable_compiles_in_process(tmp_path, monkeypatch):
    monkeypatch.setenv(CACHE_ENV, "off")
    assert cache_dir("numba") is None
    blocker = tmp_path / "file"
    blocker.write_text("not a folder")
    monkeypatch.setenv(CACHE_ENV, str(blocker))
    assert cache_dir("numba") is None
    monkeypatch.setenv(CACHE_ENV, str(tmp_path / "c"))
    assert cache_dir("numba") == tmp_path / "c" / "numba"
    off = _run(200, "ours", "off")
    assert off["hits"] == [0, 0] and len(off["draws"]) > 0
