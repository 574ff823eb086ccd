"""Whole runs: a run file against the same flags, bad run files, the demo, the README commands."""

from __future__ import annotations

import json
import re
import shlex
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
from typer.testing import CliRunner

from panelprep.cli import app

ROOT = Path(__file__).resolve().parents[1]
FIXTURES = ROOT / "fixtures"
DATA_FILES = ("clean", "within", "between", "quasi", "twoway", "dropped")


def invoke(*args) -> object:
    return CliRunner().invoke(app, [str(a) for a in args])


def write_run_file(folder: Path, data: Path) -> Path:
    run = folder / "run.toml"
    run.write_text(
        f'''
[input]
path = "{data}"

[panel]
entity = "firm_id"
time = "year"

[model]
y = "sales"
x = ["capital", "staff", "sales_lag1"]

[clean]
duplicates = "keep-last"
singletons = "drop"

[derive]
lag = ["sales:1"]

[output]
dir = "from-file"
transforms = ["within", "between", "quasi", "twoway"]
''',
        encoding="utf-8",
    )
    return run


def test_run_file_and_equivalent_flags_give_identical_data_files(tmp_path):
    # the demo panel has every defect the policies act on (generated, invented data)
    from panelprep.demo import write_demo_csv

    data = tmp_path / "firms.csv"
    write_demo_csv(data, n_firms=80)
    run = write_run_file(tmp_path, data)
    by_file = invoke("prepare", "--config", run, "--quiet")
    assert by_file.exit_code == 0, by_file.output
    by_flags = invoke(
        "prepare", data, "--entity", "firm_id", "--time", "year", "--y", "sales",
        "--x", "capital,staff,sales_lag1", "--duplicates", "keep-last", "--singletons", "drop",
        "--lag", "sales:1", "--transform", "within,between,quasi,twoway",
        "--out", tmp_path / "from-flags", "--quiet",
    )
    assert by_flags.exit_code == 0, by_flags.output
    for name in DATA_FILES:
        left = (tmp_path / "from-file" / f"{name}.parquet").read_bytes()
        right = (tmp_path / "from-flags" / f"{name}.parquet").read_bytes()
        assert left == right, name


def test_flags_override_the_run_file(tmp_path):
    data = FIXTURES / "gaps.csv"
    run = write_run_file(tmp_path, data)
    result = invoke("prepare", "--config", run, "--y", "staff", "--x", "capital,sales",
                    "--out", tmp_path / "override", "--quiet")
    assert result.exit_code == 0, result.output
    summary = json.loads((tmp_path / "override" / "diagnostics.json").read_text())
    assert summary["sample"]["y"] == "staff" and summary["sample"]["x"] == ["capital", "sales"]
    assert not (tmp_path / "from-file").exists()


@pytest.mark.parametrize(
    ("text", "words"),
    [
        ('[input]\npath = "a.csv"\n[panel]\nentity = "firm_id"\ntime = "year"\ncolour = "red"\n',
         ["run.toml:6", "panel.colour"]),
        ('[input]\npath = "a.csv"\n[clean]\nsingletons = "sometimes"\n',
         ["run.toml:4", "clean.singletons", "keep", "drop"]),
        ('[input\npath = "a.csv"\n', ["run.toml", "line 1"]),
    ],
)
def test_a_bad_run_file_is_exit_2_naming_key_and_line(tmp_path, text, words):
    run = tmp_path / "run.toml"
    run.write_text(text, encoding="utf-8")
    # a real process: the message must be one line on stderr and no traceback
    done = subprocess.run(
        [sys.executable, "-c", "from panelprep.cli import main; main()",
         "prepare", "--config", str(run)],
        check=False, capture_output=True, text=True, timeout=120,
    )
    assert done.returncode == 2
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in done.stderr
    for word in words:
        assert word in lines[0], (word, lines[0])


def test_draft_writes_a_run_file_that_prepares(tmp_path):
    run = tmp_path / "run.toml"
    result = invoke("draft", FIXTURES / "unbalanced.csv", "--out", run)
    assert result.exit_code == 0, result.output
    assert "guessed" in run.read_text()
    prepared = invoke("prepare", "--config", run, "--out", tmp_path / "out", "--quiet")
    assert prepared.exit_code in (0, 1), prepared.output
    assert (tmp_path / "out" / "diagnostics.json").exists()


def test_demo_runs_end_to_end_and_keeps_its_promises(tmp_path):
    folder = tmp_path / "demo"
    result = invoke("demo", folder, "--quiet")
    assert result.exit_code == 0, result.output
    assert "invented" in result.output
    out = folder / "out"
    for name in DATA_FILES:
        assert (out / f"{name}.parquet").exists(), name
    summary = json.loads((out / "diagnostics.json").read_text())
    clean = pd.read_parquet(out / "clean.parquet")
    dropped = pd.read_parquet(out / "dropped.parquet")
    rows_read = summary["input"]["rows"]
    # the ledger invariant, read back from the files themselves
    assert rows_read == len(clean) + len(dropped)
    assert len(pd.read_csv(folder / "firms.csv")) == rows_read
    assert summary["verdict"] == "pass" and (out / "report.html").exists()
    again = invoke("demo", folder, "--quiet")
    assert again.exit_code == 2 and "not empty" in again.output


def _readme_commands() -> list[str]:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    head = text.split("\n## ", 1)[0]
    return re.findall(r"```bash\n(.+?)\n```", head, flags=re.DOTALL)


def test_readme_opens_with_exactly_two_set_up_commands():
    commands = _readme_commands()
    assert len(commands) == 2
    assert "pytest" in commands[1] and ".[test]" in commands[1]
    assert "panelprep demo" in commands[0]


def test_readme_demo_command_runs(tmp_path):
    # the installed console script, as the README's first command calls it after installing
    _, _, run = _readme_commands()[0].rpartition("&&")
    argv = shlex.split(run.strip())
    assert argv[0].endswith("panelprep") and argv[1] == "demo"
    done = subprocess.run(
        [sys.executable, "-c", "from panelprep.cli import main; main()", *argv[1:], "--quiet"],
        check=False, cwd=tmp_path, capture_output=True, text=True, timeout=300,
    )
    assert done.returncode == 0, done.stderr
    assert (tmp_path / argv[2] / "out" / "report.html").exists()
