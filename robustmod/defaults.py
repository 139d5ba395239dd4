"""Every default of the package in one place (seed, alpha, primary, back-ends, thresholds).

Other modules import these names instead of repeating the literals, so the CLI help, the
API signatures, the TOML config and the docs cannot drift apart.
"""
from __future__ import annotations

#: Seeds every random step (bootstrap weights, sampler, calibration datasets).
SEED = 20240917

#: Two-sided significance level of every test and 1 − ALPHA the level of every interval.
ALPHA = 0.05

#: The primary back-end when the user names none.
PRIMARY = "hc3"

#: Back-ends run when the user names none.
BACKENDS: tuple[str, ...] = ("ols", "hc3", "wild", "wls", "bayes")

#: Default appendix folder of ``robustmod appendix``.
APPENDIX_FOLDER = "robustmod-appendix"

#: Engines that run calibration tasks, and the one used when the user names none.
ENGINES: tuple[str, ...] = ("local", "dask")
ENGINE = "local"

#: Default folder of ``robustmod grid``.
GRID_FOLDER = "robustmod-grid"

#: Default number of simulated datasets of ``--calibrate`` when no number is given.
CALIBRATION_DATASETS = 1000
#: Allowed numbers of simulated datasets (fewer says nothing; more takes hours on 2 cores).
MIN_DATASETS, MAX_DATASETS = 10, 100_000

#: Leverages at or above 1 − LEVERAGE_ONE_TOL count as leverage one (HC2–HC5 undefined there).
LEVERAGE_ONE_TOL = 1e-10

#: A standard-error gap (robust / classical) above this is flagged in the diagnostics
#: (our own rule of thumb, stated as such in docs/method-diagnostics.md).
SE_GAP_THRESHOLD = 1.5

#: Number of moderator bins of the binning check of the linear interaction.
LINEARITY_BINS = 3

#: Points of the moderator grid on which regions and curves are evaluated.
CURVE_POINTS = 101

#: Back-ends run when the user names none and the rows are clustered (a cluster column is given):
#: the cluster-robust CR2, the wild cluster bootstrap, WLS with CR2 and the Bayesian model with
#: cluster intercepts; classical OLS stays as the naive reference.
CLUSTER_BACKENDS: tuple[str, ...] = ("ols", "cr2", "wild", "wls", "bayes")

#: The primary back-end when the rows are clustered and the user names none.
CLUSTER_PRIMARY = "cr2"

#: The Bayesian back-end refuses more rows than this (its sampler's cost grows with n: at 2·10⁵ rows one fit
#: takes many minutes on 2 cores); above it, fit it on a seeded random subsample (its ``subsample`` option).
BAYES_MAX_ROWS = 200_000

#: Data read in chunks: the memory budget when none is given is this share of the memory available when
#: the run starts (``--memory`` / ``memory=`` set it).
MEMORY_SHARE = 0.25
#: A file is read in chunks automatically (``stream=None``) when its frame of the model's columns
#: (rows × columns × 8 bytes) times this factor exceeds the budget: the in-memory path peaks at about
#: 6–33 times that frame (design, QR, diagnostics; measured in validation/README.md).
STREAM_MEMORY_FACTOR = 20
