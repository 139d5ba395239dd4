"""The catalogue of bad inputs: each gives exit status 2, one line on stderr naming the problem and a
remedy, no traceback, and leaves every input file unchanged (common practice for command-line tools,
no source)."""
from __future__ import annotations

import hashlib
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from robustmod.cli import main


def _sha(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest() if p.is_file() else ""


def good_frame(n: int = 60, seed: int = 1) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x, w = rng.normal(size=n), rng.uniform(0, 2, n)
    return pd.DataFrame({"y": 1 + x + 0.5 * x * w + rng.normal(size=n) * (0.3 + w), "x": x, "w": w,
                         "age": rng.uniform(20, 60, n).round(), "grp": rng.choice(["a", "b"], n)})


def run_bad(capsys, tmp_path: Path, args: list[str], *files: Path) -> str:
    hashes = {f: _sha(f) for f in files}
    rc = main(args)
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert rc == 2, err
    assert len(lines) == 1, err
    assert "Traceback" not in err
    for f, h in hashes.items():
        assert _sha(f) == h, f"{f} was modified"
    return lines[0]


def write_csv(tmp_path: Path, df: pd.DataFrame, name: str = "data.csv") -> Path:
    p = tmp_path / name
    df.to_csv(p, index=False)
    return p


def check_args(path: Path, formula: str = "y ~ x * w", focal: str = "x", mod: str = "w", *extra: str) -> list[str]:
    fast = [] if "--backends" in extra else ["--backends", "ols,hc3"]  # the quick back-ends unless a test names its own
    return ["check", str(path), "--formula", formula, "--focal", focal, "--moderator", mod, "--quiet", *fast, *extra]


def test_missing_file(capsys, tmp_path):
    msg = run_bad(capsys, tmp_path, check_args(tmp_path / "nope.csv"))
    assert "does not exist" in msg and "nope.csv" in msg


def test_empty_file(capsys, tmp_path):
    p = tmp_path / "empty.csv"
    p.write_bytes(b"")
    assert "empty" in run_bad(capsys, tmp_path, check_args(p), p)


def test_header_only(capsys, tmp_path):
    p = tmp_path / "head.csv"
    p.write_text("y,x,w\n")
    assert "no data rows" in run_bad(capsys, tmp_path, check_args(p), p)


def test_unreadable_encoding(capsys, tmp_path):
    p = tmp_path / "latin.csv"
    p.write_bytes("y,x,w,ort\n1,2,3,K\xf6ln\n".encode("latin-1"))
    msg = run_bad(capsys, tmp_path, check_args(p), p)
    assert "UTF-8" in msg


def test_not_a_table(capsys, tmp_path):
    p = tmp_path / "picture.csv"
    p.write_bytes(b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR\x00\x00")
    msg = run_bad(capsys, tmp_path, check_args(p), p)
    assert "picture.csv" in msg
    q = tmp_path / "prose.csv"
    q.write_text("Dear reviewer\nthank you\n")
    assert "column" in run_bad(capsys, tmp_path, check_args(q), q)


def test_unknown_file_type(capsys, tmp_path):
    p = tmp_path / "data.sas7bdat"
    p.write_bytes(b"abc")
    assert ".csv" in run_bad(capsys, tmp_path, check_args(p), p)


def test_no_rows_after_listwise_deletion(capsys, tmp_path):
    df = good_frame()
    df.loc[::2, "x"] = np.nan
    df.loc[1::2, "w"] = np.nan
    p = write_csv(tmp_path, df)
    assert "No rows are left" in run_bad(capsys, tmp_path, check_args(p), p)


def test_column_not_found_suggests_close_match(capsys, tmp_path):
    p = write_csv(tmp_path, good_frame())
    msg = run_bad(capsys, tmp_path, check_args(p, "y ~ x * ww", "x", "ww"), p)
    assert "'ww'" in msg and "Did you mean" in msg and "'w'" in msg


def test_non_numeric_focal(capsys, tmp_path):
    p = write_csv(tmp_path, good_frame())
    msg = run_bad(capsys, tmp_path, check_args(p, "y ~ grp * w", "grp", "w"), p)
    assert "not numeric" in msg and "grp" in msg


def test_infinite_values(capsys, tmp_path):
    df = good_frame()
    df["w"] = df["w"].astype(object)
    df.loc[4, "w"] = "inf"
    p = write_csv(tmp_path, df)
    msg = run_bad(capsys, tmp_path, check_args(p), p)
    assert "infinite" in msg and "row 5" in msg


def test_constant_focal_and_moderator(capsys, tmp_path):
    df = good_frame()
    df["x"] = 3.0
    p = write_csv(tmp_path, df)
    assert "constant" in run_bad(capsys, tmp_path, check_args(p), p)
    df = good_frame()
    df["w"] = 1.0
    q = write_csv(tmp_path, df, "q.csv")
    assert "constant" in run_bad(capsys, tmp_path, check_args(q), q)


def test_categorical_moderator_with_one_level(capsys, tmp_path):
    df = good_frame()
    df["grp"] = "a"
    p = write_csv(tmp_path, df)
    msg = run_bad(capsys, tmp_path, check_args(p, "y ~ x * grp", "x", "grp"), p)
    assert "only one level" in msg


def test_focal_equal_to_moderator(capsys, tmp_path):
    p = write_csv(tmp_path, good_frame())
    assert "also given as a moderator" in run_bad(capsys, tmp_path, check_args(p, "y ~ x * w", "x", "x"), p)


def test_duplicate_column_names(capsys, tmp_path):
    p = tmp_path / "dup.csv"
    p.write_text("y,x,w,x\n1,2,3,4\n2,3,4,5\n")
    msg = run_bad(capsys, tmp_path, check_args(p), p)
    assert "'x' appears more than once" in msg


def test_rank_deficient_design_names_aliased_term(capsys, tmp_path):
    df = good_frame()
    df["x2"] = 2 * df["x"]
    p = write_csv(tmp_path, df)
    msg = run_bad(capsys, tmp_path, check_args(p, "y ~ x * w + x2"), p)
    assert "rank-deficient" in msg and "'x2'" in msg


def test_too_few_rows(capsys, tmp_path):
    p = write_csv(tmp_path, good_frame().head(5))
    msg = run_bad(capsys, tmp_path, check_args(p, "y ~ x * w + age"), p)
    assert "only 5 complete rows" in msg


def test_leverage_one_primary(capsys, tmp_path):
    df = pd.DataFrame({"y": [1.0, 2.1, 2.9, 4.2, 5.1, 6.3, 9.0], "x": [1.0, 2, 3, 4, 5, 6, 7],
                       "w": [0.0, 1, 0, 1, 0, 1, 0], "g": [0, 0, 0, 0, 0, 0, 1]})
    p = write_csv(tmp_path, df)
    msg = run_bad(capsys, tmp_path, check_args(p, "y ~ x * w + g", "x", "w", "--backends", "hc3"), p)
    assert "leverage 1" in msg and "row(s) 7" in msg and "primary" in msg
    # With another primary the run succeeds and marks HC3 unavailable.
    assert main(check_args(p, "y ~ x * w + g", "x", "w", "--backends", "hc0,hc3", "--primary", "hc0", "--json")) == 0
    assert '"available": false' in capsys.readouterr().out


def test_probe_values_outside_range_warn_not_fail(capsys, tmp_path):
    p = write_csv(tmp_path, good_frame())
    assert main(check_args(p, "y ~ x * w", "x", "w", "--at", "1,5")) == 0
    out = capsys.readouterr().out
    assert "outside its observed range" in out


@pytest.mark.parametrize("alpha", ["0", "1", "1.5", "-0.1"])
def test_alpha_outside_unit_interval(capsys, tmp_path, alpha):
    p = write_csv(tmp_path, good_frame())
    msg = run_bad(capsys, tmp_path, check_args(p, "y ~ x * w", "x", "w", "--alpha", alpha), p)
    assert "'alpha' option must be a number in (0, 1)" in msg


def test_unknown_backend_lists_valid_ids(capsys, tmp_path):
    p = write_csv(tmp_path, good_frame())
    msg = run_bad(capsys, tmp_path, check_args(p, "y ~ x * w", "x", "w", "--backends", "hc3,hc9"), p)
    assert "hc9" in msg and "hc3" in msg and "valid ids" in msg


@pytest.mark.parametrize("formula", ["y ~ x * (w", "y ~ x * w)", "y x * w", "y ~ x ~ w", "~ x * w", "y ~ "])
def test_formula_syntax_errors(capsys, tmp_path, formula):
    p = write_csv(tmp_path, good_frame())
    msg = run_bad(capsys, tmp_path, check_args(p, formula), p)
    assert "formula" in msg.lower()


@pytest.mark.parametrize("piece", [
    "__import__('os').system('touch {mark}')", "open('{mark}', 'w')", "eval('1')", "x.__class__",
    "np.log(x)", "[x for x in w]", "lambda: 0", "exec('pass')", "getattr(x, 'y')",
])
def test_formula_disallowed_calls_refused_before_evaluation(capsys, tmp_path, piece):
    mark = tmp_path / "pwned"
    p = write_csv(tmp_path, good_frame())
    formula = "y ~ x * w + " + piece.format(mark=mark)
    msg = run_bad(capsys, tmp_path, check_args(p, formula), p)
    assert "formula" in msg.lower() or "not allowed" in msg
    assert not mark.exists()


def test_formula_without_product_term(capsys, tmp_path):
    p = write_csv(tmp_path, good_frame())
    msg = run_bad(capsys, tmp_path, check_args(p, "y ~ x + w"), p)
    assert "no product term" in msg and "y ~ x * w" in msg


def test_moderator_not_in_formula(capsys, tmp_path):
    p = write_csv(tmp_path, good_frame())
    msg = run_bad(capsys, tmp_path, check_args(p, "y ~ x * age", "x", "w"), p)
    assert "does not appear in the formula" in msg


def test_values_whose_squares_overflow(capsys, tmp_path):
    df = good_frame()
    df["y"] = df["y"] * 1e200
    p = write_csv(tmp_path, df)
    msg = run_bad(capsys, tmp_path, check_args(p), p)
    assert "rescale" in msg and "'y'" in msg


def test_transform_of_invalid_values(capsys, tmp_path):
    df = good_frame()
    df.loc[3, "w"] = -1.0
    p = write_csv(tmp_path, df)
    msg = run_bad(capsys, tmp_path, check_args(p, "y ~ x * log(w)", "x", "w"), p)
    # The rows at fault are counted and a transform suggested; dropping rows is not (common practice, no source).
    assert "1 of 60 rows of w are 0 or below" in msg and "data row 4" in msg and "log1p(w)" in msg
    assert "drop" not in msg


def test_bad_set_option(capsys, tmp_path):
    p = write_csv(tmp_path, good_frame())
    assert "BACKEND.OPTION=VALUE" in run_bad(capsys, tmp_path, check_args(p, "y ~ x * w", "x", "w", "--set", "oops"), p)
    msg = run_bad(capsys, tmp_path, check_args(p, "y ~ x * w", "x", "w", "--set", "hc3.colour=1"), p)
    assert "hc3" in msg


def test_usage_error_is_one_line(tmp_path):
    out = subprocess.run([sys.executable, "-m", "robustmod.cli", "check"], capture_output=True, text=True, timeout=120)
    assert out.returncode == 2
    assert len([ln for ln in out.stderr.splitlines() if ln.strip()]) == 1
    assert "Traceback" not in out.stderr


def test_disallowed_formula_in_subprocess_has_no_traceback(tmp_path):
    p = write_csv(tmp_path, good_frame())
    out = subprocess.run([sys.executable, "-m", "robustmod.cli", *check_args(p, "y ~ x * w + __import__('os')")],
                         capture_output=True, text=True, timeout=120)
    assert out.returncode == 2 and "Traceback" not in out.stderr
    assert len([ln for ln in out.stderr.splitlines() if ln.strip()]) == 1


@pytest.mark.parametrize("bad", [0.0, -1.0, np.nan])
def test_weights_column_with_zero_negative_or_missing_values(capsys, tmp_path, bad):
    df = good_frame()
    df["wt"] = 1.0
    df.loc[6, "wt"] = bad
    p = write_csv(tmp_path, df)
    msg = run_bad(capsys, tmp_path, check_args(p, "y ~ x * w", "x", "w", "--backends", "hc3,wls",
                                               "--set", "wls.variance=known", "--set", "wls.weights=wt"), p)
    assert "'wt'" in msg and "row 7" in msg


def test_variance_model_that_does_not_converge_falls_back_with_a_warning(capsys, tmp_path, monkeypatch):
    from robustmod.backends import wls

    def no_convergence(vm, X, y, beta0, gamma0, *args, **kwargs):
        return beta0, gamma0, None, False, 500, "iteration limit reached"

    monkeypatch.setattr(wls, "ml_fit", no_convergence)
    p = write_csv(tmp_path, good_frame())
    assert main(check_args(p, "y ~ x * w", "x", "w", "--backends", "hc3,wls", "--json")) == 0
    out = __import__("json").loads(capsys.readouterr().out)
    w = out["backends"]["wls"]
    assert w["available"] and any("did not converge" in m for m in w["warnings"])
    assert w["extras"]["variance_model"]["converged"] is False


@pytest.mark.slow
def test_sampler_in_trouble_gives_warnings_not_a_crash(capsys, tmp_path):
    # Far too few draws and tuning steps: the diagnostics must fail (ESS < 400, Vehtari et al. 2021)
    # and the back-end be listed as unreliable, with the run itself succeeding.
    p = write_csv(tmp_path, good_frame(n=80))
    rc = main(check_args(p, "y ~ x * w", "x", "w", "--backends", "hc3,bayes", "--set", "bayes.draws=50",
                         "--set", "bayes.tune=50", "--set", "bayes.chains=2", "--set", "bayes.prior_sensitivity=false",
                         "--json"))
    assert rc == 0
    out = __import__("json").loads(capsys.readouterr().out)
    b = out["backends"]["bayes"]
    assert b["available"] and not b["reliable"] and b["warnings"]
    assert "bayes" in out["summary"]["unreliable"]
