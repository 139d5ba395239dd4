"""The sensitivity appendix: files, results contract, escaping, atomic output, figures."""
from __future__ import annotations

import csv
import hashlib
import io
import json
import os
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf

from robustmod.cli import main
from robustmod.compare import compare
from robustmod.demo import DEMO_FOCAL, DEMO_FORMULA, DEMO_MODERATOR, demo_data
from robustmod.errors import InputError
from robustmod.report import APPENDIX_FILES, CAUTIONS, write_appendix
from robustmod.report import figures as F
from robustmod.report.writers import csv_guard, latex_escape, md_escape

HOSTILE_FOCAL = "<script>alert(1)</script>"
HOSTILE_MOD = "50%_&_#$"

# Required keys of the results contract, copied from DESIGN.md ("Results contract").
CONTRACT_TOP = {"schema", "model", "backends", "summary", "diagnostics"}
CONTRACT_MODEL = {"formula", "focal", "moderators", "interaction_terms", "n_obs", "n_dropped", "alpha"}
CONTRACT_BACKEND = {"coefficients", "interaction", "conditional_effects", "significance_region", "warnings"}
CONTRACT_COEF = {"estimate", "se", "ci", "p"}
CONTRACT_INTERACTION = {"terms", "estimate", "se", "ci", "p", "supported"}
CONTRACT_EFFECT = {"at", "estimate", "se", "ci", "p"}
CONTRACT_REGION = {"moderator", "boundaries", "significant_intervals", "observed_range"}
CONTRACT_SUMMARY = {"primary", "supported_by", "not_supported_by", "unreliable", "sign_consistent", "survives", "sentence"}
CONTRACT_DIAGNOSTICS = {"breusch_pagan", "white", "goldfeld_quandt"}
CONTRACT_CALIBRATION = {"n_datasets", "alpha", "false_positive_rate", "power"}


def check_contract(res: dict) -> None:
    """Assert the required keys and value types of the results contract (DESIGN.md)."""
    assert CONTRACT_TOP <= set(res)
    assert res["schema"] == "robustmod/results-v1"
    assert CONTRACT_MODEL <= set(res["model"])
    assert CONTRACT_SUMMARY <= set(res["summary"])
    assert CONTRACT_DIAGNOSTICS <= set(res["diagnostics"])
    for key in ("breusch_pagan", "white"):
        assert {"statistic", "df", "p"} <= set(res["diagnostics"][key])
    for bid, b in res["backends"].items():
        assert CONTRACT_BACKEND <= set(b), bid
        if not b.get("available", True):
            continue
        for term, c in b["coefficients"].items():
            assert CONTRACT_COEF <= set(c), (bid, term)
        assert CONTRACT_INTERACTION <= set(b["interaction"]), bid
        assert isinstance(b["interaction"]["supported"], bool)
        if b.get("kind") == "posterior":
            assert b["interaction"]["p"] is None  # DESIGN.md: no p-value for a posterior
        for ce in b["conditional_effects"]:
            assert CONTRACT_EFFECT <= set(ce)
        if b["significance_region"] is not None:
            assert CONTRACT_REGION <= set(b["significance_region"])
    if "calibration" in res:
        assert CONTRACT_CALIBRATION <= set(res["calibration"])
        for bid, v in res["calibration"]["false_positive_rate"].items():
            assert {"rate", "mc_se"} <= set(v), bid


def tree_digest(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def small(tmp_path_factory: pytest.TempPathFactory) -> tuple[object, Path]:
    """The invented demo data through the closed-form back-ends (fast)."""
    c = compare(demo_data(), DEMO_FORMULA, DEMO_FOCAL, DEMO_MODERATOR, backends=["ols", "hc3", "hc0"])
    out = write_appendix(c, tmp_path_factory.mktemp("small") / "appendix")
    return c, out


# ---- the full demo, end to end --------------------------------------------------------
@pytest.mark.slow
def test_demo_command_writes_complete_appendix(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "demo"
    rc = main(["demo", "--out", str(out), "--quiet", "--calibrate", "20", "--set", "wild.replications=199",
               "--set", "bayes.draws=200", "--set", "bayes.tune=200", "--set", "bayes.prior_sensitivity=false"])
    assert rc == 0
    printed = capsys.readouterr().out
    assert str(out / "appendix.html") in printed
    for name in APPENDIX_FILES:
        assert (out / name).is_file(), name
    res = json.loads((out / "results.json").read_text())
    check_contract(res)
    assert set(res["backends"]) == {"ols", "hc3", "wild", "wls", "bayes"}
    assert all(b["available"] for b in res["backends"].values()), {k: b["reason"] for k, b in res["backends"].items()}
    assert "calibration" in res
    assert res["summary"]["sentence"] in printed
    # Every figure whose input the demo holds is drawn; the two-moderator heat map is not.
    for stem in ("slope", "data", "residuals", "variance", "linearity", "calibration", "posterior", "ranks"):
        assert (out / "figures" / f"{stem}.png").stat().st_size > 1000, stem
        assert (out / "figures" / f"{stem}.pdf").read_bytes()[:5] == b"%PDF-", stem
    assert not (out / "figures" / "heatmap.png").exists()
    html = (out / "appendix.html").read_text()
    assert "Slope over two moderators: not drawn" in html
    assert "convergence" in html and "PSIS-LOO" in html
    prov = json.loads((out / "provenance.json").read_text())
    assert prov["seed"] == res["model"]["seed"]
    assert prov["command_line"].startswith("robustmod demo")
    assert prov["data_sha256"] is None  # the demo data are generated, not read from a file


# ---- contract and outside references -------------------------------------------------
def test_results_json_follows_contract_and_matches_statsmodels(small: tuple[object, Path]) -> None:
    c, out = small
    res = json.loads((out / "results.json").read_text())
    check_contract(res)
    # Reference library: statsmodels OLS with HC3 covariance on the same invented data.
    ref = smf.ols(DEMO_FORMULA, data=demo_data()).fit(cov_type="HC3")
    term = "fertiliser:soil_moisture"
    it = res["backends"]["hc3"]["interaction"]
    assert it["estimate"] == pytest.approx(ref.params[term], rel=1e-10)
    assert it["se"] == pytest.approx(ref.bse[term], rel=1e-8)
    ref_cls = smf.ols(DEMO_FORMULA, data=demo_data()).fit()
    assert res["backends"]["ols"]["interaction"]["se"] == pytest.approx(ref_cls.bse[term], rel=1e-8)
    # Koenker's studentized Breusch-Pagan from statsmodels on the same residuals and regressors.
    from statsmodels.stats.diagnostic import het_breuschpagan

    lm, lm_p, _, _ = het_breuschpagan(ref_cls.resid, ref_cls.model.exog, robust=True)
    assert res["diagnostics"]["breusch_pagan"]["statistic"] == pytest.approx(lm, rel=1e-8)


def test_every_file_exists_and_html_is_self_contained(small: tuple[object, Path]) -> None:
    _, out = small
    for name in APPENDIX_FILES:
        assert (out / name).is_file(), name
    html = (out / "appendix.html").read_text()
    assert "<script" not in html
    assert not re.search(r"""(?:src|href)=["']?(?:https?:)?//""", html)  # nothing fetched from a network
    assert html.count("data:image/png;base64,") == len(list((out / "figures").glob("*.png")))
    assert "@media print" in html
    for caution in CAUTIONS:
        assert caution.split(";")[0].replace("'", "&#39;") in html
    for section in ("model", "data", "comparison", "robustness", "diagnostics", "calibration", "backends",
                    "figures", "cautions", "provenance"):
        assert f'<section id="{section}">' in html
    # Missing inputs are said, not silently dropped.
    assert "No calibration was run" in html
    assert "Posterior of the product term: not drawn" in html


def test_page_numbers_equal_results_json(small: tuple[object, Path]) -> None:
    _, out = small
    res = json.loads((out / "results.json").read_text())
    html = (out / "appendix.html").read_text()
    cells = re.findall(r'data-field="interaction-estimate" data-backend="([^"]+)" data-value="([^"]+)">([^<]*)<', html)
    assert {b for b, _, _ in cells} == set(res["backends"])
    from robustmod.tables import format_cell

    for bid, value, shown in cells:
        est = res["backends"][bid]["interaction"]["estimate"]
        assert json.loads(value) == est  # exact: the same float, round-tripped
        assert shown == format_cell(est, "number", unicode_minus=True)


def test_rerun_is_byte_identical(small: tuple[object, Path], tmp_path: Path) -> None:
    c, out = small
    again = write_appendix(c, tmp_path / "again")
    # appendix.md/.html and provenance.json hold the UTC time of writing, so they differ by design.
    for name in ("results.json", "tables.tex", "comparison.csv"):
        assert (again / name).read_bytes() == (out / name).read_bytes(), name
    for png in (out / "figures").glob("*"):
        assert (again / "figures" / png.name).read_bytes() == png.read_bytes(), png.name


def test_second_run_without_force_leaves_folder_untouched(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data = tmp_path / "trial.csv"
    demo_data().to_csv(data, index=False)
    out = tmp_path / "app"
    args = ["appendix", str(data), "--formula", DEMO_FORMULA, "--focal", DEMO_FOCAL, "--moderator", DEMO_MODERATOR,
            "--backends", "ols,hc3", "--out", str(out), "--quiet"]
    assert main(args) == 0
    before = tree_digest(out)
    capsys.readouterr()
    assert main(args) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "already exists" in err and "--force" in err
    assert tree_digest(out) == before
    # With --force the folder is replaced by a complete new one and nothing is left beside it.
    assert main(args + ["--force"]) == 0
    assert set(tree_digest(out)) == set(before)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["app", "trial.csv"]
    prov = json.loads((out / "provenance.json").read_text())
    from robustmod.data import file_sha256

    assert prov["data_sha256"] == file_sha256(data) == hashlib.sha256(data.read_bytes()).hexdigest()


def test_unwritable_output_is_one_clear_line(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    blocker = tmp_path / "a_file"
    blocker.write_text("not a folder")
    rc = main(["demo", "--out", str(blocker / "sub"), "--backends", "ols,hc3", "--calibrate", "0", "--quiet"])
    assert rc == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "cannot be created" in err and "--out" in err
    with pytest.raises(InputError, match="is a file"):
        write_appendix(compare(demo_data(), DEMO_FORMULA, DEMO_FOCAL, DEMO_MODERATOR, backends=["ols"]), blocker)
    assert blocker.read_text() == "not a folder"


# ---- hostile names ---------------------------------------------------------------------
@pytest.fixture(scope="module")
def hostile(tmp_path_factory: pytest.TempPathFactory) -> Path:
    df = demo_data().rename(columns={"fertiliser": HOSTILE_FOCAL, "soil_moisture": HOSTILE_MOD})
    before = df.copy()
    c = compare(df, f"grain_yield ~ `{HOSTILE_FOCAL}` * `{HOSTILE_MOD}` + field_slope", HOSTILE_FOCAL, HOSTILE_MOD,
                backends=["ols", "hc3"])
    out = write_appendix(c, tmp_path_factory.mktemp("hostile") / "appendix")
    pd.testing.assert_frame_equal(df, before)  # the user's frame is not modified
    return out


def test_hostile_names_are_text_in_html_and_markdown(hostile: Path) -> None:
    html = (hostile / "appendix.html").read_text()
    assert "<script" not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "50%_&amp;_#$" in html
    md = (hostile / "appendix.md").read_text()
    # A name Markdown could read as markup sits in a code span, which every renderer shows as
    # text (CommonMark spec, "Code spans"; recalled from memory); no entities, no backslashes.
    outside_code = re.sub(r"(`+)(?:(?!\1).)+?\1", "", md)
    assert "<script" not in outside_code and "`<script>alert(1)</script>`" in md
    assert "&lt;" not in md and "&amp;" not in md


def _tex_unescaped(text: str) -> list[str]:
    """Special characters of LaTeX text mode not produced by our escapes (the ten specials
    # $ % & ~ _ ^ \\ { } of the LaTeX2e manual, recalled from memory)."""
    allowed = re.compile(r"\\(?:textbackslash|textasciitilde|textasciicircum|textbar|allowbreak|dots)\{\}"
                         r"|\\[&%$#_{}]|\{\[\}|\{\]\}|\$\\(?:pm|cdot|geq|leq|alpha|surd|sigma|chi|beta|gamma|mu|times|approx)\$"
                         r"|\$\^2\$|\$[<>-]\$|\\ragged(?:left|right)\\hspace\{0pt\}")
    return re.findall(r"[#$%&~_^\\{}]", allowed.sub("", text))


def test_hostile_names_escaped_in_latex(hostile: Path) -> None:
    tex = (hostile / "tables.tex").read_text()
    assert r"$<$script$>$alert(1)$<$/script$>$" in tex
    assert r"50\%\_\allowbreak{}\&\_\allowbreak{}\#\$" in tex
    body = []
    for raw in tex.splitlines():
        if raw.startswith("%"):
            continue
        # Structural LaTeX of our own: environments, rules, captions' braces, column separators, row ends.
        line = re.sub(r"^\\(begin|end)\{(table|tabular)\}(\[htbp\]|\{.*\})?$", "", raw)
        line = re.sub(r"^\\(centering|footnotesize|scriptsize|tiny|toprule|midrule|bottomrule|par\\smallskip)$", "", line)
        line = re.sub(r"^\\setlength\{\\tabcolsep\}\{[0-9.]+pt\}$", "", line)
        line = re.sub(r"^\\label\{tab:robustmod-[a-z0-9-]+\}$", "", line)
        line = re.sub(r"^\\caption\{(.*)\}$", r"\1", line)
        line = re.sub(r"^\{\\raggedright (.*)\\par\}$", r"\1", line)
        line = re.sub(r" \\tabularnewline$", "", line)
        body += line.split(" & ")
    assert _tex_unescaped("\n".join(body)) == []
    # Every table row has as many cells as its column specification.
    for spec, block in re.findall(r"\\begin\{tabular\}\{@\{\}(.*?)@\{\}\}(.*?)\\end\{tabular\}", tex, re.S):
        rows = [r for r in block.split("\n") if r.endswith(r"\tabularnewline")]
        assert rows and all(len(r.split(" & ")) == spec.count("p{") for r in rows)


def test_hostile_tables_compile_with_pdflatex(hostile: Path, tmp_path: Path) -> None:
    # The real check: the tables, hostile names included, compile in a minimal booktabs document.
    # pdflatex comes from Debian's texlive-latex-base (.ci/run installs it).
    import shutil
    import subprocess

    if shutil.which("pdflatex") is None:
        if os.environ.get("CI"):
            pytest.fail("pdflatex is missing in CI; .ci/run must install texlive-latex-base")
        pytest.skip("pdflatex not installed (apt-get install texlive-latex-base texlive-latex-recommended)")
    doc = tmp_path / "check.tex"
    doc.write_text("\\documentclass{article}\n\\usepackage[T1]{fontenc}\n\\usepackage{booktabs}\n"
                   "\\begin{document}\n" + (hostile / "tables.tex").read_text() + "\n\\end{document}\n")
    proc = subprocess.run(["pdflatex", "-interaction=nonstopmode", "-halt-on-error", doc.name], cwd=tmp_path,
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stdout[-3000:]
    assert (tmp_path / "check.pdf").stat().st_size > 1000


def test_latex_escape_covers_the_special_characters() -> None:
    # The ten special characters of LaTeX (LaTeX2e manual, "Reserved characters"; recalled from memory).
    for ch in "#$%&~_^\\{}":
        escaped = latex_escape(ch)
        assert escaped != ch and _tex_unescaped(escaped) == []
    assert latex_escape("a_b") == r"a\_b"
    assert latex_escape("[x]") == "{[}x{]}"


def test_markdown_escape() -> None:
    # CommonMark: a code span shows its content literally; a lone "<" or "*" between spaces is
    # plain text; "&" is plain unless it spells an entity (CommonMark spec; recalled from memory).
    assert md_escape("<b>|x_y*") == "`<b>|x_y*`"
    assert md_escape("p < 0.001 and y ~ x * w") == "p < 0.001 and y ~ x * w"
    assert md_escape("King & Roberts (2015)") == "King & Roberts (2015)"
    assert md_escape("see fertiliser:soil_moisture.") == "see `fertiliser:soil_moisture`."
    assert "\\" not in md_escape("a_b *c* [d]") and "&" not in md_escape("a_b *c*")


def test_csv_guard_and_export(small: tuple[object, Path]) -> None:
    # OWASP "CSV Injection": cells starting with = + - @ (and tab, CR) are run as formulas
    # by spreadsheet programs; a leading single quote makes them text (recalled from memory).
    for bad in ("=1+1", "+cmd", "-2+3", "@SUM(A1)", "\tx", "\rx"):
        assert csv_guard(bad) == "'" + bad
    assert csv_guard("plain") == "plain" and csv_guard(-0.5) == -0.5
    c, out = small
    res = json.loads((out / "results.json").read_text())
    rows = list(csv.DictReader(io.StringIO((out / "comparison.csv").read_text())))
    assert [r["backend"] for r in rows] == list(c.results)  # the order the back-ends were run in
    for r in rows:
        assert float(r["estimate"]) == pytest.approx(res["backends"][r["backend"]]["interaction"]["estimate"], rel=1e-12)


def test_csv_guards_hostile_level_labels(tmp_path: Path) -> None:
    df = demo_data()
    df["site"] = np.where(np.arange(len(df)) % 2 == 0, "=HYPERLINK(1)", "+north")
    c = compare(df, "grain_yield ~ fertiliser * C(site)", "fertiliser", "site", backends=["ols", "hc3"])
    out = write_appendix(c, tmp_path / "app")
    text = (out / "comparison.csv").read_text()
    cells = [cell for row in csv.reader(io.StringIO(text)) for cell in row]
    assert not any(cell[:1] in "=+@" for cell in cells if cell)
    assert not any(cell.startswith("-") and not re.fullmatch(r"-[0-9.e+-]+", cell) for cell in cells)


# ---- figures draw the comparison's tables, nothing else ----------------------------------
def test_slope_figure_draws_the_slope_curves(small: tuple[object, Path]) -> None:
    c, _ = small
    fig = F.slope_figure(c)
    ax = fig.axes[0]
    for bid, r in c.results.items():
        line = next(ln for ln in ax.lines if ln.get_label().startswith(f"{bid}"))
        np.testing.assert_array_equal(line.get_ydata(), np.asarray(r.slope_curve["estimate"], dtype=float))
    # Johnson-Neyman boundaries inside the shown range appear as vertical lines.
    shown = {round(float(ln.get_xdata()[0]), 9) for ln in ax.lines if len(set(ln.get_xdata())) == 1 and len(ln.get_xdata()) == 2}
    info = c.design.moderators[DEMO_MODERATOR]
    for r in c.results.values():
        for b in r.significance_region["boundaries"]:
            if info.minimum <= b <= info.maximum:
                assert round(b, 9) in shown


def test_missing_inputs_raise_missing_input(small: tuple[object, Path]) -> None:
    c, _ = small
    for func in (F.variance_figure, F.calibration_figure, F.posterior_figure, F.rank_figure, F.heatmap_figure):
        with pytest.raises(F.MissingInput):
            func(c)
    for func in (F.data_figure, F.residual_figure, F.linearity_figure):
        assert func(c).axes


def test_heatmap_with_two_moderators(tmp_path: Path) -> None:
    rng = np.random.default_rng(7)  # simulated data with a known three-way structure
    n = 300
    df = pd.DataFrame({"x": rng.normal(size=n), "w": rng.uniform(0, 10, n), "z": rng.uniform(-1, 1, n)})
    df["y"] = 1 + 0.5 * df.x + 0.3 * df.x * df.w + 0.2 * df.z + rng.normal(size=n) * (1 + 0.1 * df.w)
    c = compare(df, "y ~ x * w * z", "x", ["w", "z"], backends=["ols", "hc3"])
    fig = F.heatmap_figure(c)
    mesh = fig.axes[0].collections[0]
    grid = c.results["hc3"].slope_grid
    np.testing.assert_allclose(np.asarray(mesh.get_array()).reshape(len(grid["values"][1]), -1),
                               np.asarray(grid["estimate"]).T)
    out = write_appendix(c, tmp_path / "two")
    assert (out / "figures" / "heatmap.png").is_file()
    check_contract(json.loads((out / "results.json").read_text()))


def test_figures_use_okabe_ito_palette(small: tuple[object, Path]) -> None:
    # Okabe & Ito (2008), "Color Universal Design" — the eight colours (recalled from memory).
    reference = {"#000000", "#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7"}
    assert set(F.OKABE_ITO.values()) == reference
    assert set(F.BACKEND_COLOURS.values()) <= reference


def test_figures_do_not_change_the_comparison(small: tuple[object, Path]) -> None:
    from robustmod.report.writers import results_dict

    c, _ = small
    before = results_dict(c)[0]  # the contract without wall-clock timings
    for func in (F.slope_figure, F.data_figure, F.residual_figure, F.linearity_figure):
        func(c)
    assert results_dict(c)[0] == before


def test_failure_while_writing_leaves_nothing_behind(small: tuple[object, Path], tmp_path: Path,
                                                     monkeypatch: pytest.MonkeyPatch) -> None:
    c, _ = small
    existing = tmp_path / "kept"
    existing.mkdir()
    (existing / "note.txt").write_text("first version")

    def broken(*args: object, **kwargs: object) -> str:
        raise RuntimeError("disk full while rendering")

    monkeypatch.setattr("robustmod.report.writers.render_latex", broken)
    with pytest.raises(RuntimeError):
        write_appendix(c, existing, force=True)
    with pytest.raises(RuntimeError):
        write_appendix(c, tmp_path / "new")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["kept"]
    assert (existing / "note.txt").read_text() == "first version"
