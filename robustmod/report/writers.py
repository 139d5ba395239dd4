"""Write the sensitivity appendix folder.

``write_appendix`` builds everything in a temporary folder beside the target (same
file system) and moves it into place with one rename at the end, so a reader never sees
half an appendix and an existing folder is left untouched unless ``force=True`` (then it
is replaced only once the new one is complete).
"""
from __future__ import annotations

import base64
import csv
import io
import json
import os
import platform
import shutil
import sys
import tempfile
from collections.abc import Mapping, Sequence
from datetime import datetime, timezone
from importlib import metadata
from pathlib import Path
from typing import TYPE_CHECKING, Any

from ..compare import CAUTIONS
from ..errors import InputError

if TYPE_CHECKING:  # pragma: no cover
    from ..compare import Comparison
    from .figures import FigureRecord

#: Files every appendix holds (figures come on top, under figures/).
APPENDIX_FILES = ("appendix.html", "appendix.md", "tables.tex", "comparison.csv", "results.json", "provenance.json")
#: Distributions whose versions go into provenance.json.
DEPENDENCIES = ("numpy", "scipy", "pandas", "statsmodels", "formulaic", "pymc", "arviz", "matplotlib", "jinja2")



# ---- escaping -----------------------------------------------------------------------
_LATEX = {"\\": r"\textbackslash{}", "&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#", "_": r"\_", "{": r"\{",
          "}": r"\}", "~": r"\textasciitilde{}", "^": r"\textasciicircum{}", "<": r"\textless{}",
          ">": r"\textgreater{}", "|": r"\textbar{}", "[": "{[}", "]": "{]}", "\n": " ", "\r": " "}
_LATEX_UNICODE = {"–": "--", "—": "---", "±": r"$\pm$", "·": r"$\cdot$", "²": r"$^2$", "≥": r"$\geq$",
                  "≤": r"$\leq$", "α": r"$\alpha$", "√": r"$\surd$", "−": "-"}


def latex_escape(text: Any) -> str:
    """Escape a string for LaTeX text mode (every special character, one pass).

    Brackets are braced so that a cell starting with '[' after a row's \\\\ is not read as
    its optional argument.
    """
    return "".join(_LATEX.get(ch, _LATEX_UNICODE.get(ch, ch)) for ch in str(text))


def md_escape(text: Any) -> str:
    """Escape a string for inline Markdown text and table cells: emphasis, code, link and
    pipe characters get a backslash, HTML special characters become entities. (Line-start
    markers such as '#' or '-' need no escape: escaped text is never placed at a line start.)"""
    out = []
    for ch in str(text):
        if ch == "<":
            out.append("&lt;")
        elif ch == ">":
            out.append("&gt;")
        elif ch == "&":
            out.append("&amp;")
        elif ch in "\\`*_[]|~":
            out.append("\\" + ch)
        elif ch in "\r\n":
            out.append(" ")
        else:
            out.append(ch)
    return "".join(out)


def csv_guard(cell: Any) -> Any:
    """Prefix a quote to text a spreadsheet would run as a formula (= + - @, tab, CR).

    Common practice, no source beyond the OWASP note on CSV injection.
    """
    if isinstance(cell, str) and cell[:1] in ("=", "+", "-", "@", "\t", "\r"):
        return "'" + cell
    return cell


# ---- small formatters -------------------------------------------------------------
def _fmt(x: Any) -> str:
    from ..compare import fmt  # noqa: PLC0415

    return fmt(x)


def _fmt_p(p: Any) -> str:
    from ..compare import fmt_p  # noqa: PLC0415

    return fmt_p(p)


def _ci(ci: Any) -> str:
    if not ci or ci[0] is None and ci[1] is None:
        return "—"
    return f"[{_fmt(ci[0])}, {_fmt(ci[1])}]"


def _at(at: Mapping[str, Any]) -> str:
    return ", ".join(f"{k} = {_fmt(v) if not isinstance(v, str) else v}" for k, v in at.items())


def _boundaries(reg: Mapping[str, Any] | None) -> str:
    if reg is None:
        return "n/a"
    parts = []
    for b in reg.get("boundaries_detail") or [{"value": v, "within_observed": True} for v in reg["boundaries"]]:
        parts.append(_fmt(b["value"]) + ("" if b.get("within_observed", True) else " (outside observed)"))
    return ", ".join(parts) or "none (same verdict everywhere)"


def _json_value(x: Any) -> str:
    return json.dumps(x, allow_nan=False)


def _cell(v: Any) -> str:
    if isinstance(v, float):
        return _fmt(v)
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, list):
        if len(v) > 12:
            return f"({len(v)} values)"
        return "[" + ", ".join(_cell(x) for x in v) + "]"
    if isinstance(v, dict):
        return "; ".join(f"{k}: {_cell(x)}" for k, x in list(v.items())[:12]) or "none"
    return "—" if v is None else str(v)


def _blocks(obj: Any, title: str) -> list[dict[str, Any]]:
    """Render an unknown result dict as key–value lists and tables (one level of nesting)."""
    if not isinstance(obj, Mapping):
        return [{"title": title, "kv": [("value", _cell(obj))], "table": None}]
    kv, blocks = [], []
    for k, v in obj.items():
        if isinstance(v, Mapping) and v and all(isinstance(x, Mapping) for x in v.values()):
            cols: list[str] = []
            for x in v.values():
                cols += [c for c in x if c not in cols]
            table = [[str(k)] + cols] + [[str(r)] + [_cell(x.get(c)) for c in cols] for r, x in v.items()]
            blocks.append({"title": f"{title}: {k}", "kv": None, "table": table})
        elif isinstance(v, list) and v and all(isinstance(x, Mapping) for x in v) and len(v) <= 50:
            cols = []
            for x in v:
                cols += [c for c in x if c not in cols]
            table = [cols] + [[_cell(x.get(c)) for c in cols] for x in v]
            blocks.append({"title": f"{title}: {k}", "kv": None, "table": table})
        else:
            kv.append((str(k), _cell(v)))
    return ([{"title": title, "kv": kv, "table": None}] if kv else []) + blocks


# ---- the parts --------------------------------------------------------------------
def results_dict(comparison: "Comparison") -> tuple[dict[str, Any], dict[str, float]]:
    """The results contract, minus the wall-clock timings (those go to provenance so that
    results.json is byte-identical on a rerun with the same seed)."""
    res = comparison.to_dict()
    timings: dict[str, Any] = {}
    for bid, b in res["backends"].items():
        if "seconds" in b:
            timings[bid] = b.pop("seconds")
        if isinstance(b.get("extras"), dict) and "seconds" in b["extras"]:
            timings[f"{bid} (steps)"] = b["extras"].pop("seconds")
    if isinstance(res.get("calibration"), dict):
        for key in ("seconds", "workers"):  # how the run went, not what it found
            if key in res["calibration"]:
                timings[f"calibration {key}"] = res["calibration"].pop(key)
    return res, timings


def provenance(comparison: "Comparison", *, command_line: str | None, data_path: str | Path | None,
               timings: Mapping[str, float]) -> dict[str, Any]:
    from ..data import file_sha256  # noqa: PLC0415

    path = data_path if data_path is not None else comparison.data_source
    sha = None
    if path is not None and Path(path).is_file():
        sha = file_sha256(path)
    packages = {}
    for name in ("robustmod", *DEPENDENCIES):
        try:
            packages[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            packages[name] = "not installed"
    return {
        "created_utc": datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "command_line": command_line,
        "data_file": None if path is None else str(path),
        "data_sha256": sha,
        "formula": comparison.spec.formula,
        "focal": comparison.spec.focal,
        "moderators": list(comparison.spec.moderators),
        "seed": comparison.spec.seed,
        "alpha": comparison.spec.alpha,
        "python": platform.python_version(),
        "platform": platform.platform(),
        "packages": packages,
        "seconds_per_backend": dict(timings),
    }


def _rows(comparison: "Comparison", res: Mapping[str, Any]) -> list[dict[str, Any]]:
    rows = []
    usable = set(res["summary"]["supported_by"]) | set(res["summary"]["not_supported_by"])
    for bid, b in res["backends"].items():
        it = b.get("interaction") or {}
        if not b["available"]:
            rows.append({"id": bid, "label": b["label"], "primary": bid == comparison.primary, "usable": False,
                         "estimate": "unavailable", "se": "—", "ci": "—", "interval": b.get("reason") or "",
                         "p": "—", "supported": "—", "boundaries": "—", "share": "—",
                         "estimate_json": "null", "se_json": "null", "ci_json": "null", "p_json": "null"})
            continue
        joint = it.get("estimate") is None
        if it.get("p") is not None:
            p = _fmt_p(it["p"])
        elif it.get("prob_positive") is not None:
            p = f"P(>0) = {_fmt(it['prob_positive'])}"
        else:
            p = "—"
        reg = b.get("significance_region")
        rows.append({
            "id": bid, "label": b["label"], "primary": bid == comparison.primary, "usable": bid in usable,
            "estimate": "joint test" if joint else _fmt(it.get("estimate")),
            "se": _fmt(it.get("se")), "ci": (it.get("joint_test") or {}).get("method", "") if joint else _ci(it.get("ci")),
            "interval": "" if joint else it.get("interval") or "", "p": p,
            "supported": ("yes" if it.get("supported") else "no") + ("" if b["reliable"] else " (not counted: unreliable)"),
            "boundaries": _boundaries(reg), "share": _fmt(reg.get("share_of_observed_significant")) if reg else "—",
            "estimate_json": _json_value(it.get("estimate")), "se_json": _json_value(it.get("se")),
            "ci_json": _json_value(it.get("ci")), "p_json": _json_value(it.get("p")),
        })
    return rows


def _slopes(res: Mapping[str, Any]) -> list[dict[str, Any]]:
    out = []
    for bid, b in res["backends"].items():
        for ce in b.get("conditional_effects") or []:
            out.append({"id": bid, "at": _at(ce["at"]), "estimate": _fmt(ce["estimate"]), "se": _fmt(ce["se"]),
                        "ci": _ci(ce["ci"]), "p": _fmt_p(ce["p"]), "significant": "yes" if ce.get("significant") else "no",
                        "within": "yes" if ce.get("within_observed", True) else "outside"})
    return out


_TEST_NAMES = {"breusch_pagan": "Breusch–Pagan", "white": "White", "goldfeld_quandt": "Goldfeld–Quandt"}


def _range(r: Any) -> str:
    return f"{_fmt(r[0])} to {_fmt(r[1])}" if isinstance(r, list) and len(r) == 2 else "—"


def _spread_block(d: Mapping[str, Any]) -> dict[str, Any]:
    rows = [["moderator bin", "rows", "residual SD"]]
    for b in d.get("bins") or []:
        where = str(b["level"]) if b.get("level") is not None else _range(b.get("range"))
        rows.append([where, _cell(b.get("n")), _fmt(b.get("sd"))])
    kv = [("moderator", str(d.get("moderator"))), ("largest / smallest SD", _fmt(d.get("ratio"))),
          ("how", str(d.get("form", "")))]
    return {"title": "Residual spread across the moderator", "kv": kv, "table": rows}


def _gap_block(d: Mapping[str, Any]) -> dict[str, Any]:
    rows = [["product term", "classical SE", "HC3 SE", "HC3 / classical"]]
    for i, t in enumerate(d.get("terms") or []):
        pick = lambda k: (d.get(k) or [None] * (i + 1))[i]  # noqa: E731
        rows.append([str(t), _fmt(pick("classical_se")), _fmt(pick("hc3_se")), _fmt(pick("ratio"))])
    kv = [("large gap (ratio beyond the threshold)", _cell(d.get("large"))), ("threshold", _fmt(d.get("threshold"))),
          ("note", str(d.get("note", "")))]
    return {"title": "Classical against HC3 standard error of the product term", "kv": kv, "table": rows}


def _linearity_block(d: Mapping[str, Any]) -> dict[str, Any]:
    rows = [["moderator bin", "rows", "median", "slope in bin", "interval", "linear model's slope", "its interval", "flags"]]
    for b in d.get("bins") or []:
        flags = [name for name in ("thin", "low_focal_variation", "outside") if b.get(name)]
        rows.append([_range(b.get("range")), _cell(b.get("n")), _fmt(b.get("median")), _fmt(b.get("estimate")),
                     _ci(b.get("ci")), _fmt(b.get("linear_prediction")), _ci(b.get("linear_ci")),
                     ", ".join(f.replace("_", " ") for f in flags) or "—"])
    w = d.get("wald") or {}
    kv = [("moderator", str(d.get("moderator"))), ("method", str(d.get("method", ""))),
          ("test that the bins add nothing", f"{w.get('method', '')}; p = {_fmt_p(w.get('p'))}" if w else "—"),
          ("departure from a linear change of slope", _cell(d.get("nonlinear")))]
    kv += [("note", str(n)) for n in d.get("notes") or []]
    return {"title": "Binning check of the linear interaction", "kv": kv, "table": rows}


_BLOCKS = {"residual_spread": _spread_block, "se_gap": _gap_block, "linearity": _linearity_block}


def _diagnostics(res: Mapping[str, Any]) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    tests, other, flags = [], [], []
    for key, d in (res.get("diagnostics") or {}).items():
        if key == "alpha":
            continue
        if key == "non_constant_variance":
            flags.append(("a variance test rejects constant spread at this alpha", _cell(d)))
            continue
        if key in _BLOCKS and isinstance(d, Mapping):
            try:
                other.append(_BLOCKS[key](d))
            except (KeyError, TypeError, IndexError, AttributeError):  # a shape we do not know: show it plainly
                other += _blocks(d, key.replace("_", " ").capitalize())
            continue
        if key in _TEST_NAMES:
            if d is None:
                tests.append({"name": _TEST_NAMES[key], "statistic": "—", "df": "—", "p": "—",
                              "form": "not computed for this design"})
                continue
            tests.append({"name": _TEST_NAMES[key], "statistic": _fmt(d.get("statistic")), "df": _cell(d.get("df")),
                          "p": _fmt_p(d.get("p")), "form": d.get("form", "")})
        elif d is not None:
            other += _blocks(d, key.replace("_", " ").capitalize())
    if flags:
        other.insert(0, {"title": "", "kv": flags, "table": None})
    return tests, other


def _calibration(res: Mapping[str, Any]) -> dict[str, Any] | None:
    cal = res.get("calibration")
    if not cal:
        return None
    fpr, power = cal.get("false_positive_rate") or {}, cal.get("power") or {}
    rows = []
    for bid in list(fpr) + [b for b in power if b not in fpr]:
        f, p = fpr.get(bid) or {}, power.get(bid) or {}
        rows.append({"id": bid, "fpr": _fmt(f.get("rate")), "fpr_se": _fmt(f.get("mc_se")),
                     "power": _fmt(p.get("rate")), "power_se": _fmt(p.get("mc_se"))})
    kv = [(str(k), _cell(v)) for k, v in cal.items() if k not in ("false_positive_rate", "power", "n_datasets", "alpha")]
    return {"n_datasets": cal.get("n_datasets"), "alpha": cal.get("alpha"), "rows": rows, "kv": kv}


def _summary_rows(table: Mapping[str, Any], first: str) -> list[list[str]]:
    rows = [[first, "posterior mean", "posterior SD", "interval"]]
    for name, x in table.items():
        if isinstance(x, Mapping) and "mean" in x:
            lv = x.get("level")
            rows.append([str(name), _fmt(x.get("mean")), _fmt(x.get("sd")),
                         _ci(x.get("ci")) + (f" ({100 * lv:g}%)" if isinstance(lv, (int, float)) else "")])
    return rows


def _bayes_blocks(ex: Mapping[str, Any]) -> list[dict[str, Any]]:
    """The Bayesian back-end's extras: convergence, LOO, variance model, prior sensitivity."""
    blocks: list[dict[str, Any]] = []
    done = {"seconds"}
    diag = ex.get("diagnostics")
    if isinstance(diag, Mapping):
        th = diag.get("thresholds") or {}
        rh = diag.get("max_rhat")
        kv = [("largest R-hat", f"{'—' if rh is None else format(rh, '.4f')} (want below {_fmt(th.get('rhat_max'))})"),
              ("smallest bulk ESS", f"{_fmt(diag.get('min_ess_bulk'))} (want at least {_fmt(th.get('ess_min'))})"),
              ("smallest tail ESS", f"{_fmt(diag.get('min_ess_tail'))} (want at least {_fmt(th.get('ess_min'))})"),
              ("divergent transitions", _cell(diag.get("divergences")))]
        table = None
        per = diag.get("per_term")
        if isinstance(per, Mapping) and per:
            table = [["coefficient", "R-hat", "bulk ESS", "tail ESS"]] + [
                [str(t), "—" if v.get("rhat") is None else format(v["rhat"], ".4f"), _fmt(v.get("ess_bulk")), _fmt(v.get("ess_tail"))] for t, v in per.items()]
        blocks.append({"title": "Convergence (rank-normalised R-hat and ESS; Vehtari et al. 2021)", "kv": kv, "table": table})
        done.add("diagnostics")
    loo = ex.get("loo")
    if isinstance(loo, Mapping) and "elpd_difference" in loo:
        table = [["variance model", "elpd (PSIS-LOO)", "SE", "p_loo", "rows with Pareto k > 0.7"]]
        for key in ("heteroscedastic", "constant_variance"):
            v = loo.get(key) or {}
            table.append([key.replace("_", " "), _fmt(v.get("elpd_loo")), _fmt(v.get("se")), _fmt(v.get("p_loo")),
                          _cell(v.get("pareto_k_above_0.7"))])
        kv = [("elpd difference (modelled − constant variance)",
               f"{_fmt(loo.get('elpd_difference'))} ± {_fmt(loo.get('elpd_difference_se'))} (SE)"),
              ("preferred", str(loo.get("preferred", "")).replace("_", " "))]
        blocks.append({"title": "Does modelling the variance improve prediction? (PSIS-LOO)", "kv": kv, "table": table})
        done.add("loo")
    vm = ex.get("variance_model")
    if isinstance(vm, Mapping):
        blocks.append({"title": "Variance model: coefficients of log σ (user's scale)", "kv": None,
                       "table": _summary_rows({k: v for k, v in vm.items() if k != "terms"}, "term")})
        done.add("variance_model")
    ps = ex.get("prior_sensitivity")
    if isinstance(ps, Mapping) and isinstance(ps.get("product_term"), Mapping):
        table = [["prior SDs ×", "product term", "posterior mean", "posterior SD", "interval"]]
        for factor, terms in sorted(ps["product_term"].items(), key=lambda kv: float(kv[0])):
            for row in _summary_rows(terms, "term")[1:]:
                table.append([str(factor)] + row)
        kv = [("largest shift of the posterior mean (in posterior SDs)", _fmt(ps.get("max_shift_in_posterior_sd"))),
              ("note", str(ps.get("note", "")))]
        blocks.append({"title": "Prior sensitivity of the product term", "kv": kv, "table": table})
        done.add("prior_sensitivity")
    pc = ex.get("predictive_check")
    if isinstance(pc, Mapping) and isinstance(pc.get("bins"), list) and isinstance(pc.get("observed_sd"), list):
        models = [k for k in ("heteroscedastic", "constant_variance") if isinstance(pc.get(k), Mapping)]
        lv = pc.get("level")
        head = ["moderator bin", "rows", "observed SD of y"] + [
            f"{k.replace('_', ' ')} model: {100 * lv:g}% predictive interval" if isinstance(lv, float) else k
            for k in models]
        table = [head]
        for i, b in enumerate(pc["bins"]):
            row = [_range(b) if isinstance(b, list) else str(b), _cell((pc.get("n_per_bin") or [None] * (i + 1))[i]),
                   _fmt(pc["observed_sd"][i])]
            for k in models:
                lo, hi = pc[k].get("lower") or [], pc[k].get("upper") or []
                row.append(_ci([lo[i], hi[i]]) if i < len(lo) and i < len(hi) else "—")
            table.append(row)
        kv = [(f"bins outside the interval, {k.replace('_', ' ')} model", _cell(pc[k].get("bins_outside"))) for k in models]
        blocks.append({"title": f"Posterior predictive check of the spread across {pc.get('moderator', 'the moderator')}",
                       "kv": kv, "table": table})
        done.add("predictive_check")
    if isinstance(ex.get("sampler"), Mapping):
        blocks += _blocks(ex["sampler"], "Sampler settings")
        done.add("sampler")
    rest = {k: v for k, v in ex.items() if k not in done}
    if rest:
        blocks += _blocks(rest, "Other checks")
    return blocks


def _figure_src(rec: "FigureRecord") -> str | None:
    if rec.png is None:
        return None
    return "data:image/png;base64," + base64.b64encode(rec.png.read_bytes()).decode("ascii")


def context(comparison: "Comparison", res: Mapping[str, Any], prov: Mapping[str, Any],
            figures: Sequence["FigureRecord"]) -> dict[str, Any]:
    """Everything the HTML and Markdown need, as display strings (user text left raw: the
    templates escape it)."""
    model = res["model"]
    level_pct = f"{100 * (1 - model['alpha']):g}%"
    mods = []
    for name, s in model["moderator_summary"].items():
        mods.append({"name": name, "type": "categorical" if s["categorical"] else "continuous",
                     "mean": _fmt(s["mean"]), "sd": _fmt(s["sd"]), "min": _fmt(s["min"]), "max": _fmt(s["max"]),
                     "levels": ", ".join(str(v) for v in s["levels"]) or "—"})
    tests, other = _diagnostics(res)
    posterior = [k for k, v in res["backends"].items() if v.get("kind") == "posterior"
                 or (not v["available"] and k == "bayes")]
    b = res["backends"][posterior[0]] if posterior else None
    bayes, bayes_missing = None, "No Bayesian fit in this comparison (add the bayes back-end)."
    if b is not None and b["available"]:
        bayes = {"label": b["label"], "blocks": _bayes_blocks(b.get("extras") or {})}
    elif b is not None:
        bayes_missing = f"The Bayesian back-end gave no answer: {b.get('reason')}"
    regions = [r.significance_region for r in comparison.results.values() if r.significance_region]
    shifts = []
    s = res["summary"]
    for bid in s.get("relative_change_of_estimate") or {}:
        bs = (s.get("boundary_shift") or {}).get(bid) or {}
        shifts.append({"id": bid, "est": _fmt(s["relative_change_of_estimate"].get(bid)),
                       "width": _fmt((s.get("relative_change_of_interval_width") or {}).get(bid)),
                       "shift": _fmt(bs.get("max_shift")) if bs.get("same_shape", True) else "different number of boundaries inside the observed range",
                       "share": _fmt(bs.get("share_of_observed_range"))})
    data_file = prov.get("data_file")
    return {
        "version": prov["packages"].get("robustmod", ""), "schema": res["schema"], "model": model, "summary": s,
        "level_pct": level_pct, "probe_points": [_at(pt) for pt in model["probe_points"]],
        "data_name": Path(data_file).name if data_file else None, "data_sha": prov.get("data_sha256"),
        "moderator_rows": mods, "warnings": res.get("warnings") or [],
        "rows": _rows(comparison, res), "slopes": _slopes(res),
        "region_moderator": regions[0]["moderator"] if regions else "no continuous moderator",
        "backend_warnings": [(bid, w) for bid, bb in res["backends"].items() for w in bb.get("warnings") or []],
        "shifts": shifts, "diagnostics": tests, "diagnostics_other": other,
        "has_linearity": (res.get("diagnostics") or {}).get("linearity") is not None,
        "calibration": _calibration(res), "bayes": bayes, "bayes_missing": bayes_missing,
        "figures": [{"name": f.name, "title": f.title, "caption": f.caption, "skipped": f.skipped,
                     "src": _figure_src(f), "png": f.png, "pdf": f.pdf} for f in figures],
        "cautions": CAUTIONS, "provenance": prov, "data_note": None,
    }


def render_html(ctx: Mapping[str, Any]) -> str:
    import jinja2  # noqa: PLC0415

    from .templates import HTML  # noqa: PLC0415

    env = jinja2.Environment(autoescape=True, undefined=jinja2.StrictUndefined, keep_trailing_newline=True)
    return env.from_string(HTML).render(**ctx)


def _md_table(header: Sequence[str], rows: Sequence[Sequence[Any]]) -> list[str]:
    out = ["| " + " | ".join(md_escape(h) for h in header) + " |", "|" + "---|" * len(header)]
    out += ["| " + " | ".join(md_escape(c) for c in r) + " |" for r in rows]
    return out + [""]


def render_markdown(ctx: Mapping[str, Any]) -> str:
    """The appendix as Markdown, for pasting into a manuscript's supplement."""
    m, s, lv = ctx["model"], ctx["summary"], ctx["level_pct"]
    e = md_escape
    lines = ["# Sensitivity appendix", ""] + ([e(ctx["data_note"]), ""] if ctx.get("data_note") else []) + [
             f"Model {e(m['formula'])}: focal predictor {e(m['focal'])}, moderator(s) "
             f"{e(', '.join(m['moderators']))}; {m['n_obs']} rows used, {m['n_dropped']} dropped; alpha = {m['alpha']:g}; "
             f"primary back-end {e(s['primary'])}; coefficients on the {e(m['scale'])}.", "",
             "## Robustness summary", "", e(s["sentence"]), "",
             "## Comparison of back-ends", "",
             f"Product term {e(' + '.join(m['interaction_terms']))}; intervals at {lv}; boundaries on the raw moderator scale.", ""]
    lines += _md_table(["back-end", "method", "estimate", "SE", f"{lv} interval", "interval type", "p (or P(>0))",
                        "supported", f"region boundaries ({ctx['region_moderator']})"],
                       [[r["id"], r["label"], r["estimate"], r["se"], r["ci"], r["interval"], r["p"], r["supported"],
                         r["boundaries"]] for r in ctx["rows"]])
    lines += [f"## Conditional slope of {e(m['focal'])} at the probe values", ""]
    lines += _md_table(["back-end", "at (raw scale)", "slope", "SE", f"{lv} interval", "p", "within observed range"],
                       [[x["id"], x["at"], x["estimate"], x["se"], x["ci"], x["p"], x["within"]] for x in ctx["slopes"]])
    lines += ["## Variance diagnostics (OLS residuals)", ""]
    lines += _md_table(["test", "statistic", "df", "p", "form"],
                       [[d["name"], d["statistic"], d["df"], d["p"], d["form"]] for d in ctx["diagnostics"]])
    for block in ctx["diagnostics_other"]:
        lines += [f"### {e(block['title'])}", ""] if block["title"] else []
        if block["table"]:
            lines += _md_table(block["table"][0], block["table"][1:])
        for k, v in block["kv"] or []:
            lines.append(f"- {e(k)}: {e(v)}")
        lines.append("")
    cal = ctx["calibration"]
    lines += ["## Calibration", ""]
    if cal:
        lines += [f"{cal['n_datasets']} simulated datasets; nominal alpha = {cal['alpha']}.", ""]
        lines += _md_table(["back-end", "false-positive rate", "MC SE", "power", "MC SE"],
                           [[c["id"], c["fpr"], c["fpr_se"], c["power"], c["power_se"]] for c in cal["rows"]])
    else:
        lines += ["No calibration was run.", ""]
    lines += ["## Bayesian diagnostics", ""]
    if ctx["bayes"]:
        for block in ctx["bayes"]["blocks"]:
            lines += [f"### {e(block['title'])}", ""] if block["title"] else [] if block["title"] else []
            if block["table"]:
                lines += _md_table(block["table"][0], block["table"][1:])
            for k, v in block["kv"] or []:
                lines.append(f"- {e(k)}: {e(v)}")
            lines.append("")
    else:
        lines += [e(ctx["bayes_missing"]), ""]
    lines += ["## Figures", ""]
    for f in ctx["figures"]:
        if f["png"] is not None:
            lines += [f"![{e(f['title'])}](figures/{f['name']}.png)", "", f"*{e(f['title'])}.* {e(f['caption'])}", ""]
        else:
            lines += [f"*{e(f['title'])}: not drawn ({e(f['skipped'])}).*", ""]
    lines += ["## Cautions", ""] + [f"- {e(c)}" for c in ctx["cautions"]] + [""]
    p = ctx["provenance"]
    lines += ["## Provenance", "", f"- written: {p['created_utc']}", f"- command: {e(p['command_line'] or 'called from Python')}",
              f"- data SHA-256: {p['data_sha256'] or 'not a file'}", f"- seed: {p['seed']}",
              "- versions: " + e(", ".join(f"{k} {v}" for k, v in p["packages"].items())), ""]
    return "\n".join(lines)


def _tex_table(caption: str, label: str, header: Sequence[str], rows: Sequence[Sequence[Any]], align: str) -> list[str]:
    t = latex_escape
    out = [r"\begin{table}[htbp]", r"\centering", r"\small", rf"\caption{{{t(caption)}}}", rf"\label{{{label}}}",
           rf"\begin{{tabular}}{{{align}}}", r"\toprule", " & ".join(t(h) for h in header) + r" \\", r"\midrule"]
    out += [" & ".join(t(c) for c in r) + r" \\" for r in rows]
    return out + [r"\bottomrule", r"\end{tabular}", r"\end{table}", ""]


def render_latex(ctx: Mapping[str, Any]) -> str:
    """booktabs tables for a manuscript (needs \\usepackage{booktabs}); every string escaped."""
    m, s, lv = ctx["model"], ctx["summary"], ctx["level_pct"]
    lines = ["% Sensitivity appendix tables. Needs \\usepackage{booktabs} in the preamble.", ""]
    cap = (f"Product term {' + '.join(m['interaction_terms'])} under each variance treatment "
           f"(model {m['formula']}; {m['n_obs']} rows; {lv} intervals; coefficients on the {m['scale']}; "
           f"primary back-end {s['primary']}). {s['sentence']}")
    lines += _tex_table(cap, "tab:robustmod-comparison",
                        ["back-end", "method", "estimate", "SE", f"{lv} interval", "p (or P(>0))", "supported",
                         f"region boundaries ({ctx['region_moderator']})"],
                        [[r["id"], r["label"], r["estimate"], r["se"], r["ci"], r["p"], r["supported"], r["boundaries"]]
                         for r in ctx["rows"]], "llrrrrll")
    lines += _tex_table(f"Conditional slope of {m['focal']} at the probe values (raw scale; {lv} intervals).",
                        "tab:robustmod-slopes", ["back-end", "at", "slope", "SE", f"{lv} interval", "p", "within range"],
                        [[x["id"], x["at"], x["estimate"], x["se"], x["ci"], x["p"], x["within"]] for x in ctx["slopes"]],
                        "llrrrrl")
    lines += _tex_table("Variance diagnostics of the OLS residuals.", "tab:robustmod-diagnostics",
                        ["test", "statistic", "df", "p"],
                        [[d["name"], d["statistic"], d["df"], d["p"]] for d in ctx["diagnostics"]], "lrrr")
    cal = ctx["calibration"]
    if cal:
        lines += _tex_table(f"Calibration: {cal['n_datasets']} simulated datasets, nominal alpha = {cal['alpha']}.",
                            "tab:robustmod-calibration", ["back-end", "false-positive rate", "MC SE", "power", "MC SE"],
                            [[c["id"], c["fpr"], c["fpr_se"], c["power"], c["power_se"]] for c in cal["rows"]], "lrrrr")
    return "\n".join(lines)


def render_csv(comparison: "Comparison") -> str:
    """The comparison table as CSV, text cells guarded against formula injection."""
    table = comparison.table().reset_index()
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow([csv_guard(str(c)) for c in table.columns])
    for row in table.itertuples(index=False):
        w.writerow(["" if v is None or (isinstance(v, float) and v != v) else csv_guard(v) for v in row])
    return buf.getvalue()


def _dump(obj: Any) -> str:
    return json.dumps(obj, allow_nan=False, sort_keys=True, indent=2, ensure_ascii=False) + "\n"


# ---- the folder ---------------------------------------------------------------------
def _check_target(out: Path, force: bool) -> None:
    if out.exists() and not out.is_dir():
        raise InputError(f"The output path '{out}' is a file, not a folder; choose another --out.")
    if out.exists() and not force:
        raise InputError(f"The output folder '{out}' already exists and was left untouched; "
                         "pass --force to replace it or choose another --out.")


def write_appendix(comparison: "Comparison", out_dir: str | Path, *, force: bool = False,
                   command_line: str | None = None, data_path: str | Path | None = None,
                   progress: bool = False, data_note: str | None = None) -> Path:
    """Write the appendix folder for ``comparison`` and return its path.

    Parameters
    ----------
    comparison : Comparison
        The result of :func:`robustmod.compare`.
    out_dir : path
        The folder to create. If it exists it is left untouched unless ``force``.
    force : bool, default=False
        Replace an existing folder (only after the new one is complete).
    command_line : str, optional
        Recorded in provenance.json.
    data_path : path, optional
        The data file whose SHA-256 is recorded (default: the comparison's data source).
    progress : bool, default=False
        Print the steps on stderr.
    data_note : str, optional
        A line about the data shown at the top of the page (e.g. that they are invented).

    Returns
    -------
    Path of the appendix folder.

    Notes
    -----
    Built in a hidden temporary folder beside ``out_dir`` and renamed into place when complete
    (an atomic rename on one filesystem), so a failure leaves nothing half-written.
    """
    from .figures import render_figures  # noqa: PLC0415  (matplotlib only when writing)

    out = Path(out_dir).expanduser()
    out = out.parent.resolve() / out.name if out.name else out.resolve()
    _check_target(out, force)
    parent = out.parent
    try:
        parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=parent))
    except OSError as exc:
        raise InputError(f"The output folder '{out}' cannot be created ({exc.strerror or exc}); "
                         "choose a writable location with --out.") from None
    try:
        def step(msg: str) -> None:
            if progress:
                sys.stderr.write(f"appendix: {msg}\n")

        res, timings = results_dict(comparison)
        prov = provenance(comparison, command_line=command_line, data_path=data_path, timings=timings)
        step("drawing figures")
        figures = render_figures(comparison, tmp / "figures")
        ctx = context(comparison, res, prov, figures)
        ctx["data_note"] = data_note
        step("writing pages and tables")
        (tmp / "results.json").write_text(_dump(res), encoding="utf-8")
        (tmp / "provenance.json").write_text(_dump(prov), encoding="utf-8")
        (tmp / "appendix.html").write_text(render_html(ctx), encoding="utf-8")
        (tmp / "appendix.md").write_text(render_markdown(ctx), encoding="utf-8")
        (tmp / "tables.tex").write_text(render_latex(ctx), encoding="utf-8")
        (tmp / "comparison.csv").write_text(render_csv(comparison), encoding="utf-8")
        os.chmod(tmp, 0o755)  # mkdtemp makes it private; the appendix is for sharing
        _move_into_place(tmp, out, force)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    step(f"written to {out}")
    return out


def _move_into_place(tmp: Path, out: Path, force: bool) -> None:
    """Rename the finished folder onto ``out``; with force the old one goes only afterwards."""
    if not out.exists():
        try:
            os.rename(tmp, out)
        except OSError as exc:
            raise InputError(f"The output folder '{out}' could not be created ({exc.strerror or exc}); "
                             "choose another --out.") from None
        return
    if not force:
        raise InputError(f"The output folder '{out}' appeared while the appendix was being written and was left "
                         "untouched; pass --force to replace it.")
    old = Path(tempfile.mkdtemp(prefix=f".{out.name}.old-", dir=out.parent))
    os.rename(out, old / out.name)
    try:
        os.rename(tmp, out)
    except OSError:
        os.rename(old / out.name, out)  # put the old folder back
        raise
    shutil.rmtree(old, ignore_errors=True)
