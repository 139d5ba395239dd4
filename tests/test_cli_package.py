"""The command line as a package: quick start, defaults in the help, the new switches, step lines.

Checks here are of the command line's own behaviour (common practice for command-line tools,
no source) and of the shared defaults module; the statistics are tested elsewhere.
"""
from __future__ import annotations

import ast
import importlib
import inspect
import json
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest

import robustmod
from robustmod import defaults
from robustmod.cli import main
from robustmod.cli import options as cli_options
from robustmod.demo import DEMO_FOCAL, DEMO_FORMULA, DEMO_MODERATOR, demo_data
from robustmod.errors import InputError

PACKAGE = Path(robustmod.__file__).resolve().parent
HEAVY = ("pandas", "scipy")


def compare_module() -> Any:  # noqa: N802  (reads as the module it returns)
    """The module robustmod.compare (the package attribute of that name is the function)."""
    return importlib.import_module("robustmod.compare")


def _imported_after(code: str) -> dict[str, bool]:
    """Run ``code`` in a fresh interpreter; which heavy libraries did it import?"""
    probe = f"{code}\nimport sys, json\nprint(json.dumps({{m: m in sys.modules for m in {HEAVY!r}}}))"
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    return json.loads(out.stdout.strip().splitlines()[-1])


@pytest.mark.parametrize("command", [[], ["check"], ["appendix"], ["demo"], ["backends"]])
def test_help_imports_neither_pandas_nor_scipy(command: list[str]) -> None:
    code = ("import contextlib, io\nfrom robustmod.cli import main\n"
            f"with contextlib.redirect_stdout(io.StringIO()):\n"
            f"    try:\n        main({[*command, '--help']!r})\n    except SystemExit as e:\n"
            f"        assert e.code == 0, e.code")
    assert _imported_after(code) == {m: False for m in HEAVY}


def test_import_robustmod_is_lazy_and_keeps_its_public_names() -> None:
    assert _imported_after("import robustmod") == {m: False for m in HEAVY}
    # After the submodule of the same name is loaded, robustmod.compare is still the function.
    code = "import robustmod.compare\nimport robustmod\nassert callable(robustmod.compare), robustmod.compare"
    assert _imported_after(code)["pandas"] is True
    assert robustmod.compare is compare_module().compare
    assert robustmod.ModelSpec.__module__ == "robustmod.spec" and robustmod.Design.__module__ == "robustmod.design"
    with pytest.raises(AttributeError, match="no attribute 'nothing'"):
        robustmod.nothing  # noqa: B018  (the attribute access is the test)


def test_the_report_never_imports_the_command_line_and_no_import_error_is_swallowed() -> None:
    for path in (PACKAGE / "report").glob("*.py"):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.ImportFrom):
                target = ("." * node.level) + (node.module or "")
                assert "cli" not in target.split("."), f"{path.name} imports {target}"
    for path in (PACKAGE / "cli").glob("*.py"):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.ExceptHandler) and isinstance(node.type, ast.Name):
                assert node.type.id not in ("ImportError", "ModuleNotFoundError"), path.name


def _help(capsys: pytest.CaptureFixture[str], command: str) -> str:
    with pytest.raises(SystemExit) as done:
        main([command, "--help"])
    assert done.value.code == 0
    return " ".join(capsys.readouterr().out.split())


def test_help_states_the_shared_defaults(capsys: pytest.CaptureFixture[str]) -> None:
    text = _help(capsys, "check")
    for value in (defaults.SEED, defaults.ALPHA, defaults.PRIMARY, ",".join(defaults.BACKENDS),
                  defaults.CALIBRATION_DATASETS):
        assert f"default: {value}" in text or f"({value} when N" in text, value
    assert f"./{defaults.APPENDIX_FOLDER}" in _help(capsys, "appendix")
    assert "--calibrate-costly" in text and "--prior-sensitivity" in text and "--quiet" in text


def test_the_api_takes_the_same_defaults() -> None:
    params = inspect.signature(compare_module().compare).parameters
    assert params["seed"].default == defaults.SEED
    assert params["alpha"].default == defaults.ALPHA
    assert params["primary"].default is None  # defaults.PRIMARY, or defaults.CLUSTER_PRIMARY with a cluster column
    assert params["calibrate_costly"].default is False


@pytest.fixture()
def demo_csv(tmp_path: Path) -> Path:
    p = tmp_path / "trial.csv"
    demo_data().to_csv(p, index=False)
    return p


def _args(path: Path, *extra: str, command: str = "check") -> list[str]:
    return [command, str(path), "--formula", DEMO_FORMULA, "--focal", DEMO_FOCAL, "--moderator", DEMO_MODERATOR,
            *extra]


class _Captured(InputError):
    """Raised by the stand-in compare() once it has recorded what the command line passed."""


@pytest.fixture()
def captured(monkeypatch: pytest.MonkeyPatch) -> dict[str, Any]:
    """Replace compare() by a recorder, to see the keyword arguments a command builds."""
    seen: dict[str, Any] = {}

    def record(data: Any, *args: Any, **kwargs: Any) -> None:
        seen.update(kwargs)
        raise _Captured("recorded")

    monkeypatch.setattr(compare_module(), "compare", record)
    return seen


def test_calibrate_costly_reaches_compare(demo_csv: Path, captured: dict[str, Any]) -> None:
    assert main(_args(demo_csv, "--backends", "ols,hc3", "--calibrate", "20", "--calibrate-costly", "--quiet")) == 2
    assert captured["calibrate_costly"] is True and captured["calibration"] == 20
    captured.clear()
    assert main(_args(demo_csv, "--backends", "ols,hc3", "--calibrate", "--quiet")) == 2
    assert "calibrate_costly" not in captured and captured["calibration"] == defaults.CALIBRATION_DATASETS


def test_calibrate_costly_from_the_config_file(demo_csv: Path, tmp_path: Path, captured: dict[str, Any]) -> None:
    cfg = tmp_path / "analysis.toml"
    cfg.write_text(f'data = "{demo_csv.name}"\nformula = "{DEMO_FORMULA}"\nfocal = "{DEMO_FOCAL}"\n'
                   f'moderators = ["{DEMO_MODERATOR}"]\nbackends = ["ols", "hc3"]\ncalibration = 20\n'
                   'calibrate_costly = true\n')
    assert main(["appendix", "--config", str(cfg), "--out", str(tmp_path / "app"), "--quiet"]) == 2
    assert captured["calibrate_costly"] is True and captured["calibration"] == 20


def test_calibrate_costly_without_calibration_is_a_one_line_error(demo_csv: Path,
                                                                   capsys: pytest.CaptureFixture[str]) -> None:
    assert main(_args(demo_csv, "--backends", "ols,hc3", "--calibrate-costly", "--quiet")) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--calibrate N" in err


def test_prior_sensitivity_on_check_and_appendix(demo_csv: Path, tmp_path: Path, captured: dict[str, Any]) -> None:
    out = ["--out", str(tmp_path / "app"), "--quiet"]
    # check: left to the back-end unless asked.
    assert main(_args(demo_csv, "--backends", "hc3,bayes", "--quiet")) == 2
    assert "prior_sensitivity" not in captured["options"].get("bayes", {})
    assert main(_args(demo_csv, "--backends", "hc3,bayes", "--prior-sensitivity", "--quiet")) == 2
    assert captured["options"]["bayes"]["prior_sensitivity"] is True
    # appendix: on unless the user set it, and only for back-ends that have the option.
    assert main(_args(demo_csv, "--backends", "hc3,bayes", *out, command="appendix")) == 2
    assert captured["options"]["bayes"]["prior_sensitivity"] is True
    assert "hc3" not in captured["options"]
    for chosen in (["--set", "bayes.prior_sensitivity=false"], ["--no-prior-sensitivity"]):
        assert main(_args(demo_csv, "--backends", "hc3,bayes", *chosen, *out, command="appendix")) == 2
        assert captured["options"]["bayes"]["prior_sensitivity"] is False
    assert main(_args(demo_csv, "--backends", "ols,hc3", *out, command="appendix")) == 2
    assert captured["options"] == {}


def test_prior_sensitivity_where_no_back_end_has_a_prior_or_it_is_contradicted(
        demo_csv: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(_args(demo_csv, "--backends", "ols,hc3", "--prior-sensitivity", "--quiet")) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--prior-sensitivity" in err and "ols, hc3" in err
    assert main(_args(demo_csv, "--backends", "hc3,bayes", "--prior-sensitivity",
                      "--set", "bayes.prior_sensitivity=false", "--quiet")) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "contradicts" in err


def test_misspelled_backend_option_names_the_close_match(demo_csv: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rc = main(_args(demo_csv, "--backends", "hc3,wild", "--set", "wild.replicatons=999", "--quiet"))
    err = capsys.readouterr().err
    assert rc == 2 and err.count("\n") == 1 and "Traceback" not in err
    assert "'replicatons'" in err and "'replications'" in err


def test_step_lines_on_stderr_keep_the_json_clean(demo_csv: Path, capsys: pytest.CaptureFixture[str],
                                                  monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(cli_options, "stderr_is_terminal", lambda: True)
    assert main(_args(demo_csv, "--backends", "ols,hc3", "--json")) == 0
    got = capsys.readouterr()
    assert json.loads(got.out)["schema"] == "robustmod/results-v1"
    lines = got.err.splitlines()
    steps = [ln.removeprefix("robustmod: ").rsplit(" took ", 1) for ln in lines]
    assert [s[0] for s in steps] == ["design", "back-end ols", "back-end hc3", "diagnostics"]
    assert all(s[1].endswith(" s") and float(s[1][:-2]) >= 0 for s in steps)
    assert main(_args(demo_csv, "--backends", "ols,hc3", "--json", "--quiet")) == 0
    assert capsys.readouterr().err == ""


def test_compare_reports_each_step_to_its_callback() -> None:
    seen: list[tuple[str, float]] = []
    robustmod.compare(demo_data(), DEMO_FORMULA, DEMO_FOCAL, DEMO_MODERATOR, backends=["ols", "hc3"],
                      calibration=10, on_step=lambda step, seconds: seen.append((step, seconds)))
    assert [s for s, _ in seen] == ["design", "back-end ols", "back-end hc3", "diagnostics",
                                    "calibration (10 datasets)"]
    assert all(sec >= 0 for _, sec in seen)


def test_parse_value_and_settings() -> None:
    assert cli_options.parse_value("999") == 999 and cli_options.parse_value("0.5") == 0.5
    assert cli_options.parse_value("Off") is False and cli_options.parse_value("hc2") == "hc2"
    assert cli_options.parse_settings(["Wild.replications=99", "wls.variance=power"]) == {
        "wild": {"replications": 99}, "wls": {"variance": "power"}}
    with pytest.raises(InputError, match="BACKEND.OPTION=VALUE"):
        cli_options.parse_settings(["wild=3"])


def test_backends_command_lists_every_id_and_marks_the_defaults(capsys: pytest.CaptureFixture[str]) -> None:
    from robustmod.backends.registry import REGISTRY

    assert main(["backends"]) == 0
    rows = [ln.split() for ln in capsys.readouterr().out.splitlines()]
    assert [r[0] for r in rows] == list(REGISTRY)
    assert sorted(r[0] for r in rows if r[-1] == "[default]") == sorted(defaults.BACKENDS)


def _run_command(tmp_path: Path, prelude: str) -> subprocess.CompletedProcess[str]:
    """``robustmod backends`` through the installed entry point's function, after ``prelude``."""
    code = f"import sys\n{prelude}\nsys.argv = ['robustmod', 'backends']\nfrom robustmod.cli import run\nrun()\n"
    return subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, cwd=tmp_path)


def test_the_command_ends_promptly_yet_runs_exit_handlers_and_flushes_its_output(tmp_path: Path) -> None:
    # The prompt exit (os._exit after the exit handlers) must not lose what a normal exit keeps:
    # buffered stdout through a pipe, the exit status, and work registered with atexit.
    marker = tmp_path / "handler.txt"
    out = _run_command(tmp_path, f"import atexit\natexit.register(lambda: open({str(marker)!r}, 'w').write('ran'))")
    assert out.returncode == 0, out.stderr
    assert "hc3" in out.stdout and "bayes" in out.stdout and out.stdout.endswith("\n")
    assert marker.read_text() == "ran"
    with open(Path(__file__).resolve().parents[1] / "pyproject.toml", encoding="utf-8") as fh:
        assert 'robustmod = "robustmod.cli:run"' in fh.read()


def test_the_command_waits_for_a_thread_that_is_still_writing(tmp_path: Path) -> None:
    marker = tmp_path / "late.txt"
    prelude = ("import threading, time\n"
               f"def late():\n    time.sleep(1.0)\n    open({str(marker)!r}, 'w').write('done')\n"
               "threading.Thread(target=late).start()")
    out = _run_command(tmp_path, prelude)
    assert out.returncode == 0, out.stderr
    assert marker.read_text() == "done"


def test_the_command_keeps_the_exit_status_of_bad_input(tmp_path: Path) -> None:
    code = ("import sys\nsys.argv = ['robustmod', 'check', 'missing.csv', '--formula', 'y ~ x * w', "
            "'--focal', 'x', '--moderator', 'w']\nfrom robustmod.cli import run\nrun()\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, cwd=tmp_path)
    assert out.returncode == 2
    assert "missing.csv" in out.stderr and "Traceback" not in out.stderr
