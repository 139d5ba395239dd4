"""Bayesian location–scale regression sampled with NUTS in PyMC on the CPU.

Model (user's scale)::

    yᵢ ~ Normal(xᵢᵀβ, σᵢ)   (or Student-t with ν degrees of freedom and scale σᵢ)
    log σᵢ = zᵢᵀγ,          zᵢ = (1, focal, moderators) by default — the variance model of ``wls``

Sampling happens on an internally standardised scale (y and the non-constant columns of
X and Z centred and scaled to SD 1), where the priors are weakly informative
(docs/method-bayes.md). The mean model is optionally reparameterised through the thin QR
factor of the standardised columns (Stan User's Guide, "QR reparameterization"), with
the prior still placed on the standardised coefficients. Draws are mapped back to the
user's scale exactly: with x̃ⱼ = (xⱼ − cⱼ)/sⱼ and ỹ = (y − c_y)/s_y,
βⱼ = s_y b̃ⱼ / sⱼ (j ≠ 0) and β₀ = c_y + s_y b̃₀ − Σⱼ cⱼ βⱼ; likewise
γⱼ = g̃ⱼ / s_zⱼ and γ₀ = log s_y + g̃₀ − Σⱼ c_zⱼ γⱼ.

Prior scales and the switch between the heteroscedastic and the constant-variance model
are shared variables (``pm.Data``), so the prior-sensitivity refits and the
constant-variance refit used for PSIS-LOO reuse the NUTS step compiled for the first fit.
"""
from __future__ import annotations

import os
import sys
import time
import warnings as pywarnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING, Any

import numpy as np
from scipy import linalg, special

from ..defaults import BAYES_MAX_ROWS
from ..errors import InputError, option_error
from ..subsample import fit_on_subsample, fit_stream_rows, subsample_tables
from ..tables import format_number
from .base import Backend, Fit, Option, PosteriorFit, Unavailable, one_row_table
from .psis import psis_loo

if TYPE_CHECKING:  # pragma: no cover
    from ..design import Design
    from ..stream import StreamData
    from ..tables import Table

#: Vehtari, Gelman, Simpson, Carpenter & Bürkner (2021): rank-normalised R-hat and ESS thresholds.
RHAT_MAX = 1.01
ESS_MIN = 400
#: Prior SDs on the standardised scale, multiplied by ``prior_scale`` (see docs/method-bayes.md).
PRIOR_SD = {"intercept": 1.0, "slope": 2.5, "log_sigma_intercept": 1.0, "log_sigma_slope": 1.0, "cluster_sd": 1.0}
#: ν ~ Gamma(2, 0.1) for the Student-t likelihood (Juárez & Steel 2010).
NU_PRIOR = (2.0, 0.1)
#: σ² ~ Inverse-Gamma(a, b) in the conjugate constant-variance check model (standardised scale).
CONJUGATE_IG = (2.0, 1.0)
#: Prior-scale multipliers of the sensitivity refits.
SENSITIVITY_FACTORS = (0.5, 2.0)
#: Draws and tuning steps per chain of the auxiliary (warm) refits are capped at these; the
#: refits start from the first fit's last draws, step size and mass matrix.
AUX_DRAWS = 500
AUX_TUNE = 200
#: Sample the mean model through the QR factor of the standardised columns; keeps ESS per
#: second higher when the product term is collinear with its components (validation/bench_bayes.py).
USE_QR = True
#: Moderator bins of the posterior predictive check of the spread of y.
PPC_BINS = 5
PPC_DRAWS = 400

LIKELIHOODS = ("normal", "student")
#: NUTS implementations the back-end can sample with, and the default (validation/README.md).
SAMPLERS = ("pymc", "nutpie", "numpyro")
DEFAULT_SAMPLER = "nutpie"
SAMPLER_LABELS = {"pymc": "NUTS (PyMC)", "nutpie": "NUTS (nutpie, numba)", "numpyro": "NUTS (NumPyro, JAX)"}
MODELS = ("location-scale", "constant-conjugate")


# ---------------------------------------------------------------------------------------
# Standardisation
# ---------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Scaling:
    """x̃ = (x − center)/scale column by column; column ``intercept`` (if any) stays at 1."""

    center: np.ndarray
    scale: np.ndarray
    intercept: int | None

    def apply(self, A: np.ndarray) -> np.ndarray:
        return (A - self.center) / self.scale



def _quiet_import(name: str) -> Any:
    """Import PyMC/ArviZ lazily, without their import-time notices (BLAS linking advice, API
    refactor announcements) that would reach the user's terminal and say nothing about the fit."""
    import importlib  # noqa: PLC0415

    # PyTensor's advice on linking BLAS comes at the first compilation, long after the import;
    # this one message is filtered for the rest of the process (it concerns speed, never the numbers).
    pywarnings.filterwarnings("ignore", message="PyTensor could not link to a BLAS", category=UserWarning)
    with pywarnings.catch_warnings():
        pywarnings.simplefilter("ignore", UserWarning)
        pywarnings.simplefilter("ignore", FutureWarning)
        try:
            if name in LEAN_ARVIZ_FOR and "arviz" not in sys.modules:  # PyMC and nutpie import ArviZ too
                _import_arviz_lean()
            module = importlib.import_module(name)
            if name in LEAN_ARVIZ_FOR:
                from .bayes_compile import cache_arviz_jit  # noqa: PLC0415

                cache_arviz_jit()
            return module
        except ImportError:
            extra = "pip install 'robustmod[numpyro]'" if name in ("jax", "numpyro") else f"pip install {name}"
            raise InputError(f"The Bayesian back-end needs the package '{name}', which is not installed; "
                             f"install it ({extra}) or choose another sampler (--set bayes.sampler=pymc).") from None

#: Imports that bring in ArviZ, which is then imported first by :func:`_import_arviz_lean`.
LEAN_ARVIZ_FOR = frozenset({"arviz", "pymc", "nutpie"})
#: Modules ArviZ imports only to copy their docstrings into its plotting wrappers.
_DOCSTRING_ONLY = ("bokeh.plotting", "bokeh.models")


def _import_arviz_lean() -> None:
    """Import ArviZ without two costs of its import that no fit uses (about 0.4 s of every run).

    ArviZ copies docstrings from Bokeh's plotting modules into its own wrappers (importing all of
    Bokeh), and compiles one numba ufunc for its ECDF bands eagerly. During this import those Bokeh
    modules count as absent (ArviZ's wrappers then say the docstring could not be copied), and
    ``numba.vectorize`` compiles on first call instead (the same function, compiled when an ECDF
    band is first drawn). Both are restored at once; nothing is changed for anything imported later.
    """
    import importlib  # noqa: PLC0415

    blocked = [m for m in _DOCSTRING_ONLY if m not in sys.modules]
    for m in blocked:
        sys.modules[m] = None  # type: ignore[assignment]  # import of m raises ImportError
    try:
        numba: Any = importlib.import_module("numba")
    except ImportError:
        numba = None
    eager = numba.vectorize if numba is not None else None

    def lazy(*args: Any, **kwargs: Any) -> Any:
        if args and not callable(args[0]):  # drop the signatures: compile on first call
            args = args[1:]
        kwargs.pop("signatures", None)
        return eager(*args, **kwargs)  # type: ignore[misc]

    try:
        if numba is not None:
            numba.vectorize = lazy
        importlib.import_module("arviz")
    finally:
        if numba is not None:
            numba.vectorize = eager
        for m in blocked:
            if sys.modules.get(m, 0) is None:
                del sys.modules[m]


def column_scaling(A: np.ndarray) -> Scaling:
    """Centre and scale every non-constant column when A has a column of ones; scale only otherwise."""
    A = np.asarray(A, dtype=float)
    ones = np.flatnonzero(np.all(A == 1.0, axis=0))
    intercept = int(ones[0]) if ones.size else None
    sd = A.std(axis=0, ddof=1) if A.shape[0] > 1 else np.ones(A.shape[1])
    center = A.mean(axis=0) if intercept is not None else np.zeros(A.shape[1])
    scale = np.where(sd > 0, sd, np.where(np.abs(A).max(axis=0) > 0, np.abs(A).max(axis=0), 1.0))
    if intercept is not None:
        center[intercept], scale[intercept] = 0.0, 1.0
    return Scaling(center, scale, intercept)


def coefficients_to_user(draws: np.ndarray, cols: Scaling, y_center: float, y_scale: float) -> np.ndarray:
    """β of the raw columns from standardised-scale mean coefficients b̃ (S × k), exactly.

    βⱼ = s_y b̃ⱼ / sⱼ, β₀ = c_y + s_y b̃₀ − Σ_{j≠0} cⱼ βⱼ (no centring without an intercept).
    """
    beta = y_scale * draws / cols.scale
    if cols.intercept is not None:
        i = cols.intercept
        beta[:, i] = y_center + y_scale * draws[:, i] - beta @ cols.center
    return beta


def log_scale_to_user(draws: np.ndarray, cols: Scaling, y_scale: float) -> np.ndarray:
    """γ of log σ on the raw columns from standardised-scale g̃: γⱼ = g̃ⱼ/s_zⱼ, γ₀ = log s_y + g̃₀ − Σ c_zⱼ γⱼ."""
    gamma = draws / cols.scale
    i = cols.intercept if cols.intercept is not None else 0
    gamma[:, i] = np.log(y_scale) + draws[:, i] - gamma @ cols.center
    return gamma


# ---------------------------------------------------------------------------------------
# The model
# ---------------------------------------------------------------------------------------
@dataclass
class CompiledModel:
    """A PyMC model on the standardised scale plus the NUTS step compiled for it.

    The design columns and the outcome are shared variables; ``data`` holds this dataset's values,
    set before every sampling run, so one compiled model (PyMC's step, nutpie's compiled
    functions) serves every dataset of the same shape (see ``compiled_model``).
    """

    model: Any
    qr: bool
    free_names: tuple[str, ...]
    mean_names: tuple[str, ...]  # posterior variables giving b̃ (intercept, slopes)
    log_sigma_names: tuple[str, ...]
    data: dict[str, np.ndarray] = field(default_factory=dict)
    target_accept: float = 0.9
    compiled: dict[str, Any] = field(default_factory=dict)  # per sampler: what it compiled, made on first use

    @property
    def step(self) -> Any:
        """PyMC's NUTS step (compiled on first use; other samplers never need it)."""
        if "pymc" not in self.compiled:
            pm = _quiet_import("pymc")
            with self.model:
                step = pm.NUTS(target_accept=self.target_accept)
            self.compiled["pymc"] = (step, (step.potential, step.step_adapt))
        return self.compiled["pymc"][0]

    @property
    def cold(self) -> tuple[Any, Any]:
        """The step's fresh potential and step-size adaptation."""
        _ = self.step
        return self.compiled["pymc"][1]

    def warm_start(self, previous: Any) -> None:
        """Start adaptation from ``previous``: its posterior variances (on the sampler's unconstrained
        scale) as the mass matrix and its mean final step size."""
        from pymc.step_methods.hmc.quadpotential import QuadPotentialDiagAdapt  # noqa: PLC0415
        from pymc.step_methods.step_sizes import DualAverageAdaptation  # noqa: PLC0415

        means, variances = [], []
        for value in self.step.vars:
            rv = self.model.values_to_rvs[value]
            a = np.asarray(previous.posterior[rv.name].values, dtype=float)
            if self.model.rvs_to_transforms.get(rv) is not None:  # only log transforms occur here
                a = np.log(a)
            a = a.reshape(a.shape[0] * a.shape[1], -1)
            means.append(a.mean(axis=0))
            variances.append(np.maximum(a.var(axis=0), 1e-8))
        mean, var = np.concatenate(means), np.concatenate(variances)
        step0 = float(np.mean(previous.sample_stats["step_size"].values))
        old = self.cold[1]
        self._use(QuadPotentialDiagAdapt(mean.size, mean, var, 100),
                  DualAverageAdaptation(step0, old._target, old._gamma, old._k, old._t0))

    def cold_start(self) -> None:
        self._use(*self.cold)

    def _use(self, potential: Any, step_adapt: Any) -> None:
        from pymc.step_methods.hmc.integration import CpuLeapfrogIntegrator  # noqa: PLC0415

        # Parallel chains run copies of the step without resetting it, so reset here; the
        # integrator holds its own reference to the potential.
        potential.reset()
        step_adapt.reset()
        self.step.potential, self.step.step_adapt = potential, step_adapt
        self.step.integrator = CpuLeapfrogIntegrator(potential, self.step._logp_dlogp_func)


def build_model(  # noqa: PLR0912, PLR0915 - one PyMC model block per likelihood and model; a split is open work
        Xs: np.ndarray, ys: np.ndarray, Zs: np.ndarray, *, likelihood: str = "normal",
        model: str = "location-scale", qr: bool = USE_QR, target_accept: float = 0.9,
        codes: np.ndarray | None = None) -> CompiledModel:
    """PyMC model on standardised data; column 0 of Xs and Zs is the intercept (all ones).

    With cluster ``codes`` (0 … G − 1 per row) the location gets cluster intercepts, non-centred:
    μᵢ += τ·u_g, u_g ~ N(0, 1), τ ~ half-normal(1) on the standardised scale (× prior_scale).

    Priors (standardised scale, × prior_scale): b̃₀ ~ N(0, 1), b̃ⱼ ~ N(0, 2.5), g̃₀ ~ N(0, 1),
    g̃ⱼ ~ N(0, 1), ν ~ Gamma(2, 0.1). ``model="constant-conjugate"`` instead uses σ constant,
    σ² ~ Inv-Gamma(2, 1) and b̃ | σ ~ N(0, σ²·diag(1, 2.5², …)), the normal–inverse-gamma
    prior with a closed-form posterior (Gelman et al. 2013, BDA3 §14.8).
    """
    pm = _quiet_import("pymc")
    import pytensor.tensor as pt  # noqa: PLC0415

    n, k = Xs.shape
    qr = bool(qr and k > 1)
    values = design_data(Xs, ys, Zs, qr=qr, codes=codes)
    with pm.Model() as m:
        prior_scale = pm.Data("prior_scale", 1.0)
        variance_on = pm.Data("variance_on", 1.0)
        if model == "constant-conjugate":
            sigma2 = pm.InverseGamma("sigma2", alpha=CONJUGATE_IG[0], beta=CONJUGATE_IG[1] * prior_scale**2)
            unit = pt.sqrt(sigma2)
        else:
            unit = 1.0
        b0 = pm.Normal("b_intercept", 0.0, PRIOR_SD["intercept"] * prior_scale * unit)
        slope_sd = PRIOR_SD["slope"] * prior_scale * unit
        if k > 1:
            x_cols = pm.Data("x_cols", values["x_cols"])
        if qr:
            theta = pm.Flat("theta", shape=k - 1)
            b = pm.Deterministic("b_slopes", pt.dot(pm.Data("r_inv", values["r_inv"]), theta))
            # Flat θ with the normal log-density of b = R*⁻¹θ keeps the stated prior on b (linear map,
            # constant Jacobian).
            pm.Potential("b_prior", pm.logp(pm.Normal.dist(0.0, slope_sd), b).sum())
            mu = b0 + pt.dot(x_cols, theta)
        elif k > 1:
            b = pm.Normal("b_slopes", 0.0, slope_sd, shape=k - 1)
            mu = b0 + pt.dot(x_cols, b)
        else:
            mu = b0 + pt.zeros(n)
        if codes is not None:
            tau = pm.HalfNormal("cluster_sd", PRIOR_SD["cluster_sd"] * prior_scale)
            u = pm.Normal("cluster_z", 0.0, 1.0, shape=int(codes.max()) + 1)
            mu = mu + tau * u[pm.Data("cluster_codes", values["cluster_codes"])]
        if model == "constant-conjugate":
            sigma = unit
            ls_names: tuple[str, ...] = ("sigma2",)
        else:
            g0 = pm.Normal("g_intercept", 0.0, PRIOR_SD["log_sigma_intercept"] * prior_scale)
            if Zs.shape[1] > 1:
                g = pm.Normal("g_slopes", 0.0, PRIOR_SD["log_sigma_slope"] * prior_scale, shape=Zs.shape[1] - 1)
                log_sigma = g0 + variance_on * pt.dot(pm.Data("z_cols", values["z_cols"]), g)
                ls_names = ("g_intercept", "g_slopes")
            else:
                values.pop("z_cols")
                log_sigma = g0 + pt.zeros(n)
                ls_names = ("g_intercept",)
            sigma = pt.exp(log_sigma)
        y_obs = pm.Data("y_obs", values["y_obs"])
        if likelihood == "student":
            nu = pm.Gamma("nu", alpha=NU_PRIOR[0], beta=NU_PRIOR[1])
            pm.StudentT("y", nu=nu, mu=mu, sigma=sigma, observed=y_obs)
        else:
            pm.Normal("y", mu=mu, sigma=sigma, observed=y_obs)
    if model == "constant-conjugate":
        values.pop("z_cols", None)
    free = tuple(v.name for v in m.free_RVs)
    mean_names = ("b_intercept",) + (("b_slopes",) if k > 1 else ())
    return CompiledModel(m, qr, free, mean_names, ls_names, data=values, target_accept=float(target_accept))


def design_data(Xs: np.ndarray, ys: np.ndarray, Zs: np.ndarray, *, qr: bool,
                codes: np.ndarray | None = None) -> dict[str, np.ndarray]:
    """Values of the model's shared variables for one dataset (standardised; column 0 the intercept).

    With ``qr``: X̃₁ = Q R (thin QR, diagonal of R positive), Q* = Q √(n−1), R* = R / √(n−1),
    ``x_cols`` = Q* and ``r_inv`` = R*⁻¹ (by triangular solve); otherwise ``x_cols`` = X̃₁.
    """
    n, k = Xs.shape
    out = {"y_obs": np.asarray(ys, dtype=float), "z_cols": np.ascontiguousarray(Zs[:, 1:], dtype=float)}
    if codes is not None:
        out["cluster_codes"] = np.asarray(codes, dtype=np.int64)
    if k == 1:
        return out
    X1 = np.asarray(Xs[:, 1:], dtype=float)
    if not qr:
        return {**out, "x_cols": np.ascontiguousarray(X1)}
    Q, R = np.linalg.qr(X1, mode="reduced")
    sign = np.sign(np.diag(R))
    sign[sign == 0] = 1.0
    Q, R = Q * sign, R * sign[:, None]
    root = np.sqrt(n - 1.0)
    Rs_inv = linalg.solve_triangular(R / root, np.eye(k - 1))
    return {**out, "x_cols": np.ascontiguousarray(Q * root), "r_inv": Rs_inv}


#: Compiled models by (n, k, p, likelihood, model, qr, target_accept); the most recent few are kept.
_MODEL_CACHE: dict[tuple[Any, ...], CompiledModel] = {}
MODEL_CACHE_SIZE = 4


def compiled_model(Xs: np.ndarray, ys: np.ndarray, Zs: np.ndarray, *, likelihood: str = "normal",
                   model: str = "location-scale", qr: bool = USE_QR, target_accept: float = 0.9,
                   codes: np.ndarray | None = None) -> CompiledModel:
    """``build_model``, reusing a model compiled for an earlier dataset of the same shape and settings:
    only the shared variables change (PyMC's NUTS step and nutpie's compiled functions are kept)."""
    n_clusters = 0 if codes is None else int(codes.max()) + 1
    key = (Xs.shape, Zs.shape[1], likelihood, model, bool(qr and Xs.shape[1] > 1), float(target_accept), n_clusters)
    hit = _MODEL_CACHE.pop(key, None)
    if hit is None:
        hit = build_model(Xs, ys, Zs, likelihood=likelihood, model=model, qr=qr, target_accept=target_accept,
                          codes=codes)
    _MODEL_CACHE[key] = hit  # most recently used last
    while len(_MODEL_CACHE) > MODEL_CACHE_SIZE:
        _MODEL_CACHE.pop(next(iter(_MODEL_CACHE)))
    values = design_data(Xs, ys, Zs, qr=hit.qr, codes=codes)
    # The copy shares the compiled parts but carries this dataset's values.
    return replace(hit, data={name: values[name] for name in hit.data})


def _stack(idata: Any, names: Sequence[str]) -> np.ndarray:
    """Posterior variables as one (chain·draw) × p matrix, in the order given."""
    post = idata.posterior
    parts = []
    for name in names:
        a = post[name].values
        parts.append(a.reshape(a.shape[0] * a.shape[1], -1))
    return np.concatenate(parts, axis=1)


def _initial_points(cm: CompiledModel, chains: int, rng: np.random.Generator,
                    previous: Any = None) -> list[dict[str, np.ndarray]]:
    """Start values per chain: the last draws of ``previous`` (warm refit) or jittered defaults."""
    ip = cm.model.initial_point()
    out = []
    for c in range(chains):
        pt: dict[str, np.ndarray] = {}
        for rv in cm.model.free_RVs:
            if previous is not None and rv.name in previous.posterior:
                arr = previous.posterior[rv.name].values
                pt[rv.name] = np.asarray(arr[c % arr.shape[0], -1])
                continue
            key = next(k for k in ip if k == rv.name or k.startswith(rv.name + "_"))
            base = np.asarray(ip[key], dtype=float)
            jitter = rng.uniform(-1.0, 1.0, size=base.shape)
            if key != rv.name:  # a log-transformed positive parameter: jitter on the log scale
                pt[rv.name] = np.exp(base + jitter)
            else:
                pt[rv.name] = base + jitter
        out.append(pt)
    return out


def run_sampler(cm: CompiledModel, *, draws: int, tune: int, chains: int, cores: int, seed: int,
                progress: bool, prior_scale: float = 1.0, variance_on: float = 1.0, previous: Any = None,
                y: np.ndarray | None = None, sampler: str = "pymc") -> Any:
    """NUTS on the compiled model; shared-variable values (this dataset, prior scale, variance switch,
    optionally a new standardised outcome of the same length) set first, nothing recompiled.

    ``sampler``: "pymc" (PyMC's NUTS with the model's compiled step; a warm start from ``previous``),
    "nutpie" (nutpie's NUTS on functions compiled once per model with numba) or "numpyro" (through
    ``pm.sample(nuts_sampler="numpyro")``, which compiles with JAX at every call).
    """
    pm = _quiet_import("pymc")

    values: dict[str, Any] = {**cm.data, "prior_scale": float(prior_scale), "variance_on": float(variance_on)}
    if y is not None:
        values["y_obs"] = np.asarray(y, dtype=float)
    # Early tuning steps may overflow exp(log σ); the sampler rejects them. Those numpy warnings
    # (in this process and in forked chain processes) say nothing the diagnostics do not.
    with pywarnings.catch_warnings(), np.errstate(all="ignore"):
        pywarnings.simplefilter("ignore", RuntimeWarning)
        if sampler == "nutpie":
            return _sample_nutpie(cm, values, draws, tune, chains, cores, seed, progress)
        rng = np.random.default_rng(seed)
        with cm.model:
            pm.set_data(values)
        if sampler == "numpyro":
            return _sample_numpyro(pm, cm, draws, tune, chains, seed, progress, rng)
        if previous is None:
            cm.cold_start()
        else:
            cm.warm_start(previous)
        return _sample(pm, cm, draws, tune, chains, cores, seed, progress, rng, previous)


def _sample(pm: Any, cm: CompiledModel, draws: int, tune: int, chains: int, cores: int, seed: int,
            progress: bool, rng: np.random.Generator, previous: Any) -> Any:
    with cm.model:
        return pm.sample(draws=draws, tune=tune, chains=chains, cores=cores, step=cm.step,
                         initvals=_initial_points(cm, chains, rng, previous), random_seed=int(seed),
                         progressbar=progress, quiet=not progress, compute_convergence_checks=False,
                         return_inferencedata=True)


def _sample_nutpie(cm: CompiledModel, values: dict[str, Any], draws: int, tune: int, chains: int, cores: int,
                   seed: int, progress: bool) -> Any:
    nutpie = _quiet_import("nutpie")
    if "nutpie" not in cm.compiled:  # numba compilation (or its on-disk cache), once per model in this process
        from .bayes_compile import compile_pymc_model  # noqa: PLC0415

        cm.compiled["nutpie"] = compile_pymc_model(cm.model)
    compiled = cm.compiled["nutpie"]
    # Shared variables the graph does not use (the variance switch of the conjugate model) are not nutpie's.
    model = compiled.with_data(**{k: v for k, v in values.items() if k in compiled.shared_data})
    return nutpie.sample(model, draws=draws, tune=tune, chains=chains, cores=cores, seed=int(seed),
                         save_warmup=False, progress_bar=progress, target_accept=cm.target_accept)


def _sample_numpyro(pm: Any, cm: CompiledModel, draws: int, tune: int, chains: int, seed: int, progress: bool,
                    rng: np.random.Generator) -> Any:
    # One XLA device on the CPU unless the process set more before importing JAX: chains then run
    # vectorised in one program rather than one after another.
    jax = _quiet_import("jax")
    method = "parallel" if jax.local_device_count() >= chains else "vectorized"
    with cm.model:
        return pm.sample(draws=draws, tune=tune, chains=chains, nuts_sampler="numpyro", target_accept=cm.target_accept,
                         initvals=_initial_points(cm, chains, rng), random_seed=int(seed), progressbar=progress,
                         quiet=not progress, compute_convergence_checks=False, return_inferencedata=True,
                         nuts_sampler_kwargs={"chain_method": method})


# ---------------------------------------------------------------------------------------
# The back-end
# ---------------------------------------------------------------------------------------
class BayesFit(PosteriorFit):
    """Posterior draws of β on the user's scale, plus the location–scale extras.

    ``idata`` holds the posterior (sampled variables on the standardised scale and ``beta``,
    ``gamma`` on the user's scale), sample stats and the pointwise log-likelihood;
    ``gamma_draws`` the draws of the log-σ coefficients; ``sigma_hat`` the posterior mean of
    σᵢ per design row.
    """

    def __init__(self, backend_id: str, label: str, term_names: tuple[str, ...], draws: np.ndarray, *,
                 idata: Any, gamma_draws: np.ndarray, gamma_names: tuple[str, ...], sigma_hat: np.ndarray,
                 **kwargs: Any) -> None:
        super().__init__(backend_id, label, term_names, draws, **kwargs)
        self.idata = idata
        self.gamma_draws = np.asarray(gamma_draws, dtype=float)
        self.gamma_draws.setflags(write=False)
        self.gamma_names = tuple(gamma_names)
        self.sigma_hat = np.asarray(sigma_hat, dtype=float)
        self.sigma_hat.setflags(write=False)


    def report_tables(self) -> tuple[Table, ...]:
        """Sampler settings, convergence and the reliability verdict, PSIS-LOO against constant variance,
        and the prior sensitivity when it was run — all from the fit's extras."""
        ex = self.extras
        src = self.backend_id
        st = ex.get("sampler") or {}
        settings = [
            ("sampler", "Sampler", "text", st.get("sampler")), ("chains", "Chains", "integer", st.get("chains")),
            ("draws", "Draws per chain", "integer", st.get("draws")),
            ("tune", "Tuning steps per chain", "integer", st.get("tune")),
            ("target_accept", "Target acceptance rate", "number", st.get("target_accept")),
            ("likelihood", "Likelihood", "text", st.get("likelihood")), ("model", "Model", "text", st.get("model")),
            ("prior_scale", "Prior SD multiplier", "number", st.get("prior_scale")),
            ("qr", "QR reparameterisation", "flag", st.get("qr_reparameterisation")),
        ]
        tables = [*subsample_tables(ex, src), one_row_table(f"{src}.sampler", "Sampler settings", src, settings)]
        dg = ex.get("diagnostics") or {}
        th = dg.get("thresholds") or {}
        verdict = "reliable" if self.reliable else "unreliable (see the warnings)"
        conv = [
            ("max_rhat", "Largest R-hat", "number", dg.get("max_rhat")),
            ("min_ess_bulk", "Smallest bulk ESS", "number", dg.get("min_ess_bulk")),
            ("min_ess_tail", "Smallest tail ESS", "number", dg.get("min_ess_tail")),
            ("divergences", "Divergent transitions", "integer", dg.get("divergences")),
            ("verdict", "Verdict", "text", verdict),
        ]
        notes = [(f"Reliable means R-hat at most {th.get('rhat_max', RHAT_MAX)}, bulk and tail ESS at least "
                  f"{th.get('ess_min', ESS_MIN)} and no divergent transitions (Vehtari et al. 2021).")]
        tables.append(one_row_table(f"{src}.convergence", "Convergence of the sampler", src, conv, notes))
        if isinstance(ex.get("cluster_intercepts"), Mapping):
            tables.append(_cluster_table(ex, src))
        if isinstance(ex.get("loo"), Mapping):
            tables.append(_loo_table(ex["loo"], src))
        if isinstance(ex.get("prior_sensitivity"), Mapping):
            tables.append(_sensitivity_table(ex["prior_sensitivity"], src))
        return tuple(tables)


def _cluster_table(ex: Mapping[str, Any], src: str) -> Table:
    """Posterior of the cluster-intercept SD and of the residual-scale ICC, from ``extras['cluster_intercepts']``."""
    from ..tables import Column, make_table  # noqa: PLC0415

    ci = ex["cluster_intercepts"]
    rows = [(label, ci[key]["mean"], ci[key]["sd"], ci[key]["ci"][0], ci[key]["ci"][1])
            for key, label in (("intercept_sd", "SD of the cluster intercepts"),
                               ("icc", "intra-class correlation (residual scale)"))]
    level = ci["icc"]["level"]
    cols = [Column("quantity", "Quantity", "text"), Column("mean", "Posterior mean"), Column("sd", "Posterior SD"),
            Column("ci_low", f"{100 * level:g}% interval", pair="ci_high", level=level),
            Column("ci_high", "to", level=level)]
    notes = [f"{ex.get('n_clusters')} clusters of {ex.get('cluster')!r}; ICC = τ² / (τ² + mean σᵢ²) per draw, "
             "τ the intercept SD and σᵢ each row's residual SD; the intercepts are non-centred with a "
             "half-normal prior on τ."]
    return make_table(f"{src}.clusters", "Cluster intercepts", cols, rows, notes=notes, source=src, level=level)


def _loo_table(loo: Mapping[str, Any], src: str) -> Table:
    """PSIS-LOO of the modelled-variance and the constant-variance model, from ``extras['loo']``."""
    from ..tables import Column, make_table  # noqa: PLC0415

    names = {"heteroscedastic": "modelled variance", "constant_variance": "constant variance"}
    rows = [(names[k], loo[k]["elpd_loo"], loo[k]["se"], loo[k]["p_loo"], loo[k]["pareto_k_above_0.7"])
            for k in names if isinstance(loo.get(k), Mapping)]
    cols = [Column("model", "Variance model", "text"), Column("elpd_loo", "ELPD (PSIS-LOO)"), Column("se", "SE"),
            Column("p_loo", "Effective parameters"), Column("high_pareto_k", "Rows with Pareto k > 0.7", "integer")]
    notes = [(f"Difference in ELPD (modelled − constant variance): {format_number(loo.get('elpd_difference'))} "
              f"(SE {format_number(loo.get('elpd_difference_se'))}); preferred: "
              f"{names.get(str(loo.get('preferred')), loo.get('preferred'))} (Vehtari, Gelman & Gabry 2017).")]
    return make_table(f"{src}.loo", "Modelled against constant variance (PSIS-LOO)", cols, rows, notes=notes,
                      source=src)


def _sensitivity_table(ps: Mapping[str, Any], src: str) -> Table:
    """The product-term posterior at each prior-SD multiplier, from ``extras['prior_sensitivity']``."""
    from ..tables import Column, make_table  # noqa: PLC0415

    rows = []
    for factor, terms in sorted(ps["product_term"].items(), key=lambda kv: float(kv[0])):
        for term, v in terms.items():
            rows.append((float(factor), term, v["mean"], v["sd"], v["ci"][0], v["ci"][1]))
    level = next((v["level"] for t in ps["product_term"].values() for v in t.values()), None)
    cols = [Column("prior_sd_factor", "Prior SDs multiplied by"), Column("term", "Product term", "text"),
            Column("mean", "Posterior mean"), Column("sd", "Posterior SD"),
            Column("lower", "Lower", level=level), Column("upper", "Upper", level=level)]
    notes = [(f"Largest shift of the posterior mean: {format_number(ps.get('max_shift_in_posterior_sd'))} posterior "
              "SDs (in posterior SDs at multiplier 1).")]
    return make_table(f"{src}.prior_sensitivity", "Prior sensitivity of the product term", cols, rows, notes=notes,
                      source=src, level=level)


@dataclass(frozen=True)
class _Standardised:
    """The design on the sampler's scale (see :meth:`BayesBackend._standardised`)."""

    X: np.ndarray
    y: np.ndarray
    Z: np.ndarray
    z_labels: tuple[str, ...]
    xs: Scaling
    zs: Scaling
    order: list[int]
    zorder: list[int]
    Xs: np.ndarray
    Zs: np.ndarray
    ys: np.ndarray
    y_center: float
    y_scale: float

    @property
    def inv(self) -> np.ndarray:
        return np.argsort(self.order)


def sampler_warnings(diag: dict[str, Any], target_accept: float) -> tuple[list[str], bool]:
    """Warnings from R-hat, bulk/tail ESS and divergences (thresholds of Vehtari et al. 2021), and
    whether the fit is reliable."""
    warnings: list[str] = []
    reliable = True
    if diag["max_rhat"] is None or diag["max_rhat"] > RHAT_MAX:
        shown = "undefined" if diag["max_rhat"] is None else f"up to {diag['max_rhat']:.3f}"
        warnings.append(f"R-hat {shown} exceeds {RHAT_MAX} (Vehtari et al. 2021): the chains disagree; "
                        "raise 'tune'/'draws'.")
        reliable = False
    for key, label in (("min_ess_bulk", "bulk"), ("min_ess_tail", "tail")):
        if diag[key] is None or diag[key] < ESS_MIN:
            shown = "undefined" if diag[key] is None else f"{diag[key]:.0f}"
            warnings.append(f"The {label} ESS ({shown}) is below {ESS_MIN} (Vehtari et al. 2021); raise 'draws'.")
            reliable = False
    if diag["divergences"] > 0:
        warnings.append(f"{diag['divergences']} divergent transition(s); raise 'target_accept' (now "
                        f"{target_accept:g}) or simplify the variance model.")
        reliable = False
    return warnings, reliable


class BayesBackend(Backend):
    """Bayesian location–scale model (PyMC, NUTS, CPU).

    Parameters
    ----------
    draws, tune, chains : int, default=1000, 1000, 4
    target_accept : float, default=0.9
    likelihood : {"normal", "student"}, default="normal"
    prior_scale : float, default=1.0
        Multiplies every prior SD on the standardised scale.
    variance_terms : list of str or comma-separated str, optional
        Data columns entering log σ besides the intercept (categorical ones as dummies);
        default the focal predictor and the moderators — the same variance model as ``wls``.
    prior_sensitivity : bool, default=False
        Refit at prior scales × 0.5 and × 2.
    save_posterior : str or path, optional
        Write the InferenceData there as netCDF.
    cores : int, optional
        Parallel chains; default min(chains, os.cpu_count()).
    model : {"location-scale", "constant-conjugate"}, default="location-scale"
        The second is a constant-variance normal–inverse-gamma model with a closed-form
        posterior, for checking the sampler.
    sampler : {"pymc", "nutpie", "numpyro"}, default=DEFAULT_SAMPLER
        The NUTS implementation (validation/bench_sampler.py, validation/sbc_bayes.py).
    """

    id = "bayes"
    label = "Bayesian location–scale (PyMC)"
    assumes_constant_variance = False
    assumes_independent_rows = True
    #: Each simulated dataset of a calibration study is a full sampling run.
    cost = "costly"
    options = (
        Option("draws", "integer", 1000, "Posterior draws per chain after tuning.", low=50),
        Option("tune", "integer", 1000, "Tuning steps per chain.", low=50),
        Option("chains", "integer", 4, "Independent chains.", low=1),
        Option("target_accept", "number", 0.9, "Target acceptance rate of NUTS (higher: smaller steps).",
               low=0.5, high=1.0, high_open=True),
        Option("likelihood", "text", "normal", "Normal or Student-t errors.", choices=LIKELIHOODS),
        Option("prior_scale", "number", 1.0, "Multiplies every prior SD on the standardised scale.",
               low=0.0, low_open=True),
        Option("variance_terms", "names", None, "Columns entering log sigma besides the intercept; default the "
               "focal predictor and the moderators."),
        Option("prior_sensitivity", "flag", False, "Refit at prior scales x 0.5 and x 2."),
        Option("save_posterior", "path", None, "Write the posterior (InferenceData) there as netCDF."),
        Option("cores", "integer", None, "Chains run in parallel; default min(chains, CPU count).", low=1),
        Option("model", "text", "location-scale", "The location–scale model, or a constant-variance conjugate "
               "model with a closed-form posterior (for checking the sampler).", choices=MODELS),
        Option("sampler", "text", DEFAULT_SAMPLER, "The NUTS implementation: pymc, nutpie or numpyro.",
               choices=SAMPLERS, case="insensitive"),
        Option("subsample", "integer", None, f"Fit on a seeded random subsample of this many rows (needed above "
               f"{BAYES_MAX_ROWS:,} rows; rule in robustmod.subsample).", low=100, high=BAYES_MAX_ROWS),
    )
    calibration_options = {"draws": 500, "tune": 500, "chains": 2, "prior_sensitivity": False}
    calibration_note = ("The Bayesian back-end was calibrated with 2 chains x 500 draws after 500 tuning steps "
                        "per simulated dataset and no prior-sensitivity refits.")

    draws: int
    tune: int
    chains: int
    target_accept: float
    likelihood: str
    prior_scale: float
    variance_terms: tuple[str, ...] | None
    prior_sensitivity: bool
    save_posterior: str | None
    cores: int | None
    model: str
    sampler: str
    subsample: int | None
    streams = True

    def fit_stream(self, data: StreamData, *, seed: int, progress: bool = False) -> Fit | Unavailable:
        """The rows (all, or the seeded subsample) read in one pass, then the in-memory fit."""
        return fit_stream_rows(self, data, seed=seed, progress=progress)

    def finish_options(self) -> None:
        if self.model == "constant-conjugate" and self.likelihood != "normal":
            raise option_error("likelihood", "'normal' with model='constant-conjugate'", self.likelihood, "bayes")

    # ---- variance model ------------------------------------------------------------
    # ---- fit ---------------------------------------------------------------------------
    def fit(self, design: Design, *, seed: int, progress: bool = False) -> Fit | Unavailable:
        """Sample the location–scale model; refits for LOO and prior sensitivity reuse the compiled step."""
        if self.subsample is not None or design.n_obs > BAYES_MAX_ROWS:  # a seeded subsample, or the refusal
            return fit_on_subsample(self, design, seed=seed, progress=progress)
        t_start = time.perf_counter()
        az = _quiet_import("arviz")
        prep = self._standardised(design)
        if isinstance(prep, Unavailable):
            return prep
        n, k = prep.X.shape
        cores = self.cores or min(self.chains, os.cpu_count() or 1)
        t0 = time.perf_counter()
        codes = design.clusters if self.model == "location-scale" else None
        cm = compiled_model(prep.Xs, prep.ys, prep.Zs, likelihood=self.likelihood, model=self.model,
                            target_accept=self.target_accept, codes=codes)
        t_build = time.perf_counter() - t0
        settings = {"draws": self.draws, "tune": self.tune, "chains": self.chains, "cores": cores,
                    "target_accept": self.target_accept, "likelihood": self.likelihood, "model": self.model,
                    "prior_scale": self.prior_scale, "qr_reparameterisation": cm.qr, "seed": int(seed),
                    "sampler": SAMPLER_LABELS[self.sampler]}
        common: dict[str, Any] = {"chains": self.chains, "cores": cores, "progress": progress, "sampler": self.sampler}
        t0 = time.perf_counter()
        idata = run_sampler(cm, draws=self.draws, tune=self.tune, seed=seed, prior_scale=self.prior_scale, **common)
        t_first = time.perf_counter() - t0
        beta, gamma, gamma_names, Zu, nu = self._user_scale_draws(idata, cm, prep, design)
        offset = cluster_offsets(idata, codes, prep.y_scale)
        shape = (idata.posterior.sizes["chain"], idata.posterior.sizes["draw"])
        _add_loglik(idata, pointwise_loglik(prep.y, prep.X, Zu, beta, gamma, nu, offset).reshape(*shape, n))
        diag = convergence(idata, ["beta", "gamma"] + (["nu"] if nu is not None else [])
                           + (["cluster_sd"] if codes is not None else []))
        warnings, reliable = sampler_warnings(diag, self.target_accept)
        sig = np.exp(Zu @ gamma.T)  # n × S
        extras: dict[str, Any] = {
            "sampler": settings,
            "diagnostics": {**diag, "thresholds": {"rhat_max": RHAT_MAX, "ess_min": ESS_MIN}},
            "variance_model": {"terms": list(gamma_names), **_summaries(gamma, gamma_names)},
            "scale": "coefficients on the user's scale; sampled on a standardised scale",
        }
        if nu is not None:
            extras["nu"] = _summaries(nu[:, None], ("nu",))["nu"]
        if codes is not None:
            extras.update(cluster_extras(idata, prep.y_scale, sig, design.cluster_name, int(codes.max()) + 1))
        # Only PyMC's refits start from the first fit's adaptation; the others tune afresh.
        aux: dict[str, Any] = {"draws": min(self.draws, AUX_DRAWS),
                               "tune": min(self.tune, AUX_TUNE) if self.sampler == "pymc" else self.tune, **common}
        refit_seconds: list[float] = []
        t0 = time.perf_counter()
        extras.update(self._against_constant_variance(az, cm, idata, prep, design, beta, gamma, nu, Zu, offset,
                                                      codes, seed, aux))
        if "loo" in extras:
            refit_seconds.append(time.perf_counter() - t0)
        warnings.extend(extras.get("loo", {}).get("warnings", []))
        if self.prior_sensitivity:
            t0 = time.perf_counter()
            extras["prior_sensitivity"] = self._sensitivity(cm, design, beta, prep.inv, prep.xs, prep.y_center,
                                                            prep.y_scale, seed, idata, aux)
            refit_seconds.append(time.perf_counter() - t0)
        self._save(idata, extras)
        extras["seconds"] = {"build": round(t_build, 3), "first_fit": round(t_first, 3),
                             "refits": [round(s, 3) for s in refit_seconds],
                             "total": round(time.perf_counter() - t_start, 3)}
        extras["n_draws"] = beta.shape[0]
        label = self.label + (" + cluster intercepts" if codes is not None else "")
        return BayesFit(self.id, label, design.term_names, beta, idata=idata, gamma_draws=gamma,
                        gamma_names=gamma_names, sigma_hat=sig.mean(axis=1), warnings=tuple(warnings),
                        reliable=reliable, extras=extras, se_label="posterior SD")

    def _standardised(self, design: Design) -> _Standardised | Unavailable:
        """The design on the sampler's scale: columns scaled, intercepts first, y standardised."""
        X, y = design.X, design.y
        k = X.shape[1]
        Z, z_labels = design.variance_matrix(self.variance_terms)
        if not any(np.all(X[:, j] == 1.0) for j in range(k)):
            return Unavailable(self.id, self.label, "The Bayesian back-end needs a model with an intercept; "
                               "remove '- 1' / '+ 0' from the formula.")
        xs, zs = column_scaling(X), column_scaling(Z)
        y_center, y_scale = float(y.mean()), float(y.std(ddof=1))
        if not y_scale > 0:
            return Unavailable(self.id, self.label, f"The outcome {design.spec.response!r} is constant; nothing to model.")
        assert xs.intercept is not None and zs.intercept is not None  # X was checked above; Z always starts with ones
        order = [xs.intercept] + [j for j in range(k) if j != xs.intercept]
        zorder = [zs.intercept] + [j for j in range(Z.shape[1]) if j != zs.intercept]
        return _Standardised(X, y, Z, tuple(z_labels), xs, zs, order, zorder, xs.apply(X)[:, order],
                             zs.apply(Z)[:, zorder], (y - y_center) / y_scale, y_center, y_scale)

    def _user_scale_draws(self, idata: Any, cm: CompiledModel, prep: _Standardised, design: Design
                          ) -> tuple[np.ndarray, np.ndarray, tuple[str, ...], np.ndarray, np.ndarray | None]:
        """Draws of β and γ back on the user's scale (also stored in ``idata``), the variance terms'
        names and matrix, and ν for a Student-t likelihood."""
        n, k = prep.X.shape
        beta = coefficients_to_user(_stack(idata, cm.mean_names)[:, prep.inv], prep.xs, prep.y_center, prep.y_scale)
        if self.model == "constant-conjugate":
            gamma = 0.5 * np.log(_stack(idata, ("sigma2",))) + np.log(prep.y_scale)
            gamma_names: tuple[str, ...] = ("Intercept",)
            Zu = np.ones((n, 1))
        else:
            g_std = _stack(idata, cm.log_sigma_names)[:, np.argsort(prep.zorder)]
            gamma = log_scale_to_user(g_std, prep.zs, prep.y_scale)
            gamma_names, Zu = prep.z_labels, prep.Z
        nu = _stack(idata, ("nu",))[:, 0] if self.likelihood == "student" else None
        shape = (idata.posterior.sizes["chain"], idata.posterior.sizes["draw"])
        idata.posterior["beta"] = (("chain", "draw", "term"), beta.reshape(*shape, k))
        idata.posterior["gamma"] = (("chain", "draw", "variance_term"), gamma.reshape(*shape, -1))
        idata.posterior = idata.posterior.assign_coords(term=list(design.term_names), variance_term=list(gamma_names))
        return beta, gamma, gamma_names, Zu, nu

    def _against_constant_variance(self, az: Any, cm: CompiledModel, idata: Any, prep: _Standardised,
                                   design: Design, beta: np.ndarray, gamma: np.ndarray, nu: np.ndarray | None,
                                   Zu: np.ndarray, offset: np.ndarray | None, codes: np.ndarray | None, seed: int,
                                   aux: dict[str, Any]) -> dict[str, Any]:
        """PSIS-LOO against a constant-variance refit and the predictive spread check of both
        (the check alone when the model has no variance slope)."""
        X, y = prep.X, prep.y
        n = X.shape[0]
        if not (self.model == "location-scale" and prep.Z.shape[1] > 1):
            return {"predictive_check": spread_check(design, y, X, Zu, beta, gamma, nu, None, None, None, None, seed,
                                                     offsets=(offset, None))}
        idata_c = run_sampler(cm, seed=seed + 1, prior_scale=self.prior_scale, variance_on=0.0, previous=idata, **aux)
        beta_c = coefficients_to_user(_stack(idata_c, cm.mean_names)[:, prep.inv], prep.xs, prep.y_center,
                                      prep.y_scale)
        gamma_c = np.log(prep.y_scale) + _stack(idata_c, ("g_intercept",))
        nu_c = _stack(idata_c, ("nu",))[:, 0] if nu is not None else None
        shape_c = (idata_c.posterior.sizes["chain"], idata_c.posterior.sizes["draw"])
        offset_c = cluster_offsets(idata_c, codes, prep.y_scale)
        ll_c = pointwise_loglik(y, X, np.ones((n, 1)), beta_c, gamma_c, nu_c, offset_c)
        _add_loglik(idata_c, ll_c.reshape(*shape_c, n))
        return {"loo": loo_compare(az, idata, idata_c),
                "predictive_check": spread_check(design, y, X, Zu, beta, gamma, nu, np.ones((n, 1)), beta_c, gamma_c,
                                                 nu_c, seed, offsets=(offset, offset_c))}

    def _save(self, idata: Any, extras: dict[str, Any]) -> None:
        if self.save_posterior is None:
            return
        try:
            idata.to_netcdf(self.save_posterior)
        except (OSError, ValueError) as exc:
            raise InputError(f"The 'save_posterior' file {self.save_posterior!r} could not be written ({exc}); "
                             "choose a writable path.") from None
        extras["posterior_file"] = self.save_posterior

    def _sensitivity(self, cm: CompiledModel, design: Design, beta: np.ndarray, inv: np.ndarray, xs: Scaling,
                     y_center: float, y_scale: float, seed: int, idata: Any, aux: dict[str, Any]) -> dict[str, Any]:
        """Product-term posterior at prior scales × 0.5, × 1, × 2, and its shift in posterior SDs."""
        cols = list(design.interaction_columns)
        base_mean, base_sd = beta[:, cols].mean(axis=0), beta[:, cols].std(axis=0, ddof=1)
        rows = {"1": _term_summary(beta[:, cols], design, cols)}
        shifts = []
        for i, f in enumerate(SENSITIVITY_FACTORS):
            idf = run_sampler(cm, seed=seed + 2 + i, prior_scale=self.prior_scale * f, previous=idata, **aux)
            b = coefficients_to_user(_stack(idf, cm.mean_names)[:, inv], xs, y_center, y_scale)[:, cols]
            rows[f"{f:g}"] = _term_summary(b, design, cols)
            shifts.append(np.abs(b.mean(axis=0) - base_mean) / base_sd)
        return {"factors": [0.5, 1.0, 2.0], "product_term": rows,
                "max_shift_in_posterior_sd": float(np.max(shifts)),
                "note": "posterior mean and 95% equal-tailed interval of the product term(s) with every prior SD "
                        "multiplied by the factor; shift = |mean − mean at ×1| / posterior SD at ×1"}


# ---------------------------------------------------------------------------------------
# Model checks (numpy, from the draws)
# ---------------------------------------------------------------------------------------
def pointwise_loglik(y: np.ndarray, X: np.ndarray, Z: np.ndarray, beta: np.ndarray, gamma: np.ndarray,
                     nu: np.ndarray | None, offset: np.ndarray | None = None) -> np.ndarray:
    """log p(yᵢ | θ_s) as an S × n matrix, normal or Student-t with scale σᵢ = exp(zᵢᵀγ); ``offset``
    (S × n, the cluster intercepts of each draw) is added to the location."""
    log_sigma = gamma @ Z.T  # S × n
    # The same operations in the same order as r = (y − μ)·exp(−log σ) and c − log σ − (0.5·r)·r
    # written out, but in place: S × n arrays are large and each fresh one costs its page faults.
    r = beta @ X.T
    if offset is not None:
        r += offset
    np.subtract(y[None, :], r, out=r)
    inv_sigma = np.negative(log_sigma)
    r *= np.exp(inv_sigma, out=inv_sigma)
    if nu is None:
        out = np.subtract(-0.5 * np.log(2 * np.pi), log_sigma, out=inv_sigma)
        half_sq = 0.5 * r
        half_sq *= r
        out -= half_sq
        return out
    v = nu[:, None]
    return (special.gammaln((v + 1) / 2) - special.gammaln(v / 2) - 0.5 * np.log(v * np.pi) - log_sigma
            - (v + 1) / 2 * np.log1p(r * r / v))


def _add_loglik(idata: Any, ll: np.ndarray) -> None:
    import xarray as xr  # noqa: PLC0415

    ds = xr.Dataset({"y": (("chain", "draw", "obs"), ll)},
                    coords={"chain": idata.posterior.chain.values, "draw": idata.posterior.draw.values})
    idata.add_groups({"log_likelihood": ds})


def _loo_inputs(az: Any, idata: Any) -> tuple[np.ndarray, float]:
    """The pointwise log-likelihood as (draws of all chains, observations) and r_eff, the mean bulk
    ESS of the posterior's variables over the number of draws (1 for one chain), as ArviZ's loo takes it."""
    ll = np.asarray(idata.log_likelihood["y"].values, dtype=float)
    chains, draws = ll.shape[:2]
    if chains == 1:
        return ll.reshape(draws, -1), 1.0
    ess = az.ess(idata.posterior, method="mean")
    r_eff = float(np.hstack([ess[v].values.ravel() for v in ess.data_vars]).mean()) / (chains * draws)
    return ll.reshape(chains * draws, -1), r_eff


def loo_compare(az: Any, idata_h: Any, idata_c: Any) -> dict[str, Any]:
    """PSIS-LOO (Vehtari, Gelman & Gabry 2017) of both models; SE of the difference from the pointwise terms."""
    out: dict[str, Any] = {}
    pointwise = {}
    warnings: list[str] = []
    for key, ds in (("heteroscedastic", idata_h), ("constant_variance", idata_c)):
        res = psis_loo(*_loo_inputs(az, ds))
        n_bad = int((res.pareto_k > 0.7).sum())
        pointwise[key] = res.loo_i
        out[key] = {"elpd_loo": res.elpd_loo, "se": res.se, "p_loo": res.p_loo, "pareto_k_above_0.7": n_bad}
        if n_bad:
            warnings.append(f"PSIS-LOO of the {key.replace('_', ' ')} model has {n_bad} observation(s) with Pareto k > "
                            "0.7; its elpd estimate is unreliable there.")
    diff = pointwise["heteroscedastic"] - pointwise["constant_variance"]
    out["elpd_difference"] = float(diff.sum())
    out["elpd_difference_se"] = float(np.sqrt(diff.size * diff.var(ddof=1)))
    out["preferred"] = "heteroscedastic" if diff.sum() > 0 else "constant_variance"
    out["warnings"] = warnings
    return out


def spread_check(design: Design, y: np.ndarray, X: np.ndarray, Z: np.ndarray, beta: np.ndarray, gamma: np.ndarray,
                 nu: np.ndarray | None, Zc: np.ndarray | None, beta_c: np.ndarray | None,
                 gamma_c: np.ndarray | None, nu_c: np.ndarray | None, seed: int,
                 offsets: tuple[np.ndarray | None, np.ndarray | None] = (None, None)) -> dict[str, Any] | None:
    """Posterior predictive check of SD(y) within moderator bins: observed vs the 95% predictive interval
    (replicates given each draw's cluster intercepts when ``offsets`` holds them)."""
    mod = next(iter(design.moderators))
    info = design.moderators[mod]
    raw = design.data.frame[mod].to_numpy()
    if info.categorical:
        import pandas as pd  # noqa: PLC0415

        labels = [str(v) for v in info.levels]
        codes = np.asarray(pd.Categorical(raw.astype(str), categories=labels).codes)
    else:
        edges = np.unique(np.quantile(raw.astype(float), np.linspace(0, 1, PPC_BINS + 1)))
        codes = np.clip(np.searchsorted(edges, raw.astype(float), side="right") - 1, 0, len(edges) - 2)
        labels = [f"[{edges[i]:.4g}, {edges[i + 1]:.4g}{']' if i == len(edges) - 2 else ')'}" for i in range(len(edges) - 1)]
    rng = np.random.default_rng([int(seed), 7])
    onehot = (codes[:, None] == np.arange(len(labels))[None, :]).astype(float)  # n × B
    counts = onehot.sum(axis=0)
    keep = counts >= 2

    def bin_sd(Y: np.ndarray) -> np.ndarray:  # Y: S × n → S × B
        m = (Y @ onehot) / counts
        v = ((Y * Y) @ onehot - counts * m * m) / np.maximum(counts - 1, 1)
        return np.sqrt(np.maximum(v, 0.0))

    def replicate(Zm: np.ndarray, b: np.ndarray, g: np.ndarray, v: np.ndarray | None,
                  off: np.ndarray | None) -> np.ndarray:
        idx = rng.choice(b.shape[0], size=min(PPC_DRAWS, b.shape[0]), replace=False)
        mu = b[idx] @ X.T if off is None else b[idx] @ X.T + off[idx]
        sd = np.exp(g[idx] @ Zm.T)
        eps = rng.standard_normal(mu.shape) if v is None else rng.standard_t(v[idx][:, None], size=mu.shape)
        return bin_sd(mu + sd * eps)

    observed = bin_sd(y[None, :])[0]
    out: dict[str, Any] = {"moderator": mod, "bins": [lab for lab, k in zip(labels, keep, strict=False) if k],
                           "n_per_bin": counts[keep].astype(int).tolist(),
                           "observed_sd": observed[keep].tolist(), "level": 0.95}
    models: list[tuple[str, np.ndarray, np.ndarray, np.ndarray, np.ndarray | None, np.ndarray | None]] = [
        ("heteroscedastic", Z, beta, gamma, nu, offsets[0])]
    if Zc is not None:
        assert beta_c is not None and gamma_c is not None  # the constant-variance fit comes with its Z
        models.append(("constant_variance", Zc, beta_c, gamma_c, nu_c, offsets[1]))
    for key, Zm, b, g, v, off in models:
        rep = replicate(Zm, b, g, v, off)[:, keep]
        lo, hi = np.quantile(rep, [0.025, 0.975], axis=0)
        outside = (observed[keep] < lo) | (observed[keep] > hi)
        out[key] = {"lower": lo.tolist(), "upper": hi.tolist(), "bins_outside": int(outside.sum()),
                    "tail_share": ((rep >= observed[keep]).mean(axis=0)).tolist()}
    return out


def cluster_offsets(idata: Any, codes: np.ndarray | None, y_scale: float) -> np.ndarray | None:
    """Each draw's cluster intercept of each row on the user's scale, τ·u_g·SD(y) (S × n), or None."""
    if codes is None:
        return None
    tau = _stack(idata, ("cluster_sd",))[:, 0]
    return (_stack(idata, ("cluster_z",)) * (tau * y_scale)[:, None])[:, codes]


def cluster_extras(idata: Any, y_scale: float, sig: np.ndarray, column: str | None, n_clusters: int) -> dict[str, Any]:
    """The cluster-intercept SD τ on the user's scale and the intra-class correlation on the residual
    scale, ICC = τ² / (τ² + mean σᵢ²) per draw (σᵢ the draw's residual SD of row i), as summaries."""
    tau = _stack(idata, ("cluster_sd",))[:, 0] * y_scale
    icc = tau**2 / (tau**2 + (sig**2).mean(axis=0))
    return {"n_clusters": n_clusters, "cluster": column,
            "cluster_intercepts": {"intercept_sd": _summaries(tau[:, None], ("sd",))["sd"],
                                   "icc": _summaries(icc[:, None], ("icc",))["icc"]}}


def convergence(idata: Any, names: Sequence[str]) -> dict[str, Any]:
    """Max rank-normalised R-hat, min bulk and tail ESS over ``names``, and divergences."""
    az = _quiet_import("arviz")

    post = idata.posterior[list(names)]
    rhat = az.rhat(post, method="rank")
    bulk = az.ess(post, method="bulk")
    tail = az.ess(post, method="tail")

    def agg(ds: Any, fn: Any) -> float | None:
        vals = np.concatenate([np.ravel(ds[v].values) for v in ds.data_vars])
        vals = vals[np.isfinite(vals)]
        return float(fn(vals)) if vals.size else None

    div = int(idata.sample_stats["diverging"].values.sum()) if "diverging" in idata.sample_stats else 0
    per_term = {}
    if "beta" in post:
        for t in post["beta"].term.values:
            per_term[str(t)] = {"rhat": float(rhat["beta"].sel(term=t)), "ess_bulk": float(bulk["beta"].sel(term=t)),
                                "ess_tail": float(tail["beta"].sel(term=t))}
    return {"max_rhat": agg(rhat, np.max), "min_ess_bulk": agg(bulk, np.min), "min_ess_tail": agg(tail, np.min),
            "divergences": div, "per_term": per_term}


def _summaries(draws: np.ndarray, names: Sequence[str], level: float = 0.95) -> dict[str, dict[str, Any]]:
    lo, hi = np.quantile(draws, [(1 - level) / 2, (1 + level) / 2], axis=0)
    return {str(nm): {"mean": float(draws[:, i].mean()), "sd": float(draws[:, i].std(ddof=1)),
                      "ci": [float(lo[i]), float(hi[i])], "level": level} for i, nm in enumerate(names)}


def _term_summary(b: np.ndarray, design: Design, cols: list[int]) -> dict[str, Any]:
    return _summaries(b, [design.term_names[j] for j in cols])
