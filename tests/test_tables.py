"""The one table layer behind every display, and the display defects it fixes."""
from __future__ import annotations

import csv
import dataclasses
import io
import os
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
import statsmodels.formula.api as smf

import robustmod
from robustmod.compare import compare
from robustmod.demo import DEMO_FOCAL, DEMO_FORMULA, DEMO_MODERATOR, demo_data
from robustmod.errors import InputError
from robustmod.report import figures as F
from robustmod.report import write_appendix
from robustmod.report.latex import latex_escape, table_latex
from robustmod.tables import MINUS, NotApplicable, format_cell, region_words

LONG_FOCAL = "fertiliser_application_rate_in_kilograms_per_hectare"
LONG_MOD = "volumetric_soil_moisture_percentage_at_thirty_centimetres"


@pytest.fixture(scope="module")
def demo() -> object:
    """The invented demo data through the closed-form back-ends, WLS and a short wild bootstrap."""
    return compare(demo_data(), DEMO_FORMULA, DEMO_FOCAL, DEMO_MODERATOR, backends=["ols", "hc3", "wild", "wls"],
                   options={"wild": {"replications": 199}}, calibration=20)


@pytest.fixture(scope="module")
def appendix(demo: object, tmp_path_factory: pytest.TempPathFactory) -> Path:
    return write_appendix(demo, tmp_path_factory.mktemp("tables") / "appendix")


@pytest.fixture(scope="module")
def categorical() -> object:
    df = demo_data()
    df["site"] = np.array(["north", "south", "east", "west"])[np.arange(len(df)) % 4]
    return compare(df, "grain_yield ~ fertiliser * C(site)", "fertiliser", "site", backends=["ols", "hc3"])


# ---- one set of tables -----------------------------------------------------------------------
def test_tables_are_named_ordered_and_every_display_uses_them(demo: object) -> None:
    keys = [t.key for t in demo.tables()]
    assert keys[:4] == ["product_term", "slopes", "regions", "variance_tests"]
    assert "linearity" in keys and "calibration" in keys
    text, page = str(demo), demo._repr_html_()
    for t in demo.tables():
        assert t.title in text, t.key
        assert f'data-table="{t.key}"' in page, t.key
    assert demo.summary_lines()[0][0] == demo.tables()[0].title


def test_table_has_se_and_numeric_boundaries(demo: object) -> None:
    frame = demo.table()
    # Reference library: statsmodels OLS with HC3 covariance on the same invented data.
    ref = smf.ols(DEMO_FORMULA, data=demo_data()).fit(cov_type="HC3")
    term = "fertiliser:soil_moisture"
    assert frame.loc["hc3", "se"] == pytest.approx(ref.bse[term], rel=1e-8)
    lo, hi = ref.conf_int().loc[term]
    assert frame.loc["hc3", "ci_low"] < frame.loc["hc3", "estimate"] < frame.loc["hc3", "ci_high"]
    assert frame.loc["hc3", "estimate"] == pytest.approx(ref.params[term], rel=1e-10)
    assert hi - lo > 0
    for bid, r in demo.results.items():
        bounds = r.significance_region["boundaries"]
        got = [frame.loc[bid, f"boundary_{i + 1}"] for i in range(len(bounds))]
        assert got == bounds and all(isinstance(b, float) for b in got)


def test_posterior_rows_show_posterior_sd_and_bounded_probability(demo: object) -> None:
    from robustmod.comparison_tables import product_term_table

    r = demo.results["hc3"]
    post = dataclasses.replace(r, id="post", kind="posterior",
                               interaction={**r.interaction, "p": None, "prob_positive": 1.0})
    fake = dataclasses.replace(demo, results={"post": post})
    t = product_term_table(fake)
    row = t.records()[0]
    assert isinstance(row["se"], NotApplicable) and row["posterior_sd"] == r.interaction["se"]
    assert isinstance(row["p"], NotApplicable)
    # Common practice, no source: a share of finitely many draws is never reported as exactly 1 or 0.
    assert format_cell(1.0, "prob") == "> 0.999" and format_cell(0.0, "prob") == "< 0.001"
    from robustmod.tables import render_text

    text = render_text(t)
    assert "posterior SD" in text and "> 0.999" in text and " SE " not in text.splitlines()[1]


def test_joint_test_has_statistic_and_df_columns(categorical: object) -> None:
    t = categorical.tables()[0]
    hc3 = next(r for r in t.records() if r["backend"] == "hc3")
    assert isinstance(hc3["ci_low"], NotApplicable)
    # Reference library: statsmodels' HC3 Wald F test of the three product terms.
    df = demo_data()
    df["site"] = np.array(["north", "south", "east", "west"])[np.arange(len(df)) % 4]
    ref = smf.ols("grain_yield ~ fertiliser * C(site)", data=df).fit(cov_type="HC3", use_t=True)
    names = [n for n in ref.params.index if ":" in n]
    R = np.zeros((len(names), len(ref.params)))
    for i, n in enumerate(names):
        R[i, list(ref.params.index).index(n)] = 1.0
    f = ref.f_test(R)
    assert hc3["statistic"] == pytest.approx(float(np.squeeze(f.fvalue)), rel=1e-8)
    assert hc3["df"] == len(names) and hc3["df_denominator"] == pytest.approx(f.df_denom)
    text = str(categorical)
    assert "statistic" in text and "Wald" in text


# ---- regions in words ------------------------------------------------------------------------
@pytest.mark.parametrize(("intervals", "bounds", "expected"), [
    ([[13.9, None]], [13.9], "significant where w > 13.9"),
    ([[2.58, 5.64]], [2.58, 5.64], "significant between 2.58 and 5.64"),
    ([[None, 2.1], [8.3, None]], [2.1, 8.3], "significant where w < 2.1 or > 8.3"),
    ([], [], "significant nowhere in the range searched"),
])
def test_region_words(intervals: list, bounds: list, expected: str) -> None:
    # Common practice, no source: a Johnson–Neyman region read as intervals of the moderator.
    region = {"moderator": "w", "significant_intervals": intervals, "boundaries": bounds, "observed_range": [0.0, 20.0]}
    assert region_words(region) == expected


def test_region_words_mark_extrapolation() -> None:
    region = {"moderator": "w", "significant_intervals": [[None, -72.3], [13.6, None]], "boundaries": [-72.3, 13.6],
              "observed_range": [10.0, 39.8]}
    words = region_words(region)
    assert words.startswith("significant where w > 13.6")
    assert f"w < {MINUS}72.3, outside the observed range 10 to 39.8 (extrapolation)" in words


def test_every_display_states_the_region_in_words(demo: object, appendix: Path) -> None:
    words = region_words(demo.results["hc3"].significance_region)
    assert words in str(demo)
    assert words in (appendix / "appendix.md").read_text().replace("`", "")
    assert latex_escape(words, breakable=True) in (appendix / "tables.tex").read_text()
    rows = list(csv.DictReader(io.StringIO((appendix / "comparison.csv").read_text())))
    assert {r["backend"]: r["region"] for r in rows}["hc3"] == words


# ---- the defects, one by one ----------------------------------------------------------------
def test_appendix_shows_the_variance_model_of_a_backend(appendix: Path, demo: object) -> None:
    html = (appendix / "appendix.html").read_text()
    md = (appendix / "appendix.md").read_text()
    label = demo.results["wls"].label
    for text in (html, md):
        assert "variance model" in text
    assert f"{label}: variance model" in md
    gamma = demo.results["wls"].extras["variance_model"]["gamma"]
    first = next(iter(gamma.values()))["estimate"]
    assert format_cell(first, "number", unicode_minus=True) in md


def test_no_display_module_names_a_backend() -> None:
    root = Path(__file__).resolve().parents[1] / "robustmod"
    ids = ("ols", "hc3", "wild", "wls", "bayes")
    for path in [root / "report" / "writers.py", root / "report" / "templates.py", root / "report" / "markdown.py",
                 root / "report" / "latex.py", root / "tables.py", root / "comparison_tables.py"]:
        code = "\n".join(ln for ln in path.read_text().splitlines() if not ln.lstrip().startswith(("#", '"', "``")))
        for bid in ids:
            assert not re.search(rf"""["']{bid}["']""", code), (path.name, bid)


def test_markdown_has_no_entities_or_backslash_clutter(appendix: Path) -> None:
    md = (appendix / "appendix.md").read_text()
    for bad in ("&lt;", "&gt;", "&amp;", "\\~", "\\*", "\\_", "\\[", "\\]"):
        assert bad not in md, bad
    assert f"`{DEMO_FORMULA}`" in md
    assert "King & Roberts" in md


def test_csv_numbers_are_numbers_and_only_text_is_guarded(appendix: Path, demo: object) -> None:
    text = (appendix / "comparison.csv").read_text()
    assert "'-" not in text and "'−" not in text
    rows = list(csv.DictReader(io.StringIO(text)))
    for r in rows:
        b = demo.results[r["backend"]].significance_region["boundaries"]
        assert [float(r[f"boundary_{i + 1}"]) for i in range(len(b))] == b
        assert float(r["ci_low"]) < float(r["ci_high"]) and float(r["se"]) > 0
    # Negative numbers stay numbers: the demo with its outcome negated has a negative product term.
    from robustmod.demo import demo_data
    from robustmod.report.writers import render_csv

    neg = demo_data().assign(grain_yield=lambda f: -f["grain_yield"])
    flipped = robustmod.compare(neg, "grain_yield ~ fertiliser * soil_moisture", "fertiliser", "soil_moisture",
                                backends=["hc3"])
    row = next(csv.DictReader(io.StringIO(render_csv(flipped))))
    assert float(row["estimate"]) < 0 and float(row["ci_low"]) < 0


def _overfull(tex_files: list[Path], tmp: Path) -> list[float]:
    if shutil.which("pdflatex") is None:
        if os.environ.get("CI"):
            pytest.fail("pdflatex is missing in CI; .ci/run must install texlive-latex-base")
        pytest.skip("pdflatex not installed (apt-get install texlive-latex-base texlive-latex-recommended)")
    body = "\n".join(f"\\input{{{p.as_posix()}}}\n\\clearpage" for p in tex_files)
    (tmp / "doc.tex").write_text("\\documentclass{article}\n\\usepackage[T1]{fontenc}\n\\usepackage{booktabs}\n"
                                 f"\\begin{{document}}\n{body}\n\\end{{document}}\n")
    proc = subprocess.run(["pdflatex", "-interaction=nonstopmode", "-halt-on-error", "doc.tex"], cwd=tmp,
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stdout[-3000:]
    log = (tmp / "doc.log").read_text(errors="replace")
    return [float(x) for x in re.findall(r"Overfull \\hbox \(([0-9.]+)pt too wide\)", log)]


def test_latex_tables_fit_an_article_text_block(appendix: Path, categorical: object, tmp_path: Path) -> None:
    df = demo_data().rename(columns={"fertiliser": LONG_FOCAL, "soil_moisture": LONG_MOD})
    long = compare(df, f"grain_yield ~ {LONG_FOCAL} * {LONG_MOD} + field_slope", LONG_FOCAL, LONG_MOD,
                   backends=["ols", "hc3", "wls"], calibration=10)
    long_dir = write_appendix(long, tmp_path / "long")
    cat_tex = tmp_path / "categorical.tex"
    cat_tex.write_text("\n".join(line for t in categorical.tables() for line in table_latex(t)))
    widths = _overfull([appendix / "tables.tex", long_dir / "tables.tex", cat_tex], tmp_path)
    # The pdflatex log of a plain article: nothing wider than the text block by more than 1 pt.
    assert [w for w in widths if w > 1.0] == []


def test_latex_uses_true_minus_signs(appendix: Path) -> None:
    tex = (appendix / "tables.tex").read_text()
    assert "$-$" in tex
    cells = [c for line in tex.splitlines() if line.endswith(r"\tabularnewline") for c in line.split(" & ")]
    assert not any(re.search(r"\\hspace\{0pt\}-[0-9]", c) for c in cells)


def test_calibration_note_is_one_consistent_paragraph(demo: object) -> None:
    from robustmod.calibrate import calibrate

    out = calibrate(demo.design, ["hc3", "bayes"], n_datasets=10, seed=1, include_costly=False)
    notes = " ".join(out["notes"])
    assert "calibrate_costly=True" in notes and "--calibrate-costly" in notes
    assert "include_costly" not in notes and "calibrated with 2 chains" not in notes
    text = str(demo)
    cal = next(t for t in demo.tables() if t.key == "calibration")
    assert all(not n.startswith("[") and "', '" not in n for n in cal.notes)  # sentences, not a list
    assert cal.notes[0] in text


def test_no_raw_keys_as_labels(appendix: Path, demo: object) -> None:
    html = (appendix / "appendix.html").read_text()
    md = (appendix / "appendix.md").read_text()
    shown = [str(demo), md, re.sub(r"<[^>]+>", " ", html)]
    for key in ("nominal_mc_se", "simulated_from", "target_accept", "n_draws", "mc_se"):
        for text in shown:
            assert key not in text, key


def test_slope_heading_uses_the_appendix_wording(demo: object, appendix: Path) -> None:
    heading = f"Slope of {DEMO_FOCAL} at chosen values of {DEMO_MODERATOR}"
    for text in (str(demo), demo._repr_html_(), (appendix / "appendix.html").read_text(),
                 (appendix / "appendix.md").read_text().replace("`", ""), (appendix / "tables.tex").read_text()):
        assert heading.replace("_", "\\_\\allowbreak{}") in text or heading in text
        assert "Conditional effect of" not in text and "at probe values" not in text


def test_every_shown_number_carries_level_scale_and_backend(demo: object) -> None:
    for t in demo.tables()[:3]:
        assert "backend" in t.keys and t.level == pytest.approx(0.95) and t.scale


def test_calibration_bounds() -> None:
    for bad in (9, 100_001):
        with pytest.raises(InputError, match="from 10 to 100,000"):
            compare(demo_data(), DEMO_FORMULA, DEMO_FOCAL, DEMO_MODERATOR, backends=["ols"], calibration=bad)


def test_figures_with_labels_have_legends(demo: object) -> None:
    for func in (F.slope_figure, F.data_figure, F.variance_figure, F.linearity_figure, F.calibration_figure):
        fig = func(demo)
        for ax in fig.axes:
            labelled = [h for h in ax.get_legend_handles_labels()[1] if not h.startswith("_")]
            if labelled:
                assert ax.get_legend() is not None or fig.legends, (func.__name__, labelled)


@pytest.mark.slow
def test_posterior_figures_with_labels_have_legends() -> None:
    # The rank plot labels every chain; its legend says which is which (a short sampler run suffices).
    bayes = compare(demo_data(), DEMO_FORMULA, DEMO_FOCAL, DEMO_MODERATOR, backends=["hc3", "bayes"],
                    options={"bayes": {"draws": 150, "tune": 150, "chains": 2, "cores": 1}})
    for func in (F.rank_figure,):
        fig = func(bayes)
        labelled = [lab for ax in fig.axes for lab in ax.get_legend_handles_labels()[1] if not lab.startswith("_")]
        assert labelled, func.__name__
        assert fig.legends or all(ax.get_legend() is not None for ax in fig.axes
                                  if ax.get_legend_handles_labels()[1]), func.__name__


def test_results_json_carries_the_tables_beside_the_contract(appendix: Path) -> None:
    import json

    res = json.loads((appendix / "results.json").read_text())
    tables = {t["key"]: t for t in res["tables"]}
    assert list(tables)[:3] == ["product_term", "slopes", "regions"]
    for row in tables["product_term"]["rows"]:
        assert row["estimate"] == res["backends"][row["backend"]]["interaction"]["estimate"]
    reasons = tables["product_term"]["not_applicable"]
    assert reasons and all(r["reason"] for r in reasons)  # e.g. no posterior SD for a Wald fit


def test_variance_diagnostics_are_typed_with_reasons() -> None:
    from robustmod.design import build_design
    from robustmod.diagnostics import VarianceDiagnostics, variance_diagnostics
    from robustmod.spec import ModelSpec

    df = demo_data()
    df["site"] = np.array(["north", "south"])[np.arange(len(df)) % 2]
    spec = ModelSpec(formula="grain_yield ~ fertiliser * C(site)", focal="fertiliser", moderators=("site",))
    diag = variance_diagnostics(build_design(df, spec))
    assert isinstance(diag, VarianceDiagnostics)
    # Goldfeld–Quandt needs a continuous moderator to sort by (Goldfeld & Quandt 1965): the reason is kept.
    assert isinstance(diag.goldfeld_quandt, NotApplicable) and diag.goldfeld_quandt.reason
    assert diag["goldfeld_quandt"] is None and diag.to_dict()["goldfeld_quandt"] is None
    tests = next(t for t in diag.tables() if t.key == "variance_tests")
    gq = next(r for r in tests.records() if r["test"] == "goldfeld_quandt")
    assert isinstance(gq["p"], NotApplicable)
