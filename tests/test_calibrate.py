"""Calibration: simulated false-positive rate and power of each back-end."""
from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import robustmod.calibrate as cal
from robustmod.backends.ols import OLSBackend
from robustmod.design import build_design
from robustmod.errors import InputError
from robustmod.spec import ModelSpec


def _hetero_design(n: int = 200, gamma: float = 0.6, seed: int = 7):
    """Invented data with a strong variance pattern: SD = exp(gamma·(x + w))."""
    rng = np.random.default_rng(seed)
    x, w = rng.normal(size=n), rng.normal(size=n)
    y = 1 + 0.5 * x + 0.5 * w + 0.2 * x * w + rng.normal(size=n) * np.exp(gamma * (x + w))
    return build_design(pd.DataFrame({"y": y, "x": x, "w": w}), ModelSpec(formula="y ~ x * w", focal="x", moderators=("w",)))


@pytest.fixture(scope="module")
def hetero():
    return _hetero_design()


def test_classical_ols_over_rejects_while_hc3_and_wild_hold_their_level(hetero):
    # Long & Ervin (2000, The American Statistician 54:217–224): under heteroscedasticity the
    # classical OLS t test over-rejects, HC3 (and a wild bootstrap) stay close to the nominal level.
    out = cal.calibrate(hetero, ["ols", "hc3", "wild"], n_datasets=1000, seed=20000, power=False)
    fp = out["false_positive_rate"]
    mc = math.sqrt(0.05 * 0.95 / 1000)  # Monte Carlo SE of a rate at the nominal level
    assert out["nominal_mc_se"] == pytest.approx(mc)
    assert fp["ols"]["rate"] > 0.05 + 3 * mc, fp
    assert abs(fp["hc3"]["rate"] - 0.05) <= 2 * mc, fp
    assert abs(fp["wild"]["rate"] - 0.05) <= 2 * mc, fp
    assert any("399 replications" in note for note in out["notes"])
    assert "wls" in out["simulated_from"]
    json.dumps(out.to_dict(), allow_nan=False)


def test_monte_carlo_se_and_power(hetero):
    out = cal.calibrate(hetero, ["ols", "hc3"], n_datasets=200, seed=3)
    for table in (out["false_positive_rate"], out["power"]):
        for v in table.values():
            # Binomial SE of a proportion (common practice, no source).
            assert v["mc_se"] == pytest.approx(math.sqrt(v["rate"] * (1 - v["rate"]) / v["n"]))
            assert v["n"] == 200 and v["failed"] == 0
    # The power run keeps the WLS estimate of the product term (here clearly non-zero).
    assert out["product_term_under_power"]["x:w"] != 0
    assert out["power"]["hc3"]["rate"] > out["false_positive_rate"]["hc3"]["rate"]


def test_same_seed_same_numbers_and_other_seed_other_numbers(hetero):
    a = cal.calibrate(hetero, ["ols", "hc3"], n_datasets=100, seed=5)
    b = cal.calibrate(hetero, ["ols", "hc3"], n_datasets=100, seed=5)
    c = cal.calibrate(hetero, ["ols", "hc3"], n_datasets=100, seed=6)
    assert a["false_positive_rate"] == b["false_positive_rate"] and a["power"] == b["power"]
    assert (a["false_positive_rate"], a["power"]) != (c["false_positive_rate"], c["power"])


def test_rates_do_not_depend_on_the_number_of_workers(hetero, monkeypatch):
    monkeypatch.setattr(cal, "PARALLEL_MIN_SECONDS", 0.0)  # make the pool start even for a small job
    ids = ["ols", "hc3", "wild", "wls"]
    one = cal.calibrate(hetero, ids, n_datasets=120, seed=9, workers=1)
    two = cal.calibrate(hetero, ids, n_datasets=120, seed=9, workers=2)
    assert one["workers"] == 1 and two["workers"] == 2
    assert one["false_positive_rate"] == two["false_positive_rate"]
    assert one["power"] == two["power"]


def test_batched_ols_and_hc3_decisions_match_statsmodels(hetero):
    rng = np.random.default_rng(1)
    Y = hetero.y[:, None] * 0.2 + rng.normal(size=(hetero.n_obs, 40)) * 2
    j = hetero.interaction_columns[0]
    for bid, cov in (("ols", "nonrobust"), ("hc3", "HC3")):
        got = OLSBackend(bid).reject_many(hetero, Y, 0.05)
        # Reference library: statsmodels OLS t test (t with n − k df) of the product term.
        ref = [sm.OLS(Y[:, d], hetero.X).fit(cov_type=cov, use_t=True).pvalues[j] < 0.05 for d in range(40)]
        np.testing.assert_array_equal(got, ref)
        assert 0 < got.sum() < 40  # the check sees both outcomes


def test_batched_joint_test_for_a_categorical_moderator_matches_statsmodels():
    rng = np.random.default_rng(4)
    n = 150
    df = pd.DataFrame({"x": rng.normal(size=n), "g": np.tile(["a", "b", "c"], n // 3)})
    df["y"] = df.x + rng.normal(size=n) * (1 + (df.g == "c"))
    d = build_design(df, ModelSpec(formula="y ~ x * C(g)", focal="x", moderators=("g",)))
    Y = d.y[:, None] + rng.normal(size=(n, 30)) * 2 + np.outer(df.x * (df.g == "b"), np.linspace(0, 1.5, 30))
    R = d.interaction_rows()
    for bid, cov in (("ols", "nonrobust"), ("hc3", "HC3")):
        got = OLSBackend(bid).reject_many(d, Y, 0.05)
        # Reference library: statsmodels f_test, F(q, n − k) with the same covariance.
        ref = [float(sm.OLS(Y[:, k], d.X).fit(cov_type=cov, use_t=True).f_test(R).pvalue) < 0.05 for k in range(30)]
        np.testing.assert_array_equal(got, ref)
        assert 0 < got.sum() < 30


class _NoBatch:
    """An OLS back-end seen without its batched path, to exercise the refit-per-dataset route."""

    def __init__(self, inner: OLSBackend) -> None:
        self.inner, self.id, self.label = inner, inner.id, inner.label

    def fit(self, design, *, seed, progress=False):
        return self.inner.fit(design, seed=seed, progress=progress)


def test_refit_route_agrees_with_the_batched_route(hetero):
    rng = np.random.default_rng(2)
    Y = rng.normal(size=(hetero.n_obs, 25)) + hetero.y[:, None] * 0.3
    for bid in ("ols", "hc3"):
        batched, f1 = cal._rejections(OLSBackend(bid), hetero, Y, 0.05, 1)
        refit, f2 = cal._rejections(_NoBatch(OLSBackend(bid)), hetero, Y, 0.05, 1)
        np.testing.assert_array_equal(batched, refit)
        assert f1 == f2 == 0


def test_falls_back_to_a_multiplicative_variance_model_without_wls(hetero, monkeypatch):
    real = cal.make_backend

    def no_wls(bid, **kw):
        if bid == "wls":
            raise InputError("Back-end 'wls' cannot be loaded (missing); reinstall robustmod with its dependencies.")
        return real(bid, **kw)

    monkeypatch.setattr(cal, "make_backend", no_wls)
    out = cal.calibrate(hetero, ["ols", "hc3"], n_datasets=300, seed=4, power=False)
    assert "Harvey" in out["simulated_from"]
    assert any("wls back-end could not supply" in note for note in out["notes"])
    fp = out["false_positive_rate"]
    assert fp["ols"]["rate"] > fp["hc3"]["rate"]


def test_a_back_end_that_cannot_fit_is_reported_not_counted():
    rng = np.random.default_rng(8)
    n = 80
    df = pd.DataFrame({"x": rng.normal(size=n), "w": rng.normal(size=n), "spike": np.eye(n)[0]})
    df["y"] = df.x * df.w + rng.normal(size=n)
    d = build_design(df, ModelSpec(formula="y ~ x * w + spike", focal="x", moderators=("w",)))
    out = cal.calibrate(d, ["hc0", "hc3"], n_datasets=20, seed=1)
    assert out["false_positive_rate"]["hc3"]["rate"] is None  # leverage 1 in data row 1
    assert "leverage 1" in out["unavailable"]["hc3"]
    assert out["false_positive_rate"]["hc0"]["rate"] is not None


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"n_datasets": 5}, "'n_datasets' option"),
        ({"n_datasets": 2.5}, "'n_datasets' option"),
        ({"workers": 0}, "'workers' option"),
        ({"seed": -1}, "'seed' option"),
        ({"alpha": 2.0}, "'alpha' option"),
    ],
)
def test_bad_options_give_input_errors(hetero, kwargs, match):
    args = {"n_datasets": 20, "seed": 1, **kwargs}
    with pytest.raises(InputError, match=match):
        cal.calibrate(hetero, ["ols"], **args)


def test_unknown_back_end_is_named(hetero):
    with pytest.raises(InputError, match="Unknown back-end 'hc9'"):
        cal.calibrate(hetero, ["hc9"], n_datasets=20, seed=1)


def test_inputs_are_not_modified(hetero):
    y0, X0 = hetero.y.copy(), hetero.X.copy()
    opts = {"hc3": {}}
    cal.calibrate(hetero, ["hc3", "wild"], n_datasets=20, seed=1, options=opts)
    np.testing.assert_array_equal(hetero.y, y0)
    np.testing.assert_array_equal(hetero.X, X0)
    assert opts == {"hc3": {}}
