"""Help shows flags as flags and whole words; summaries show periods in their own form;
values-not-numeric gives each distinct text once, with its count."""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from panelprep.cli import app
from panelprep.pipeline import audit
from panelprep.report.text import audit_lines

RUNNER = CliRunner()
COMMANDS = ["audit", "prepare", "components", "draft", "demo"]


@pytest.mark.parametrize("width", [60, 80, 100, 140])
@pytest.mark.parametrize("command", COMMANDS)
def test_help_shows_flags_as_flags_and_breaks_only_at_spaces(command, width):
    result = RUNNER.invoke(app, [command, "--help"], env={"COLUMNS": str(width)},
                           terminal_width=width)
    assert result.exit_code == 0
    assert "<bool>" not in result.output
    # no word split at a hyphen across lines (period-holes, drop-exact, swamy-arora)
    assert not re.search(r"[A-Za-z]-\n", result.output), result.output


def test_severity_help_is_whole():
    result = RUNNER.invoke(app, ["prepare", "--help"], env={"COLUMNS": "80"}, terminal_width=80)
    words = " ".join(result.output.split())
    assert ("Severity per finding id as ID=LEVEL,... with LEVEL info, warning or error, e.g. "
            "period-holes=error,entity-single-obs=info.") in words


def test_freq_help_lists_the_choices_and_the_stated_step():
    result = RUNNER.invoke(app, ["audit", "--help"], env={"COLUMNS": "100"}, terminal_width=100)
    words = " ".join(result.output.split())
    assert "year, quarter, month, week, day, int, or int:K" in words


def test_quiet_is_a_flag_taking_no_value(tmp_path):
    path = tmp_path / "p.csv"
    pd.DataFrame({"e": list("aabb"), "t": [1, 2, 1, 2], "v": [1.0, 2.0, 3.0, 5.0]}).to_csv(
        path, index=False)
    assert RUNNER.invoke(app, ["audit", str(path), "-e", "e", "-t", "t", "--quiet"]).exit_code == 0
    assert RUNNER.invoke(app, ["audit", str(path), "-e", "e", "-t", "t", "-q"]).exit_code == 0
    # a value after the flag is an extra argument, not the flag's value
    assert RUNNER.invoke(app, ["audit", str(path), "-e", "e", "-t", "t", "--quiet",
                               "true"]).exit_code == 2


def test_week_labels_are_shown_as_week_labels_in_the_summary():
    weeks = ["2021-W05", "2021-W06", "2021-W07", "2021-W08"]
    frame = pd.DataFrame({"store": np.repeat(["s1", "s2"], 4), "week": weeks * 2,
                          "sales": np.arange(8.0) ** 1.5})
    lines = "\n".join(audit_lines(audit(frame, "store", "week").to_dict()))
    assert "(2021-W05 to 2021-W08)" in lines
    assert "2021-02-01" not in lines
    # the same weeks written as dates are shown as dates (their Mondays)
    dated = frame.assign(week=pd.to_datetime(["2021-02-01", "2021-02-08", "2021-02-15",
                                              "2021-02-22"] * 2).strftime("%Y-%m-%d"))
    lines = "\n".join(audit_lines(audit(dated, "store", "week").to_dict()))
    assert "(2021-02-01 to 2021-02-22)" in lines


def test_values_not_numeric_examples_give_each_text_once_with_its_count():
    frame = pd.DataFrame({"firm": np.repeat(["a", "b", "c"], 4), "year": [1, 2, 3, 4] * 3,
                          "sales": ["n/a", "1.5", "n/a", "2.5", "n/a", "3", "n/a", "4",
                                    "n/a", "12%", "5", "6"]})
    finding = audit(frame, "firm", "year", vars="sales").finding("values-not-numeric")
    assert finding.count == 6
    # counted by eye: n/a on data rows 1, 3, 5, 7, 9; 12% on row 10
    assert finding.examples == [
        {"column": "sales", "value": "n/a", "count": 5, "row": 1},
        {"column": "sales", "value": "12%", "count": 1, "row": 10},
    ]
