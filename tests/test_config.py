"""The TOML analysis file and ``robustmod appendix --config``."""
from __future__ import annotations

import json
from pathlib import Path

import pytest
import statsmodels.formula.api as smf

from robustmod.cli import main
from robustmod.config import TOP_KEYS, compare_arguments, load_config
from robustmod.demo import DEMO_FOCAL, DEMO_FORMULA, DEMO_MODERATOR, demo_data
from robustmod.errors import InputError

CONFIG = f"""
data = "data/trial.csv"
formula = "{DEMO_FORMULA}"
focal = "{DEMO_FOCAL}"
moderators = ["{DEMO_MODERATOR}"]
backends = ["ols", "hc3"]
primary = "hc3"
alpha = 0.1
seed = 11
center = false

[probe]
{DEMO_MODERATOR} = [15, 25, 35]

[options.hc3]

[output]
folder = "out/appendix"
force = false
"""


@pytest.fixture()
def project(tmp_path: Path) -> Path:
    (tmp_path / "data").mkdir()
    demo_data().to_csv(tmp_path / "data" / "trial.csv", index=False)
    (tmp_path / "analysis.toml").write_text(CONFIG)
    return tmp_path


def test_load_config_resolves_paths_against_the_file(project: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir("/")
    cfg = load_config(project / "analysis.toml")
    assert cfg["data"] == str((project / "data" / "trial.csv").resolve())
    assert cfg["out"] == str((project / "out" / "appendix").resolve())
    assert cfg["moderator"] == [DEMO_MODERATOR]
    assert cfg["probe"] == {DEMO_MODERATOR: [15, 25, 35]}
    assert cfg["alpha"] == 0.1 and cfg["seed"] == 11 and cfg["force"] is False
    kw = compare_arguments(cfg)
    assert "data" not in kw and "out" not in kw and kw["options"] == {"hc3": {}}


def test_appendix_from_config(project: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["appendix", "--config", str(project / "analysis.toml"), "--quiet"]) == 0
    out = project / "out" / "appendix"
    assert str(out / "appendix.html") in capsys.readouterr().out
    res = json.loads((out / "results.json").read_text())
    assert res["model"]["alpha"] == 0.1 and res["model"]["seed"] == 11
    assert set(res["backends"]) == {"ols", "hc3"}
    assert [ce["at"][DEMO_MODERATOR] for ce in res["backends"]["hc3"]["conditional_effects"]] == [15, 25, 35]
    # Reference library: statsmodels HC3 at alpha 0.1 gives the same 90% interval of the product term.
    ref = smf.ols(DEMO_FORMULA, data=demo_data()).fit(cov_type="HC3", use_t=True)
    lo, hi = ref.conf_int(alpha=0.1).loc["fertiliser:soil_moisture"]
    assert res["backends"]["hc3"]["interaction"]["ci"] == pytest.approx([lo, hi], rel=1e-8)
    # A command-line option overrides the file, and the existing folder is refused without --force.
    assert main(["appendix", "--config", str(project / "analysis.toml"), "--quiet", "--alpha", "0.05"]) == 2
    assert "already exists" in capsys.readouterr().err
    assert main(["appendix", "--config", str(project / "analysis.toml"), "--quiet", "--alpha", "0.05",
                 "--out", str(project / "other")]) == 0
    assert json.loads((project / "other" / "results.json").read_text())["model"]["alpha"] == 0.05


def test_unknown_key_names_it_and_the_valid_ones(tmp_path: Path) -> None:
    p = tmp_path / "a.toml"
    p.write_text('formula = "y ~ x * w"\nmoderater = "w"\n')
    with pytest.raises(InputError) as exc:
        load_config(p)
    msg = str(exc.value)
    assert "'moderater'" in msg and all(k in msg for k in TOP_KEYS)
    p.write_text('[output]\nfolder = "x"\nforse = true\n')
    with pytest.raises(InputError, match=r"'forse'.*\[output\].*folder, force"):
        load_config(p)


@pytest.mark.parametrize(("text", "key"), [
    ("alpha = 1.5", "alpha"), ("alpha = true", "alpha"), ("seed = 1.5", "seed"), ("calibration = 5", "calibration"),
    ("moderators = []", "moderators"), ('moderators = ["a", "b", "c"]', "moderators"), ("center = 1", "center"),
    ("backends = [1]", "backends"), ('options = { wild = 3 }', "options"), ("formula = 3", "formula"),
    ("[output]\nforce = 'yes'", "output.force"), ("probe = 3", "probe"), ("calibrate_costly = 1", "calibrate_costly"),
])
def test_bad_values_are_one_line_errors(tmp_path: Path, text: str, key: str) -> None:
    p = tmp_path / "bad.toml"
    p.write_text(text + "\n")
    with pytest.raises(InputError) as exc:
        load_config(p)
    msg = str(exc.value)
    assert f"'{key}' must be" in msg and "\n" not in msg


def test_unreadable_config_files(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(InputError, match="does not exist"):
        load_config(tmp_path / "missing.toml")
    p = tmp_path / "broken.toml"
    p.write_text("formula = \n")
    with pytest.raises(InputError, match="not valid TOML"):
        load_config(p)
    assert main(["appendix", "--config", str(p)]) == 2
    assert capsys.readouterr().err.count("\n") == 1


def test_appendix_without_data_or_model_is_a_clear_error(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["appendix", "--out", str(tmp_path / "x")]) == 2
    assert "No data file given" in capsys.readouterr().err
    data = tmp_path / "d.csv"
    demo_data().to_csv(data, index=False)
    assert main(["appendix", str(data), "--focal", DEMO_FOCAL, "--moderator", DEMO_MODERATOR]) == 2
    assert "--formula" in capsys.readouterr().err
    assert not (tmp_path / "x").exists()
