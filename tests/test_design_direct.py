"""The direct build of the model matrix for plain numeric formulas against formulaic's own build."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from formulaic import model_matrix

from robustmod import ModelSpec, build_design
from robustmod.design import FORMULA_CONTEXT, _direct_model_matrices


def _frame(n: int = 300) -> pd.DataFrame:
    # Invented data (no truth needed: only the matrices are compared).
    rng = np.random.default_rng(5)
    return pd.DataFrame({
        "y": rng.normal(size=n), "x": rng.normal(size=n), "w": rng.uniform(0, 5, n), "a": rng.normal(size=n),
        "b": rng.normal(size=n), "k": rng.integers(0, 9, n), "p": rng.uniform(0.5, 3, n),
        "g": rng.choice(["lo", "mid", "hi"], n), "flag": rng.integers(0, 2, n).astype(bool),
    })


DIRECT = ["y ~ x * w + a", "y ~ x * w * a", "y ~ 0 + x * w", "y ~ x + w + x:w + a:b", "y ~ x * w + k",
          "y ~ w * x + a + b + a:b:x", "k ~ x * w"]
FALLBACK = ["y ~ x * C(g)", "y ~ x * w + g", "y ~ log(p) * w", "y ~ x * w + I(w**2)", "y ~ x * w + flag",
            "log(p) ~ x * w", "y ~ x * w + center(a)", "y ~ x * w + C(g)"]


@pytest.mark.parametrize("formula", DIRECT)
def test_direct_build_equals_formulaic(formula: str) -> None:
    df = _frame()
    got = _direct_model_matrices(ModelSpec(formula, "x", ("w",)), df)
    assert got is not None
    y, X, names, _ = got
    # Reference library: formulaic's model matrix of the same formula on all rows, exactly.
    mm = model_matrix(formula, df, context=FORMULA_CONTEXT)
    assert names == tuple(mm.rhs.columns)
    assert np.array_equal(X, np.asarray(mm.rhs, dtype=float))
    assert np.array_equal(y, np.asarray(mm.lhs, dtype=float)[:, 0])


@pytest.mark.parametrize("formula", FALLBACK)
def test_other_terms_fall_back_to_formulaic(formula: str) -> None:
    df = _frame()
    focal = "p" if "log(p)" in formula.split("~")[1] else "x"
    spec = ModelSpec(formula, focal, ("w",) if "w" in formula else ("g",))
    assert _direct_model_matrices(spec, df) is None
    d = build_design(df, spec)
    frame = d._frame
    # Reference library: formulaic's model matrix on the design's own model-scale frame.
    mm = model_matrix(formula, frame, context=FORMULA_CONTEXT)
    assert d.term_names == tuple(mm.rhs.columns)
    assert np.array_equal(d.X, np.asarray(mm.rhs, dtype=float))


@pytest.mark.parametrize("center", [False, True])
def test_design_of_a_plain_formula_equals_formulaic(center: bool) -> None:
    df = _frame()
    d = build_design(df, ModelSpec("y ~ x * w + a", "x", ("w",), center=center))
    # Reference library: formulaic on the model-scale (centred when asked) frame.
    mm = model_matrix("y ~ x * w + a", d._frame, context=FORMULA_CONTEXT)
    assert np.array_equal(d.X, np.asarray(mm.rhs, dtype=float))
    assert d.X.flags.c_contiguous
    assert d.centering == ({"x": pytest.approx(df.x.mean()), "w": pytest.approx(df.w.mean())} if center else {})
    assert d._frame is not df and df.equals(_frame())  # the user's frame is untouched


def test_a_non_finite_product_names_the_term_and_row() -> None:
    df = _frame()
    df.loc[7, ["a", "b", "p"]] = 1e149  # each below the overflow check, their product beyond float range
    from robustmod.errors import InputError

    with pytest.raises(InputError, match=r"'a:b:p' is not finite in data row 8"):
        build_design(df, ModelSpec("y ~ x * w + a:b:p", "x", ("w",)))


@pytest.mark.parametrize("center", [False, True])
def test_l_rows_of_a_plain_formula_equal_formulaic(center: bool) -> None:
    from robustmod.design import _focal_enters_linearly

    df = _frame()
    d = build_design(df, ModelSpec("y ~ x * w * a + b", "x", ("w",), center=center))
    assert d._products is not None
    points = [{"w": 0.5}, {"w": 2}, {"w": 4.25}]
    frame = d._points_frame(points)
    both = pd.concat([frame, frame], ignore_index=True)
    both["x"] = np.r_[np.zeros(3), np.ones(3)]
    # Reference library: formulaic's model matrix of the same L-row frame, through the design's own model spec.
    M = np.asarray(d._model_spec.get_model_matrix(both, context=FORMULA_CONTEXT), dtype=float)
    assert np.array_equal(d.slope_rows(points), M[3:] - M[:3])
    assert _focal_enters_linearly(d) and d.focal_linear
