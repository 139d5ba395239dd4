"""Contract tests run over every registry entry: a back-end that is registered is tested here for free.

The data are a small simulated moderation design with a known truth (invented for the test):
y = 1 + 0.5·x + 0.3·w + 0.4·x·w + ε with SD(ε) = exp(0.35·w), so the spread fans out with the
moderator. Facts checked are properties every answer must have whatever the back-end (an
interval contains its estimate, a simultaneous band is at least as wide as the pointwise
interval, a rescaled contrast has the same p-value, the order of the rows does not matter):
common practice, no source. The toy back-end (tests/toy_backend.py) is registered with one line
below and must pass everything the built-in ones pass.
"""
from __future__ import annotations

import functools
import subprocess
import sys
from typing import Any

import numpy as np
import pandas as pd
import pytest

from robustmod import ModelSpec, build_design
from robustmod.backends import registry
from robustmod.backends.base import Backend, Fit, Unavailable
from robustmod.backends.registry import BackendEntry, make_backend, register
from robustmod.errors import InputError
from robustmod.tables import Table

register(BackendEntry("jackknife", "toy_backend", "JackknifeBackend", "OLS, delete-one jackknife SE",
                      assumes_constant_variance=False, assumes_independent_rows=True, cost="cheap"))

IDS = registry.available_ids()
#: Small settings so the suite stays quick (options of the back-ends, not special test paths).
FAST: dict[str, dict[str, Any]] = {
    "wild": {"replications": 199},
    "bayes": {"draws": 150, "tune": 150, "chains": 2, "cores": 1},
}
SEED = 11
ALPHA = 0.05
SPEC = ModelSpec(formula="y ~ x * w", focal="x", moderators=("w",))
#: Back-ends that need cluster ids get the same rows in 20 invented clusters of 4 (column g).
CLUSTER_SPEC = ModelSpec(formula="y ~ x * w", focal="x", moderators=("w",), cluster="g")


def clustered(bid: str) -> bool:
    """Whether the back-end is meant for clustered rows (its entry says it does not assume independence)."""
    return not registry.entry(bid).assumes_independent_rows


def _cases(ids: list[str]) -> list[Any]:
    """One pytest case per id; the costly ones (a sampler) are marked slow."""
    return [pytest.param(b, marks=pytest.mark.slow) if registry.entry(b).costly else b for b in ids]


def simulated_frame(n: int = 80, seed: int = 3, beta3: float = 0.4) -> pd.DataFrame:
    """The invented known-truth design described in the module docstring."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n)
    w = rng.uniform(-2.0, 2.0, size=n)
    y = 1 + 0.5 * x + 0.3 * w + beta3 * x * w + np.exp(0.35 * w) * rng.normal(size=n)
    return pd.DataFrame({"y": y, "x": x, "w": w, "g": np.arange(n) % 20})


@functools.cache
def design(permuted: bool = False, clustered: bool = False) -> Any:
    df = simulated_frame()
    if permuted:
        df = df.iloc[np.random.default_rng(5).permutation(len(df))].reset_index(drop=True)
    return build_design(df, CLUSTER_SPEC if clustered else SPEC)


@functools.cache
def fitted(bid: str, permuted: bool = False) -> Fit:
    fit = make_backend(bid, **FAST.get(bid, {})).fit(design(permuted, clustered(bid)), seed=SEED)
    assert not isinstance(fit, Unavailable), fit.reason
    return fit


def slope_grid_rows() -> np.ndarray:
    d = design()
    return d.slope_rows_along("w", np.linspace(-2.0, 2.0, 9))


# ---- the declared facts -----------------------------------------------------------------------
@pytest.mark.parametrize("bid", IDS)
def test_entry_agrees_with_the_class(bid: str) -> None:
    e = registry.entry(bid)
    backend = make_backend(bid)
    assert isinstance(backend, Backend)
    assert backend.id == bid
    assert backend.label == e.label == registry.label(bid)
    assert backend.assumes_constant_variance == e.assumes_constant_variance
    assert backend.assumes_independent_rows == e.assumes_independent_rows
    assert backend.cost == e.cost and backend.costly == e.costly == type(backend).costly
    assert e.default == (bid in registry.DEFAULT_BACKENDS)
    assert registry.colour(bid).startswith("#") and len(registry.colour(bid)) == 7
    assert (bid in registry.constant_variance_ids()) == e.assumes_constant_variance
    assert (bid in registry.independent_rows_ids()) == e.assumes_independent_rows
    # Streaming is declared by the class and recorded in the entry (robustmod.stream reads only the entry).
    assert backend.streams == e.streams == (bid in registry.streaming_ids())
    assert type(backend).fit_stream is not Backend.fit_stream or not e.streams
    # The calibration constructs the back-end with these settings (robustmod.calibrate).
    make_backend(bid, **type(backend).calibration_options)
    for line in registry.option_help(bid):
        assert "\n" not in line and "(default " in line


def test_defaults_and_constants_keep_their_names() -> None:
    from robustmod import defaults

    assert registry.DEFAULT_BACKENDS == defaults.BACKENDS
    assert registry.CONSTANT_VARIANCE == frozenset({"ols"})
    assert registry.SIMULATION_BACKEND in registry.REGISTRY
    assert registry.check_ids(["HC3", "ols", "hc3"]) == ["hc3", "ols"]
    with pytest.raises(InputError, match="valid ids"):
        registry.entry("hc9")


def test_a_lookup_imports_no_back_end_module() -> None:
    code = ("import sys; from robustmod.backends import registry as r; "
            "r.entry('bayes'); r.label('bayes'); r.colour('bayes'); r.constant_variance_ids(); "
            "print('robustmod.backends.bayes' in sys.modules); r.option_help('bayes'); "
            "print('pymc' in sys.modules, 'pytensor' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, check=True)
    assert out.stdout.split() == ["False", "False", "False"]


# ---- the answers -------------------------------------------------------------------------------
@pytest.mark.parametrize("bid", _cases(IDS))
def test_shapes_and_intervals_contain_their_estimates(bid: str) -> None:
    fit = fitted(bid)
    d = design()
    L = slope_grid_rows()
    est = fit.estimate(L, ALPHA)
    for arr in (est.estimate, est.se, est.lower, est.upper):
        assert arr.shape == (L.shape[0],) and np.all(np.isfinite(arr))
    assert est.p is None or (est.p.shape == (L.shape[0],) and np.all((est.p >= 0) & (est.p <= 1)))
    assert est.level == pytest.approx(1 - ALPHA)
    assert np.all(est.lower <= est.estimate) and np.all(est.estimate <= est.upper)
    jt = fit.joint_test(d.interaction_rows(), ALPHA)
    assert jt.df_num == d.interaction_rows().shape[0]
    assert jt.p is None or 0 <= jt.p <= 1
    assert fit.coefficients(ALPHA).estimate.shape == (d.n_params,)
    assert fit.margin(L, ALPHA).shape == (L.shape[0],)


@pytest.mark.parametrize("bid", _cases(IDS))
def test_simultaneous_band_is_at_least_as_wide_as_the_pointwise_interval(bid: str) -> None:
    fit = fitted(bid)
    L = slope_grid_rows()
    point = fit.estimate(L, ALPHA)
    band = fit.estimate(L, ALPHA, simultaneous=True)
    assert np.all(band.upper - band.lower >= point.upper - point.lower - 1e-12)


@pytest.mark.parametrize("bid", _cases(IDS))
def test_same_seed_same_numbers(bid: str) -> None:
    again = make_backend(bid, **FAST.get(bid, {})).fit(design(clustered=clustered(bid)), seed=SEED)
    first = fitted(bid)
    L = slope_grid_rows()
    a, b = first.estimate(L, ALPHA), again.estimate(L, ALPHA)
    for x, y in ((a.estimate, b.estimate), (a.se, b.se), (a.lower, b.lower), (a.upper, b.upper)):
        np.testing.assert_array_equal(x, y)
    if a.p is not None:
        np.testing.assert_array_equal(a.p, b.p)


@pytest.mark.parametrize("bid", _cases(IDS))
def test_row_order_does_not_matter(bid: str) -> None:
    fit, perm = fitted(bid), fitted(bid, permuted=True)
    L = slope_grid_rows()
    a, b = fit.estimate(L, ALPHA), perm.estimate(L, ALPHA)
    if fit.kind == "posterior":
        # Posterior means differ only by Monte Carlo error of the sampler.
        assert np.all(np.abs(a.estimate - b.estimate) < 0.3 * a.se)
        return
    # Iterative fits (the ML of wls) agree to their convergence tolerance, far below one SE.
    tol = 1e-6 * a.se
    assert np.all(np.abs(a.estimate - b.estimate) <= tol) and np.all(np.abs(a.se - b.se) <= tol)
    if fit.kind == "wald":
        assert np.all(np.abs(a.lower - b.lower) <= 2 * tol) and np.all(np.abs(a.p - b.p) <= 1e-6)


@pytest.mark.parametrize("bid", _cases(IDS))
def test_p_value_of_a_contrast_does_not_depend_on_its_scale(bid: str) -> None:
    fit = fitted(bid)
    d = design()
    rows = np.vstack([d.interaction_rows(), slope_grid_rows()[[0, 4]]])
    base = fit.estimate(rows, ALPHA)
    joint = fit.joint_test(d.interaction_rows(), ALPHA)
    for c in (2.0, -1.0, 0.5):
        scaled = fit.estimate(c * rows, ALPHA)
        np.testing.assert_array_equal(scaled.significant, base.significant)
        if base.p is not None:
            np.testing.assert_allclose(scaled.p, base.p, rtol=1e-9, atol=1e-12)
        jt = fit.joint_test(c * d.interaction_rows(), ALPHA)
        assert jt.supported == joint.supported
        if joint.p is not None:
            assert jt.p == pytest.approx(joint.p, rel=1e-9, abs=1e-12)


# ---- the batched decision of the calibration -------------------------------------------------
N_DATASETS = 200


@functools.cache
def simulated_outcomes() -> np.ndarray:
    """n × 200 outcomes on the design's X: half with no product term, half with a product term of 0.3."""
    d = design()
    rng = np.random.default_rng(21)
    x, w = d.data.frame["x"].to_numpy(), d.data.frame["w"].to_numpy()
    beta3 = np.repeat([0.0, 0.3], N_DATASETS // 2)
    mu = 1 + 0.5 * x[:, None] + 0.3 * w[:, None] + beta3[None, :] * (x * w)[:, None]
    return mu + np.exp(0.35 * w)[:, None] * rng.normal(size=(d.n_obs, N_DATASETS))


@functools.cache
def designs_of_outcomes(clustered: bool = False) -> tuple[Any, ...]:
    frame = simulated_frame()  # every row is complete, so these are the design's rows
    Y = simulated_outcomes()
    spec = CLUSTER_SPEC if clustered else SPEC
    return tuple(build_design(frame.assign(y=Y[:, j]), spec) for j in range(Y.shape[1]))


BATCHED = [b for b in IDS if hasattr(registry.backend_class(b), "reject_many")]


@pytest.mark.parametrize("bid", _cases(BATCHED))
def test_batched_decision_equals_the_single_fit_decision(bid: str) -> None:
    backend = make_backend(bid, **FAST.get(bid, {}))
    d = design(clustered=clustered(bid))
    Y = simulated_outcomes()
    # The decision the user sees: the fit's own test of the product term (null imposed where the
    # back-end can impose it), asked for by name.
    single = np.array([backend.fit(dj, seed=SEED).test_coefficients(dj.interaction_columns, ALPHA).supported
                       for dj in designs_of_outcomes(clustered(bid))])
    if bid == "wild":
        # Dataset j of a batched call draws replicates j·B … (j+1)·B − 1 of the seed's stream, so the
        # decision a fit with the same seed makes is the batched decision of a one-column call.
        batched = np.concatenate([backend.reject_many(d, Y[:, [j]], ALPHA, seed=SEED) for j in range(Y.shape[1])])
    else:
        batched = np.asarray(backend.reject_many(d, Y, ALPHA, seed=SEED))
    assert batched.shape == (N_DATASETS,)
    assert 0 < single.sum() < N_DATASETS  # both decisions occur, so the comparison means something
    np.testing.assert_array_equal(batched, single)


# ---- report tables ------------------------------------------------------------------------------
@pytest.mark.parametrize("bid", _cases(IDS))
def test_report_tables_are_labelled_and_name_their_source(bid: str) -> None:
    for table in fitted(bid).report_tables():
        assert isinstance(table, Table)
        assert table.source == bid and table.key.startswith(f"{bid}.")
        assert table.rows, table.key
        for col in table.columns:
            assert "_" not in col.label and col.label[:1].isupper(), (table.key, col.label)


# ---- option validation, generated from each back-end's declarations ----------------------------
def _user_options(bid: str) -> list[Any]:
    e = registry.entry(bid)
    return [o for o in registry.backend_class(bid).options if o.name not in e.fixed]


def _one_line_input_error(bid: str, **options: Any) -> str:
    with pytest.raises(InputError) as err:
        make_backend(bid, **options)
    msg = str(err.value)
    assert "\n" not in msg and "Traceback" not in msg and "__init__" not in msg
    return msg


@pytest.mark.parametrize("bid", IDS)
def test_unknown_option_names_the_valid_ones_and_the_close_match(bid: str) -> None:
    opts = _user_options(bid)
    if not opts:
        msg = _one_line_input_error(bid, colour=1)
        assert f"back-end '{bid}' has no option 'colour'" in msg and "takes no options" in msg
        return
    name = opts[0].name
    msg = _one_line_input_error(bid, **{name[:-1] + name[-1] * 2 + "s": 1})
    assert f"did you mean '{name}'?" in msg
    assert all(o.name in msg for o in opts)


@pytest.mark.parametrize("bid", IDS)
def test_out_of_range_wrong_type_and_bad_choice_are_named(bid: str) -> None:
    for o in _user_options(bid):
        head = f"The '{o.name}' option of back-end '{bid}' must be"
        wrong = {"integer": "many", "number": "many", "flag": "yes", "text": 12, "names": 12, "path": 12}[o.type]
        assert head in _one_line_input_error(bid, **{o.name: wrong})
        if o.low is not None:
            assert head in _one_line_input_error(bid, **{o.name: o.low - 1 if o.type == "integer" else o.low - 0.5})
            if o.low_open:
                assert head in _one_line_input_error(bid, **{o.name: o.low})
        if o.high is not None:
            assert head in _one_line_input_error(bid, **{o.name: o.high + 1})
            if o.high_open:
                assert head in _one_line_input_error(bid, **{o.name: o.high})
        if o.choices is not None:
            assert head in _one_line_input_error(bid, **{o.name: "no-such-choice"})


@pytest.mark.parametrize("bid", IDS)
def test_choices_follow_their_case_rule(bid: str) -> None:
    for o in _user_options(bid):
        if o.choices is None:
            continue
        for choice in o.choices:
            shouted = choice.upper()
            if shouted == choice:
                continue
            if o.case == "insensitive":
                try:
                    backend = make_backend(bid, **{o.name: shouted})
                except InputError as exc:  # a rule across options may refuse this choice; not the case rule
                    assert f"'{o.name}' option" not in str(exc) or "with" in str(exc)
                    continue
                assert getattr(backend, o.name) == choice
            else:
                assert f"The '{o.name}' option of back-end '{bid}'" in _one_line_input_error(bid, **{o.name: shouted})


def test_the_messages_of_the_template() -> None:
    # The wording promised in the contributor guide and the error catalogue.
    assert _one_line_input_error("wild", replications=12) == (
        "The 'replications' option of back-end 'wild' must be a whole number in [99, 10^6]; got 12.")
    assert _one_line_input_error("wild", replicatons=999).endswith("did you mean 'replications'?")
    assert "set by the back-end id" in _one_line_input_error("hc3", id="hc0")
    backend = make_backend("wild", replications=999.0, weights="Mammen")
    assert backend.replications == 999 and isinstance(backend.replications, int) and backend.weights == "mammen"


def test_bayes_declares_the_sampler_and_prior_sensitivity() -> None:
    b = make_backend("bayes")
    assert b.sampler == "nutpie" and b.prior_sensitivity is False  # the default chosen in validation/README.md
    assert make_backend("bayes", sampler="NumPyro").sampler == "numpyro"
    assert "'sampler' option of back-end 'bayes'" in _one_line_input_error("bayes", sampler="stan")


def test_toy_jackknife_matches_a_refit_loop() -> None:
    # Reference: n delete-one refits with statsmodels OLS (a reference library) and the jackknife
    # covariance (n − 1)/n · Σ (β₍ᵢ₎ − β̄)(β₍ᵢ₎ − β̄)ᵀ of Efron & Stein (1981).
    sm = pytest.importorskip("statsmodels.api")
    d = design()
    X, y = d.X, d.y
    n = X.shape[0]
    keep = ~np.eye(n, dtype=bool)
    loo = np.array([sm.OLS(y[keep[i]], X[keep[i]]).fit().params for i in range(n)])
    dev = loo - loo.mean(axis=0)
    ref = (n - 1) / n * dev.T @ dev
    fit = fitted("jackknife")
    np.testing.assert_allclose(fit.cov, ref, rtol=1e-9, atol=1e-14)
    np.testing.assert_allclose(fit.params, sm.OLS(y, X).fit().params, rtol=1e-10)


# ---- contents of the back-ends' own tables ----------------------------------------------------
def _by_key(fit: Fit) -> dict[str, Table]:
    return {t.key: t for t in fit.report_tables()}


def test_wls_tables_show_the_variance_model_the_fit_computed() -> None:
    fit = fitted("wls")
    vm = fit.extras["variance_model"]
    tables = _by_key(fit)
    model = tables["wls.variance_model"].records()
    assert [r["term"] for r in model] == list(vm["gamma"])
    assert [r["estimate"] for r in model] == [g["estimate"] for g in vm["gamma"].values()]
    row = tables["wls.variance_fit"].records()[0]
    assert (row["lr_statistic"], row["lr_df"], row["lr_p"]) == (vm["lr_test"]["statistic"], vm["lr_test"]["df"],
                                                                vm["lr_test"]["p"])
    assert row["aic"] < row["aic_constant"]  # the known truth has a fanning spread
    assert row["converged"] is True and row["iterations"] > 0
    # The largest-to-smallest weight ratio, from the weights the fit used (closed form).
    assert row["weight_ratio"] == pytest.approx(fit.weights.max() / fit.weights.min(), rel=1e-12)


def test_wls_with_known_weights_has_no_variance_test() -> None:
    from robustmod.tables import NotApplicable

    frame = design().data.frame.assign(inv_var=lambda f: np.exp(-0.7 * f["w"]))
    d = build_design(frame[["y", "x", "w", "inv_var"]].reset_index(drop=True), SPEC)
    tables = _by_key(make_backend("wls", variance="known", weights="inv_var").fit(d, seed=0))
    assert "wls.variance_model" not in tables
    row = tables["wls.variance_fit"].records()[0]
    assert isinstance(row["lr_p"], NotApplicable) and isinstance(row["converged"], NotApplicable)


def test_wild_table_shows_its_settings() -> None:
    row = _by_key(fitted("wild"))["wild.settings"].records()[0]
    assert row == {"replications": 199, "weights": "Rademacher", "se": "HC3", "residual_transform": "e/√(1 − h)",
                   "enumerated": False, "null_imposed": True}


@pytest.mark.slow
def test_bayes_tables_include_loo_and_prior_sensitivity_when_run() -> None:
    fit = make_backend("bayes", **FAST["bayes"], prior_sensitivity=True).fit(design(), seed=SEED)
    tables = _by_key(fit)
    assert {"bayes.sampler", "bayes.convergence", "bayes.loo", "bayes.prior_sensitivity"} <= set(tables)
    assert tables["bayes.sampler"].records()[0]["draws"] == 150
    conv = tables["bayes.convergence"].records()[0]
    assert conv["max_rhat"] == fit.extras["diagnostics"]["max_rhat"]
    assert conv["verdict"] == ("reliable" if fit.reliable else "unreliable (see the warnings)")
    assert [r["model"] for r in tables["bayes.loo"].records()] == ["modelled variance", "constant variance"]
    factors = sorted({r["prior_sd_factor"] for r in tables["bayes.prior_sensitivity"].records()})
    assert factors == [0.5, 1.0, 2.0]
