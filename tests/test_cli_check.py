"""The `check` command end to end: terminal table, JSON contract, exit codes."""
from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

from robustmod.cli import main
from robustmod.demo import DEMO_FOCAL, DEMO_FORMULA, DEMO_MODERATOR, demo_data

CONTRACT_MODEL_KEYS = {"formula", "focal", "moderators", "interaction_terms", "n_obs", "n_dropped", "alpha"}
CONTRACT_BACKEND_KEYS = {"coefficients", "interaction", "conditional_effects", "significance_region", "warnings"}
CONTRACT_SUMMARY_KEYS = {"primary", "supported_by", "not_supported_by", "unreliable", "sign_consistent", "survives", "sentence"}


def check_contract(d: dict) -> None:
    """The keys DESIGN.md's results contract promises (common practice of this project)."""
    assert d["schema"] == "robustmod/results-v1"
    assert CONTRACT_MODEL_KEYS <= set(d["model"])
    for bid, b in d["backends"].items():
        assert CONTRACT_BACKEND_KEYS <= set(b), bid
        if not b["available"]:
            continue
        it = b["interaction"]
        assert {"terms", "estimate", "se", "ci", "p", "supported"} <= set(it)
        for ce in b["conditional_effects"]:
            assert {"at", "estimate", "se", "ci", "p"} <= set(ce)
        reg = b["significance_region"]
        if reg is not None:
            assert {"moderator", "boundaries", "significant_intervals", "observed_range"} <= set(reg)
        for term in b["coefficients"].values():
            assert {"estimate", "se", "ci", "p"} <= set(term)
    assert CONTRACT_SUMMARY_KEYS <= set(d["summary"])
    diag = d["diagnostics"]
    assert {"statistic", "df", "p"} <= set(diag["breusch_pagan"])
    assert {"statistic", "df", "p"} <= set(diag["white"])
    text = json.dumps(d, allow_nan=False)  # NaN/inf never appear
    assert "NaN" not in text and "Infinity" not in text


@pytest.fixture()
def demo_csv(tmp_path):
    p = tmp_path / "trial.csv"
    demo_data().to_csv(p, index=False)
    return p


def test_check_json_continuous(demo_csv, capsys):
    before = demo_csv.read_bytes()
    rc = main(["check", str(demo_csv), "--formula", DEMO_FORMULA, "--focal", DEMO_FOCAL,
               "--moderator", DEMO_MODERATOR, "--backends", "ols,hc3", "--json"])
    assert rc == 0
    d = json.loads(capsys.readouterr().out)
    check_contract(d)
    assert d["model"]["interaction_terms"] == ["fertiliser:soil_moisture"]
    assert d["backends"]["hc3"]["significance_region"]["boundaries"]
    assert demo_csv.read_bytes() == before  # the input is never modified


def test_check_json_categorical(tmp_path, capsys):
    d = demo_data()
    d["soil_type"] = np.where(d["plot"] % 3 == 0, "clay", np.where(d["plot"] % 3 == 1, "loam", "sand"))
    p = tmp_path / "trial.tsv"
    d.to_csv(p, sep="\t", index=False)
    rc = main(["check", str(p), "--formula", "grain_yield ~ fertiliser * soil_type", "--focal", "fertiliser",
               "--moderator", "soil_type", "--backends", "ols,hc3,wild,wls", "--set", "wild.replications=999", "--json"])
    assert rc == 0
    out = json.loads(capsys.readouterr().out)
    check_contract(out)
    for bid in ("ols", "hc3", "wild", "wls"):
        it = out["backends"][bid]["interaction"]
        assert it["estimate"] is None and it["p"] is not None and len(it["terms"]) == 2, bid
    assert [ce["at"]["soil_type"] for ce in out["backends"]["hc3"]["conditional_effects"]] == ["clay", "loam", "sand"]


def test_check_terminal_table_and_probe_values(demo_csv, capsys):
    rc = main(["check", str(demo_csv), "--formula", DEMO_FORMULA, "--focal", DEMO_FOCAL,
               "--moderator", DEMO_MODERATOR, "--at", "15,25,35", "--backends", "ols,hc3", "--quiet"])
    assert rc == 0
    out = capsys.readouterr().out
    assert "Product term" in out and "hc3" in out
    # The appendix's own wording for the slopes, the probe value, and the variance diagnostics.
    assert "Slope of fertiliser at chosen values of soil_moisture" in out and "= 15" in out
    assert "Breusch–Pagan" in out and "Goldfeld–Quandt" in out


def test_check_subprocess_exit_codes(demo_csv):
    ok = subprocess.run([sys.executable, "-m", "robustmod.cli", "check", str(demo_csv), "--formula", DEMO_FORMULA,
                         "--focal", DEMO_FOCAL, "--moderator", DEMO_MODERATOR, "--backends", "ols,hc3", "--json"],
                        capture_output=True, text=True, timeout=120)
    assert ok.returncode == 0, ok.stderr
    json.loads(ok.stdout)
    bad = subprocess.run([sys.executable, "-m", "robustmod.cli", "check", str(demo_csv), "--formula",
                          "grain_yield ~ fertiliser * moisture", "--focal", DEMO_FOCAL, "--moderator", "moisture"],
                         capture_output=True, text=True, timeout=120)
    assert bad.returncode == 2
    lines = [ln for ln in bad.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and "moisture" in lines[0] and "Traceback" not in bad.stderr
    assert "soil_moisture" in lines[0]  # close match suggested


def test_compare_api_displays_share_one_summary():
    import robustmod

    res = robustmod.compare(demo_data(), DEMO_FORMULA, DEMO_FOCAL, DEMO_MODERATOR, backends=["ols", "hc3"])
    table = res.table()
    assert list(table.index) == ["ols", "hc3"]
    text, page = str(res), res._repr_html_()
    est = f"{res.results['hc3'].interaction['estimate']:.3g}"
    assert est in text and est in page
    assert res.summary["sentence"] in text
    assert isinstance(table, pd.DataFrame)
