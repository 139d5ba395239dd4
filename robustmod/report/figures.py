"""Figures of the sensitivity appendix.

Each public ``*_figure`` function takes a :class:`~robustmod.compare.Comparison` and
returns a matplotlib Figure (for notebooks); it draws the tables the comparison already
holds and computes no new statistics. When its input is missing (e.g. no Bayesian fit)
it raises :class:`MissingInput` with the reason, which the appendix prints instead of
the figure. matplotlib is imported only here, inside the functions, on the Agg backend.
"""
from __future__ import annotations

from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from ..errors import InputError

if TYPE_CHECKING:  # pragma: no cover
    from matplotlib.figure import Figure
    from matplotlib.typing import RcKeyType

    from ..compare import Comparison

#: Okabe & Ito (2008) colour-blind-safe palette.
OKABE_ITO = {
    "black": "#000000", "orange": "#E69F00", "sky": "#56B4E9", "green": "#009E73",
    "yellow": "#F0E442", "blue": "#0072B2", "vermillion": "#D55E00", "purple": "#CC79A7",
}
#: A fixed colour per back-end id, so a back-end looks the same in every figure. The one local
#: fallback, used only while the back-end registry offers no ``colour(id)`` of its own.
BACKEND_COLOURS = {
    "ols": OKABE_ITO["black"], "hc3": OKABE_ITO["blue"], "wild": OKABE_ITO["orange"],
    "wls": OKABE_ITO["green"], "bayes": OKABE_ITO["purple"], "hc0": OKABE_ITO["sky"],
    "hc1": OKABE_ITO["sky"], "hc2": OKABE_ITO["vermillion"], "hc4": OKABE_ITO["vermillion"],
    "hc4m": OKABE_ITO["yellow"], "hc5": OKABE_ITO["yellow"],
}
#: The plain house style: white ground, two spines, faint horizontal grid.
STYLE: dict[RcKeyType, Any] = {
    "figure.facecolor": "white", "axes.facecolor": "white", "axes.edgecolor": "#444444",
    "axes.spines.top": False, "axes.spines.right": False, "axes.grid": True, "axes.grid.axis": "y",
    "grid.color": "#e4e4e4", "grid.linewidth": 0.6, "font.size": 9, "axes.titlesize": 10,
    "axes.titleweight": "bold", "axes.titlelocation": "left", "axes.labelsize": 9, "legend.fontsize": 8,
    "legend.frameon": False, "xtick.labelsize": 8, "ytick.labelsize": 8, "lines.linewidth": 1.6,
    "savefig.dpi": 130, "pdf.fonttype": 42, "svg.hashsalt": "robustmod",
}


#: Why a figure of the rows is not drawn for data read in chunks.
NO_ROWS = "the data were read in chunks, so their rows are not held in memory to draw"


class MissingInput(InputError):
    """The comparison lacks what a figure draws (the reason is the message)."""


@dataclass(frozen=True)
class FigureRecord:
    """One figure of the appendix: written files, or the reason it was skipped."""

    name: str
    title: str
    caption: str
    png: Path | None = None
    pdf: Path | None = None
    skipped: str | None = None


def colour(bid: str, i: int = 0) -> str:
    """The back-end's colour: the registry's when it has one, else the local fallback, else the
    palette in order (``i``)."""
    from ..backends import registry  # noqa: PLC0415

    own = getattr(registry, "colour", None)
    if callable(own) and bid in registry.REGISTRY:
        try:
            return str(own(bid))
        except Exception:  # noqa: BLE001  (an entry without a colour falls back to the palette)
            pass
    if bid in BACKEND_COLOURS:
        return BACKEND_COLOURS[bid]
    cycle = list(OKABE_ITO.values())
    return cycle[i % len(cycle)]


@contextmanager
def _style() -> Iterator[Any]:
    import matplotlib  # noqa: PLC0415

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt  # noqa: PLC0415

    with plt.rc_context(STYLE):
        yield plt


def _new(nrows: int = 1, ncols: int = 1, size: tuple[float, float] = (7.0, 4.2)) -> tuple[Any, Any]:
    from matplotlib.figure import Figure  # noqa: PLC0415  (no pyplot state: figures are freed with their object)

    fig = Figure(figsize=size, layout="constrained")
    axes = fig.subplots(nrows, ncols, squeeze=False)
    return fig, axes


def _available(c: Comparison) -> list[tuple[str, Any]]:
    return [(b, r) for b, r in c.results.items() if r.available]


def _level(c: Comparison) -> str:
    return f"{100 * (1 - c.spec.alpha):g}%"


# ---- conditional slope -------------------------------------------------------------
def slope_figure(comparison: Comparison, backends: list[str] | None = None) -> Figure:
    """Conditional slope of the focal predictor along the first continuous moderator.

    One band per back-end (its pointwise interval from ``BackendResult.slope_curve``),
    Johnson–Neyman boundaries as dashed lines, a rug of the observed moderator values and
    the region beyond the observed range greyed.
    """
    c = comparison
    curves = [(b, r) for b, r in _available(c) if r.slope_curve is not None and (backends is None or b in backends)]
    if not curves:
        raise MissingInput("no back-end has a slope curve (the model needs a continuous moderator)")
    m = curves[0][1].slope_curve["moderator"]
    info = c.design.moderators[m]
    lo_obs, hi_obs = info.observed_range()
    pad = 0.06 * ((hi_obs - lo_obs) or 1.0)
    with _style():
        fig, axes = _new()
        ax = axes[0, 0]
        for i, (bid, r) in enumerate(curves):
            sc = r.slope_curve
            x = np.asarray(sc["values"], dtype=float)
            est = np.asarray([np.nan if v is None else v for v in sc["estimate"]], dtype=float)
            lo = np.asarray([np.nan if v is None else v for v in sc["lower"]], dtype=float)
            hi = np.asarray([np.nan if v is None else v for v in sc["upper"]], dtype=float)
            col = colour(bid, i)
            primary = bid == c.primary
            if primary:  # only the primary band is filled, so the others stay legible
                ax.fill_between(x, lo, hi, color=col, alpha=0.16, linewidth=0)
            ax.plot(x, lo, color=col, linewidth=0.8 if primary else 1.0, linestyle="-" if primary else (0, (4, 2)))
            ax.plot(x, hi, color=col, linewidth=0.8 if primary else 1.0, linestyle="-" if primary else (0, (4, 2)))
            ax.plot(x, est, color=col, linewidth=2.2 if primary else 1.3,
                    label=f"{bid}{' (primary)' if primary else ''}: {r.label}")
            reg = r.significance_region
            if reg is not None:
                for bnd in reg["boundaries"]:
                    if bnd is not None and lo_obs - pad <= bnd <= hi_obs + pad:
                        ax.axvline(bnd, color=col, linestyle="--", linewidth=1.0)
        ax.axhline(0.0, color="#777777", linewidth=0.8)
        ax.set_xlim(lo_obs - pad, hi_obs + pad)
        ax.axvspan(lo_obs - pad, lo_obs, color="#bbbbbb", alpha=0.35, linewidth=0, label="outside observed range")
        ax.axvspan(hi_obs, hi_obs + pad, color="#bbbbbb", alpha=0.35, linewidth=0)
        if info.values is not None:  # data read in chunks keep no rows for a rug
            vals = np.asarray(info.values, dtype=float)
            ax.plot(vals, np.full_like(vals, 0.02), "|", color="#333333", markersize=6, alpha=0.45,
                    transform=ax.get_xaxis_transform(), label="observed moderator values")
        ax.plot([], [], color="#555555", linestyle="--", linewidth=1.0, label="Johnson–Neyman boundary")
        ax.set_xlabel(f"{m} (raw scale)")
        ax.set_ylabel(f"slope of {c.spec.focal}")
        ax.set_title(f"Slope of {c.spec.focal} across {m} ({_level(c)} pointwise bands)")
        fig.set_size_inches(7.0, 5.0)
        fig.legend(loc="outside lower center", ncol=2)
    return fig


# ---- data with fitted lines -----------------------------------------------------------
def data_figure(comparison: Comparison) -> Figure:
    """Outcome against the focal predictor, points coloured by the first moderator, with the
    primary back-end's fitted mean lines at the probe values (covariates at reference)."""
    c = comparison
    d = c.design
    prim = c.results.get(c.primary)
    if prim is None or not prim.available or prim.fit is None:
        raise MissingInput(f"the primary back-end ({c.primary}) gave no fit")
    if d.X.shape[0] == 0:
        raise MissingInput(NO_ROWS)
    m = d.spec.moderators[0]
    info = d.moderators[m]
    x = d.data.frame[d.focal].to_numpy(dtype=float)
    y = d.y
    xs = np.linspace(float(np.min(x)), float(np.max(x)), 60)
    with _style() as plt:
        fig, axes = _new()
        ax = axes[0, 0]
        if info.categorical:
            levels = list(info.levels)
            raw = d.data.frame[m].astype(str).to_numpy()
            cols = {lev: colour("", i + 1) for i, lev in enumerate(levels)}
            for lev in levels:
                sel = raw == str(lev)
                ax.scatter(x[sel], y[sel], s=10, color=cols[lev], alpha=0.55, linewidths=0, label=f"{m} = {lev}")
            line_col = lambda v: cols.get(v, "#333333")  # noqa: E731
        else:
            w = np.asarray(info.values, dtype=float)
            norm = plt.Normalize(*info.observed_range())
            cmap = plt.get_cmap("cividis")
            sc = ax.scatter(x, y, c=w, cmap=cmap, norm=norm, s=10, alpha=0.7, linewidths=0)
            fig.colorbar(sc, ax=ax, label=f"{m} (raw scale)")
            line_col = lambda v: cmap(norm(v))  # noqa: E731
        points = list(d.probe_points)
        means = _fitted_means(c, points, xs)
        for pt, mu in zip(points, means, strict=False):
            label = ", ".join(f"{k} = {v:.3g}" if isinstance(v, float) else f"{k} = {v}" for k, v in pt.items())
            ax.plot(xs, mu, color="white", linewidth=3.4)
            ax.plot(xs, mu, color=line_col(pt[m]), linewidth=1.8, label=f"fitted at {label}")
        ax.set_xlabel(f"{d.focal}")
        ax.set_ylabel(str(d.spec.formula.split("~")[0].strip()))
        ax.set_title(f"Data with fitted lines at chosen moderator values ({c.primary}; other terms at reference)")
        ax.legend(loc="best")
    return fig


def _fitted_means(c: Comparison, points: list[dict[str, Any]], xs: np.ndarray) -> list[np.ndarray]:
    """Fitted mean L·β̂ of the primary fit along the focal predictor at each probe point."""
    d = c.design
    fit = c.results[c.primary].fit
    assert fit is not None  # data_figure draws only when the primary back-end gave a fit
    out = []
    for pt in points:
        out.append(fit.estimate(d.model_rows(pt, xs), c.spec.alpha).estimate)
    return out


# ---- residual diagnostics --------------------------------------------------------------
def residual_figure(comparison: Comparison) -> Figure:
    """OLS residual checks: residuals vs fitted, normal QQ, scale–location, leverage."""
    from scipy import stats  # noqa: PLC0415

    d = comparison.design
    if d.X.shape[0] == 0:
        raise MissingInput(NO_ROWS)
    Q, _ = d.qr
    fitted = Q @ (Q.T @ d.y)
    e = d.y - fitted
    h = np.einsum("ij,ij->i", Q, Q)
    n, k = d.X.shape
    s = float(np.sqrt(e @ e / max(n - k, 1)))
    with np.errstate(divide="ignore", invalid="ignore"):
        r = e / (s * np.sqrt(np.clip(1 - h, 1e-12, None)))
    (osm, osr), _ = stats.probplot(r, dist="norm")
    grey = "#555555"
    with _style():
        fig, axes = _new(2, 2, size=(7.0, 5.8))
        a = axes[0, 0]
        a.scatter(fitted, e, s=8, color=OKABE_ITO["blue"], alpha=0.6, linewidths=0)
        a.axhline(0, color=grey, linewidth=0.8)
        a.set(xlabel="fitted value", ylabel="residual", title="Residuals against fitted")
        a = axes[0, 1]
        a.scatter(osm, osr, s=8, color=OKABE_ITO["blue"], alpha=0.6, linewidths=0)
        lim = [float(min(osm.min(), osr.min())), float(max(osm.max(), osr.max()))]
        a.plot(lim, lim, color=grey, linewidth=0.8)
        a.set(xlabel="normal quantile", ylabel="standardised residual", title="Normal QQ")
        a = axes[1, 0]
        a.scatter(fitted, np.sqrt(np.abs(r)), s=8, color=OKABE_ITO["orange"], alpha=0.7, linewidths=0)
        a.set(xlabel="fitted value", ylabel="√|standardised residual|", title="Scale–location (a rising cloud = fan-out)")
        a = axes[1, 1]
        a.scatter(h, r, s=8, color=OKABE_ITO["green"], alpha=0.7, linewidths=0)
        a.axvline(2 * k / n, color=grey, linestyle="--", linewidth=0.8)
        a.axhline(0, color=grey, linewidth=0.8)
        a.set(xlabel="leverage (dashed: 2k/n)", ylabel="standardised residual", title="Leverage")
        fig.suptitle("Residual diagnostics of the OLS fit", x=0.01, ha="left", fontweight="bold")
    return fig


# ---- variance function -----------------------------------------------------------------
def variance_figure(comparison: Comparison) -> Figure:
    """Fitted residual SD per row (``fit.sigma_hat``) of every fit that models the variance,
    against the focal predictor and the first moderator."""
    c = comparison
    d = c.design
    found = []
    for bid, r in c.results.items():
        sig = getattr(r.fit, "sigma_hat", None) if r.fit is not None else None
        if callable(sig):
            sig = sig()
        if sig is not None:
            sig = np.asarray(sig, dtype=float).ravel()
            if sig.shape == d.y.shape:
                found.append((bid, sig))
    if not found:
        raise MissingInput("no fit with a fitted variance function is in this comparison")
    m = d.spec.moderators[0]
    x = d.data.frame[d.focal].to_numpy(dtype=float)
    info = d.moderators[m]
    with _style():
        fig, axes = _new(1, 2, size=(7.0, 3.8))
        for i, (bid, sig) in enumerate(found):
            marker = "o" if i == 0 else "x"
            for a, along, name in ((axes[0, 0], x, d.focal), (axes[0, 1], None, m)):
                xv = along
                if xv is None:
                    if info.categorical:
                        xv = d.data.frame[m].astype("category").cat.codes.to_numpy(dtype=float)
                    else:
                        xv = np.asarray(info.values, dtype=float)
                a.scatter(xv, sig, s=9, alpha=0.6, color=colour(bid, i), marker=marker,
                          linewidths=0 if marker == "o" else 0.8, label=f"{bid}: {c.results[bid].label}")
                a.set_xlabel(name)
        axes[0, 0].set_ylabel("fitted residual SD (outcome units)")
        fig.suptitle("Fitted variance function: residual SD per row", x=0.01, ha="left", fontweight="bold")
        axes[0, 0].set_title(f"against {d.focal}", fontweight="normal")
        axes[0, 1].set_title(f"against {m}", fontweight="normal")
        fig.legend(*axes[0, 0].get_legend_handles_labels(), loc="outside lower center", ncol=2)
    return fig


# ---- binning check -----------------------------------------------------------------------
def linearity_figure(comparison: Comparison) -> Figure:
    """The binning check: the focal slope estimated within bins of the moderator, against the
    linear-interaction line (drawn from ``diagnostics['linearity']``)."""
    diagnostics: Mapping[str, Any] = comparison.diagnostics or {}
    lin = diagnostics.get("linearity")
    if lin is None:
        raise MissingInput("the diagnostics hold no binning (linearity) check")
    if not lin.get("bins"):
        raise MissingInput("the binning check holds no per-bin slopes")
    from ..linearity import linearity_table  # noqa: PLC0415

    frame = linearity_table(lin).to_frame()
    centre, est, lo, hi = (frame[k].to_numpy(dtype=float, na_value=np.nan) for k in ("median", "estimate", "ci_low", "ci_high"))
    if not np.isfinite(centre).any() or not np.isfinite(est).any():
        raise MissingInput("the binning check holds no bin centres or slopes to draw")
    c = comparison
    prim = c.results.get(c.primary)
    with _style():
        fig, axes = _new(size=(7.0, 3.6))
        ax = axes[0, 0]
        if prim is not None and prim.slope_curve is not None:
            sc = prim.slope_curve
            ax.plot(sc["values"], [np.nan if v is None else v for v in sc["estimate"]], color=colour(c.primary),
                    label=f"linear interaction ({c.primary})")
        ax.errorbar(centre, est, yerr=[est - lo, hi - est] if np.isfinite(lo).all() else None, fmt="s",
                    color=OKABE_ITO["vermillion"], capsize=3, label="slope within bin")
        ax.axhline(0, color="#777777", linewidth=0.8)
        ax.set_xlabel(str(lin.get("moderator", c.spec.moderators[0])))
        ax.set_ylabel(f"slope of {c.spec.focal}")
        ax.set_title("Binning check: does the slope change linearly with the moderator?")
        ax.legend(loc="best")
    return fig


# ---- calibration -------------------------------------------------------------------------
def calibration_figure(comparison: Comparison) -> Figure:
    """Simulated false-positive rate per back-end, ±2 Monte Carlo SE, and the nominal alpha."""
    cal = comparison.calibration
    if not cal or not cal.get("false_positive_rate"):
        raise MissingInput("no calibration was run (use --calibrate N)")
    fpr = cal["false_positive_rate"]
    ids = [b for b in fpr if isinstance(fpr[b], dict) and fpr[b].get("rate") is not None]
    if not ids:
        raise MissingInput("the calibration holds no false-positive rates")
    rate = np.array([fpr[b]["rate"] for b in ids], dtype=float)
    se = np.array([fpr[b].get("mc_se") or 0.0 for b in ids], dtype=float)
    alpha = float(cal.get("alpha", comparison.spec.alpha))
    with _style():
        fig, axes = _new(size=(7.0, 0.9 + 0.38 * len(ids)))
        ax = axes[0, 0]
        yy = np.arange(len(ids))[::-1]
        for i, b in enumerate(ids):
            ax.errorbar(rate[i], yy[i], xerr=2 * se[i], fmt="o", color=colour(b, i), capsize=3)
        ax.axvline(alpha, color="#444444", linestyle="--", linewidth=1.0, label=f"nominal alpha = {alpha:g}")
        ax.set_yticks(yy, ids)
        ax.grid(axis="x", color="#e4e4e4")
        ax.set_xlim(left=0)
        ax.set_xlabel(f"false-positive rate of the product-term test ({cal.get('n_datasets', '?')} simulated datasets; bars ±2 MC SE)")
        ax.set_title("Calibration under no moderation")
        ax.legend(loc="lower right")
    return fig


# ---- Bayesian ------------------------------------------------------------------------------
def _posterior(comparison: Comparison) -> Any:
    for r in comparison.results.values():
        if r.available and r.fit is not None and r.kind == "posterior" and getattr(r.fit, "idata", None) is not None:
            return r
    raise MissingInput("no posterior fit with draws is in this comparison")


def posterior_figure(comparison: Comparison) -> Figure:
    """Posterior of the product term: the main fit's draws as a histogram, and the posterior
    mean and interval at each prior scale of ``extras['prior_sensitivity']`` when present."""
    c = comparison
    r = _posterior(c)
    L = c.design.interaction_rows()
    if L.shape[0] != 1:
        raise MissingInput("the product term has several columns (categorical moderator); no single posterior to draw")
    draws = getattr(r.fit, "draws", None)
    if draws is None:
        raise MissingInput("the Bayesian fit holds no posterior draws of the product term")
    d = np.asarray(draws, dtype=float) @ L[0]
    term = c.design.interaction_terms[0]
    sens = (r.extras.get("prior_sensitivity") or {}).get("product_term") if isinstance(r.extras, dict) else None
    rows = []
    if isinstance(sens, dict):
        for factor, terms in sorted(sens.items(), key=lambda kv: float(kv[0])):
            s_ = (terms or {}).get(term) if isinstance(terms, dict) else None
            if s_ and s_.get("mean") is not None and s_.get("ci"):
                rows.append((str(factor), s_))
    with _style():
        fig = _new(size=(7.0, 4.4 if rows else 3.4))[0]
        fig.clear()
        if rows:
            ax, bx = fig.subplots(2, 1, sharex=True, height_ratios=[3, 1.3])
        else:
            ax, bx = fig.subplots(1, 1), None
        ax.hist(d, bins=50, density=True, color=colour(r.id), alpha=0.45)
        ax.axvline(0, color="#777777", linewidth=0.8)
        ax.set_ylabel("posterior density")
        ax.set_title(f"Posterior of the product term ({r.label}, main prior)")
        if bx is not None:
            yy = np.arange(len(rows))[::-1]
            for i, (factor, s_) in enumerate(rows):
                lo, hi = s_["ci"]
                bx.errorbar(s_["mean"], yy[i], xerr=[[s_["mean"] - lo], [hi - s_["mean"]]], fmt="o", capsize=3,
                            color=colour(r.id) if float(factor) == 1 else "#555555")
            bx.set_yticks(yy, [f"prior SDs × {f}" for f, _ in rows])
            bx.set_ylim(-0.6, len(rows) - 0.4)
            bx.axvline(0, color="#777777", linewidth=0.8)
            bx.grid(axis="x", color="#e4e4e4")
            lv = rows[0][1].get("level", 0.95)
            bx.set_title(f"Prior sensitivity: posterior mean and {100 * lv:g}% interval", fontweight="normal", fontsize=9)
            bx.set_xlabel(f"{term} (raw scale)")
        else:
            ax.set_xlabel(f"{term} (raw scale)")
    return fig


def rank_figure(comparison: Comparison) -> Figure:
    """Rank plots (Vehtari et al. 2021) of the product term and the variance-model
    coefficients, per chain, from ``fit.idata``."""
    c = comparison
    r = _posterior(c)
    idata = getattr(r.fit, "idata", None)
    if idata is None or not hasattr(idata, "posterior"):
        raise MissingInput("the Bayesian fit holds no InferenceData with chains")
    post = idata.posterior
    series: list[tuple[str, np.ndarray]] = []
    if "beta" in post and "term" in post["beta"].dims:
        for t in c.design.interaction_terms:
            if t in list(post["beta"].term.values):
                series.append((f"product term {t}", np.asarray(post["beta"].sel(term=t).values, dtype=float)))
    if "gamma" in post and "variance_term" in post["gamma"].dims:
        for t in list(post["gamma"].variance_term.values)[:3]:
            series.append((f"log σ: {t}", np.asarray(post["gamma"].sel(variance_term=t).values, dtype=float)))
    if not series:
        for v in list(post.data_vars)[:4]:
            arr = np.asarray(post[v].values, dtype=float)
            series.append((str(v), arr.reshape(arr.shape[0], arr.shape[1], -1)[..., 0]))
    series = series[:4]
    if not series or series[0][1].ndim != 2:
        raise MissingInput("the posterior holds no chains to rank")
    from scipy.stats import rankdata  # noqa: PLC0415

    ncols = 2 if len(series) > 1 else 1
    nrows = (len(series) + 1) // 2 if len(series) > 1 else 1
    with _style():
        fig, axes = _new(nrows, ncols, size=(7.0, 2.3 * nrows + 0.4))
        for ax in axes.ravel()[len(series):]:
            ax.set_visible(False)
        for j, (name, arr) in enumerate(series):
            chains, n = arr.shape
            ranks = rankdata(arr.ravel()).reshape(chains, n)
            bins = np.linspace(0.5, chains * n + 0.5, 21)
            ax = axes.ravel()[j]
            for ch in range(chains):
                counts, _ = np.histogram(ranks[ch], bins=bins)
                ax.stairs(counts, bins, baseline=None, color=colour("", ch + 1), linewidth=1.1, label=f"chain {ch + 1}")
            ax.axhline(n / 20, color="#777777", linestyle="--", linewidth=0.8)
            ax.set_title(name, fontsize=9, fontweight="normal")
            ax.set_yticks([])
            ax.set_ylim(bottom=0)
            ax.set_xlabel("rank among all draws")
        handles, labels = axes.ravel()[0].get_legend_handles_labels()
        fig.legend(handles, labels, loc="outside lower center", ncol=min(len(labels), 4))
        fig.suptitle("Rank plots per chain (flat = chains agree; dashed: uniform)", x=0.01, ha="left", fontweight="bold")
    return fig


# ---- two moderators ------------------------------------------------------------------------
def heatmap_figure(comparison: Comparison) -> Figure:
    """Conditional slope over two continuous moderators (primary back-end's
    ``slope_grid``), cells whose interval excludes zero outlined."""
    c = comparison
    r = c.results.get(c.primary)
    grid = r.slope_grid if r is not None else None
    if grid is None:
        raise MissingInput("the model has fewer than two continuous moderators")
    m1, m2 = grid["moderators"]
    g1 = np.asarray(grid["values"][0], dtype=float)
    g2 = np.asarray(grid["values"][1], dtype=float)
    est = np.asarray(grid["estimate"], dtype=float)
    sig = np.asarray(grid["significant"], dtype=float)
    with _style() as plt:
        fig, axes = _new(size=(6.2, 4.8))
        ax = axes[0, 0]
        lim = float(np.nanmax(np.abs(est))) or 1.0
        mesh = ax.pcolormesh(g1, g2, est.T, cmap="PuOr_r", vmin=-lim, vmax=lim, shading="nearest")
        fig.colorbar(mesh, ax=ax, label=f"slope of {c.spec.focal}")
        if 0 < sig.sum() < sig.size:
            ax.contour(g1, g2, sig.T, levels=[0.5], colors="black", linewidths=1.4)
        if sig.sum() < sig.size:  # hatch where the interval includes zero
            ax.contourf(g1, g2, sig.T, levels=[-0.5, 0.5], colors="none", hatches=["///"])
        d = c.design
        if d.moderators[m1].values is not None:  # data read in chunks keep no rows to scatter
            ax.scatter(d.moderators[m1].values, d.moderators[m2].values, s=4, color="black", alpha=0.35,
                       linewidths=0, label="observed rows")
        ax.fill_between([], [], color="none", hatch="///", edgecolor="black", label=f"{100 * grid['level']:g}% interval includes 0")
        ax.set_xlabel(f"{m1} (raw scale)")
        ax.set_ylabel(f"{m2} (raw scale)")
        ax.grid(False)
        ax.set_title(f"Slope of {c.spec.focal} over {m1} and {m2} ({c.primary})")
        fig.legend(loc="outside lower center", ncol=2)
        del plt
    return fig


#: (file stem, title, caption, function) in appendix order.
FIGURES: list[tuple[str, str, str, Callable[[Comparison], Figure]]] = [
    ("slope", "Conditional slope across the moderator",
     "Each back-end's estimate with its pointwise interval band; dashed vertical lines mark where its interval "
     "starts or stops excluding zero (Johnson–Neyman boundaries); ticks at the bottom are the observed moderator "
     "values and the grey strips lie outside the observed range.", slope_figure),
    ("data", "Data and fitted lines",
     "Each point is one row used; its colour is the moderator value. Lines are the primary back-end's fitted "
     "means at the probe values, other terms at their reference values.", data_figure),
    ("residuals", "Residual diagnostics",
     "From the OLS fit. A funnel in the first panel or a rising cloud in the scale–location panel is the "
     "non-constant variance this appendix checks against.", residual_figure),
    ("variance", "Fitted variance function",
     "The residual SD per row as modelled by each back-end with a variance function.", variance_figure),
    ("linearity", "Binning check",
     "Slopes estimated within bins of the moderator; if they stray far from the line the product term "
     "(a linear change of slope) may be the wrong shape.", linearity_figure),
    ("calibration", "Calibration",
     "How often each back-end's product-term test is significant on data simulated without moderation but "
     "with this design's variance pattern; close to the nominal line is good, far above it means too many "
     "false findings.", calibration_figure),
    ("posterior", "Posterior of the product term",
     "Posterior densities under the main prior and any other prior scales checked.", posterior_figure),
    ("ranks", "Sampler rank plots",
     "Ranks of each chain's draws among all draws; flat histograms mean the chains agree.", rank_figure),
    ("heatmap", "Slope over two moderators",
     "The conditional slope of the focal predictor over both moderators (primary back-end); the black line "
     "separates where its interval excludes zero from the hatched area where it includes zero; dots are the "
     "observed rows, so empty corners are extrapolation.", heatmap_figure),
]


def save_figure(fig: Figure, stem: Path) -> tuple[Path, Path]:
    """Write ``fig`` as ``stem``.png and ``stem``.pdf; fixed metadata keeps reruns byte-identical."""
    png, pdf = stem.parent / f"{stem.name}.png", stem.parent / f"{stem.name}.pdf"
    fig.savefig(png, format="png", metadata={"Software": None})
    fig.set_layout_engine("none")  # keep the layout the PNG draw computed; saves a second solve
    fig.savefig(pdf, format="pdf", metadata={"CreationDate": None, "ModDate": None, "Producer": None, "Creator": None})
    return png, pdf


def render_figures(comparison: Comparison, folder: Path) -> list[FigureRecord]:
    """Write every figure as PNG and PDF into ``folder``; record skipped ones with the reason."""
    folder.mkdir(parents=True, exist_ok=True)
    records = []
    for stem, title, caption, func in FIGURES:
        try:
            fig = func(comparison)
        except MissingInput as exc:
            records.append(FigureRecord(stem, title, caption, skipped=str(exc)))
            continue
        png, pdf = save_figure(fig, folder / stem)
        records.append(FigureRecord(stem, title, caption, png=png, pdf=pdf))
    return records
