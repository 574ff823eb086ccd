"""The audit command through real subprocesses: exit codes, stderr, the JSON report.

Every command line is declared in ``JOBS`` and all of them run once, a few at
a time, in a module fixture (starting the interpreter dominates their cost);
the tests then look at the results by name.
"""

from __future__ import annotations

import hashlib
import json
import shutil
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import pandas as pd
import pytest

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
EXPECTED = json.loads((FIXTURES / "expected.json").read_text(encoding="utf-8"))["fixtures"]


def _command() -> list[str]:
    beside = Path(sys.executable).with_name("panelprep")
    found = str(beside) if beside.exists() else shutil.which("panelprep")
    return [found] if found else [sys.executable, "-c", "from panelprep.cli import main; main()"]


COMMAND = _command()
KEYS = ("-e", "firm_id", "-t", "year")


@dataclass
class Run:
    returncode: int
    stdout: str
    stderr: str
    report: dict | None


def _inputs(root: Path) -> dict[str, Path]:
    """Input files the jobs read, made from the fixtures."""
    frame = pd.read_csv(FIXTURES / "missing_values.csv", dtype={"firm_id": str})
    frame.to_parquet(root / "panel.parquet")
    frame.to_feather(root / "panel.feather")
    (root / "panel.dat").write_bytes((FIXTURES / "clean_balanced.csv").read_bytes())
    (root / "tabbed.txt").write_text(
        (FIXTURES / "clean_balanced.csv").read_text(encoding="utf-8").replace(",", "\t"),
        encoding="utf-8")
    (root / "two.csv").write_text("country,firm,year,x\n01,007,2001,1\n01,007,2002,2\n"
                                  "02,007,2001,3\n02,007,2002,5\n", encoding="utf-8")
    (root / "bad_time.csv").write_text("id,when,x\na,2021-01-31,1\na,2021-02-28,2\n"
                                       "b,2021-01-31,3\nb,next month,4\n", encoding="utf-8")
    (root / "dup.csv").write_text("id,year,x,x\na,2001,1,2\n", encoding="utf-8")
    (root / "inf.csv").write_text("id,year,x\na,1,1.0\na,2,inf\nb,1,2\nb,2,3\n", encoding="utf-8")
    (root / "mine.csv").write_bytes((FIXTURES / "clean_balanced.csv").read_bytes())
    return {p.name: p for p in root.iterdir()}


def _jobs(root: Path, files: dict[str, Path]) -> dict[str, list]:
    """name -> audit arguments; a job named ``*-noreport`` gets no --report."""
    clean = FIXTURES / "clean_balanced.csv"
    return {
        "clean": [clean, *KEYS],
        "missing-keys": [FIXTURES / "missing_keys.csv", "--entity", "firm_id", "--time", "year"],
        "gaps": [FIXTURES / "gaps.csv", *KEYS],
        "gaps-warning": [FIXTURES / "gaps.csv", *KEYS, "--fail-on", "warning"],
        "csv": [FIXTURES / "missing_values.csv", *KEYS],
        "parquet": [files["panel.parquet"], *KEYS],
        "feather": [files["panel.feather"], *KEYS],
        "input-format": [files["panel.dat"], *KEYS, "--input-format", "csv"],
        "no-format": [files["panel.dat"], *KEYS],
        "tab": [files["tabbed.txt"], *KEYS, "--delimiter", "\\t"],
        "decimal-comma": [FIXTURES / "semicolon_decimal_comma.csv", *KEYS, "--decimal-comma"],
        "tokens": [FIXTURES / "non_numeric.csv", *KEYS, "--missing-token", "n/a, -",
                   "--vars", "sales,capital"],
        "two-keys": [files["two.csv"], "--entity", "country,firm", "--time", "year"],
        "absent-file": [root / "absent.csv", "-e", "a", "-t", "b"],
        "absent-column": [FIXTURES / "gaps.csv", "-e", "firm", "-t", "year"],
        "bad-time": [files["bad_time.csv"], "-e", "id", "-t", "when"],
        "dup-columns": [files["dup.csv"], "-e", "id", "-t", "year"],
        "fail-on-info": [clean, *KEYS, "--fail-on", "info"],
        "bad-freq": [clean, *KEYS, "--freq", "fortnight"],
        "infinite": [files["inf.csv"], "-e", "id", "-t", "year"],
        "overwrite-noreport": [files["mine.csv"], *KEYS, "--report", files["mine.csv"]],
        "usage-noreport": [clean, "-t", "year"],
    }


def _run(args: list, report: Path | None) -> Run:
    extra = ["--report", str(report), "--quiet"] if report else ["--quiet"]
    done = subprocess.run([*COMMAND, "audit", *map(str, args), *extra], capture_output=True,
                          text=True, timeout=300, check=False)
    document = None
    if report is not None and report.exists():
        document = json.loads(report.read_text(encoding="utf-8"))
    return Run(done.returncode, done.stdout, done.stderr, document)


@pytest.fixture(scope="module")
def runs(tmp_path_factory) -> dict[str, Run]:
    root = tmp_path_factory.mktemp("cli")
    jobs = _jobs(root, _inputs(root))
    with ThreadPoolExecutor(max_workers=4) as pool:
        futures = {name: pool.submit(_run, args, None if name.endswith("-noreport")
                                     else root / f"{name}.json")
                   for name, args in jobs.items()}
        return {name: future.result() for name, future in futures.items()}


def assert_unusable(run: Run, *fragments: str) -> str:
    assert run.returncode == 2, run.stderr
    assert "Traceback" not in run.stderr
    lines = run.stderr.strip().splitlines()
    assert len(lines) == 1, run.stderr
    assert lines[0].startswith("panelprep: error: ")
    for fragment in fragments:
        assert fragment in lines[0], lines[0]
    assert run.report is None
    return lines[0]


def test_clean_panel_passes_with_exit_0(runs):
    run = runs["clean"]
    assert run.returncode == 0, run.stderr
    assert run.report["verdict"] == "pass"
    assert run.stdout.startswith("verdict: PASS")


def test_error_finding_fails_with_exit_1_and_still_writes_the_report(runs):
    run = runs["missing-keys"]
    assert run.returncode == 1, run.stderr
    assert run.report["verdict"] == "fail"
    assert "Traceback" not in run.stderr


def test_fail_on_warning(runs):
    assert (runs["gaps"].returncode, runs["gaps-warning"].returncode) == (0, 1)
    assert runs["gaps-warning"].report["fail_on"] == "warning"


def test_report_has_every_promised_field(runs):
    data = FIXTURES / "gaps.csv"
    spec = EXPECTED["gaps.csv"]
    report = runs["gaps"].report
    assert report["verdict"] == "pass"
    assert report["keys"]["entity"] == ["firm_id"]
    assert report["keys"]["time"] == "year" and report["keys"]["freq"] == "year"
    assert report["input"]["path"] == str(data)
    assert report["input"]["sha256"] == hashlib.sha256(data.read_bytes()).hexdigest()
    assert report["input"]["rows"] == spec["rows"]
    panel = report["panel"]
    assert {k: panel[k] for k in ("rows", "entities", "periods", "balanced", "singleton_entities",
                                  "entities_with_gaps", "exact_duplicate_rows",
                                  "conflicting_duplicate_keys")} == {
        "rows": spec["estimation_rows"], "entities": spec["estimation_entities"],
        "periods": spec["periods"], "balanced": spec["balanced"],
        "singleton_entities": spec["singleton_entities"],
        "entities_with_gaps": spec["entities_with_gaps"],
        "exact_duplicate_rows": spec["exact_duplicate_rows"],
        "conflicting_duplicate_keys": spec["conflicting_duplicate_keys"],
    }
    # rows per firm, from the table in fixtures/EXPECTED.md: 8, 5, 3, 5, 2
    assert panel["obs_per_entity"] == {"min": 2, "median": 5.0, "max": 8}
    assert report["findings"], "the panel-shape finding is always there"
    for finding in report["findings"]:
        assert {"id", "severity", "count", "message", "examples"} <= set(finding)
        assert len(finding["examples"]) <= 10
    assert list(report["variables"]) == spec["variables"]
    for row in report["variables"].values():
        assert {"n", "mean", "sd_overall", "sd_between", "sd_within", "min", "max",
                "time_invariant"} <= set(row)
    holes = next(f for f in report["findings"] if f["id"] == "period-holes")
    assert holes["severity"] == "warning" and holes["count"] == 3


def test_csv_parquet_and_feather_give_the_same_report(runs):
    reports = {}
    for name in ("csv", "parquet", "feather"):
        run = runs[name]
        assert run.returncode == 0, run.stderr
        assert run.report["input"]["path"].endswith(
            "missing_values.csv" if name == "csv" else f"panel.{name}")
        reports[name] = {k: v for k, v in run.report.items() if k not in ("input", "run")}
    assert reports["csv"] == reports["parquet"] == reports["feather"]


def test_input_format_option(runs):
    assert_unusable(runs["no-format"], "--input-format")
    run = runs["input-format"]
    assert run.returncode == 0, run.stderr
    assert run.report["panel"]["entities"] == 4


def test_tab_delimiter_option(runs):
    run = runs["tab"]
    assert run.returncode == 0, run.stderr
    assert run.report["panel"]["rows"] == 20


def test_decimal_comma_option(runs):
    run = runs["decimal-comma"]
    assert run.returncode == 0, run.stderr
    assert list(run.report["variables"]) == ["sales", "capital", "staff"]
    assert run.report["variables"]["staff"]["min"] == 14.5  # 00103 2022 staff '14,5'


def test_missing_token_option_is_reported_never_silent(runs):
    run = runs["tokens"]
    found = {f["id"]: f for f in run.report["findings"]}
    assert found["values-declared-missing"]["count"] == 2
    assert found["values-declared-missing"]["severity"] == "info"
    assert found["values-not-numeric"]["count"] == 3  # 1,234 and 12% and 12.5k remain
    assert run.returncode == 1
    assert list(run.report["variables"]) == ["sales", "capital"]  # --vars limits the check


def test_missing_token_option_is_documented():
    helped = subprocess.run([*COMMAND, "audit", "--help"], capture_output=True, text=True,
                            timeout=300, check=False)
    assert helped.returncode == 0
    assert "--missing-token" in helped.stdout


def test_multi_column_entity_option(runs):
    run = runs["two-keys"]
    assert run.returncode == 0, run.stderr
    assert run.report["keys"]["entity"] == ["country", "firm"]
    assert run.report["panel"]["entities"] == 2


def test_missing_file(runs):
    assert_unusable(runs["absent-file"], "absent.csv", "no such file")


def test_missing_column(runs):
    line = assert_unusable(runs["absent-column"], "'firm'", "not found")
    assert "firm_id" in line  # the columns that do exist are listed


def test_unparseable_time_names_column_row_and_value(runs):
    assert_unusable(runs["bad-time"], "'when'", "row 4", "'next month'")


def test_duplicate_column_names(runs):
    assert_unusable(runs["dup-columns"], "duplicate column")


@pytest.mark.parametrize(("job", "fragment"), [
    ("fail-on-info", "--fail-on"),
    ("bad-freq", "fortnight"),
])
def test_bad_options_exit_2(runs, job, fragment):
    assert_unusable(runs[job], fragment)


def test_infinite_value_is_a_finding_not_a_crash(runs):
    run = runs["infinite"]
    assert run.returncode == 1, run.stderr
    assert "internal error" not in run.stderr
    assert any(f["id"] == "values-not-numeric" for f in run.report["findings"])


def test_report_cannot_overwrite_the_input(runs, tmp_path_factory):
    assert_unusable(runs["overwrite-noreport"], "overwrite")
    kept = next(tmp_path_factory.getbasetemp().glob("cli*/mine.csv"))
    assert kept.read_bytes() == (FIXTURES / "clean_balanced.csv").read_bytes()


def test_usage_errors_are_one_line_and_exit_2(runs):
    # --entity is required: the option parser's complaint must follow the same contract
    assert_unusable(runs["usage-noreport"], "--entity")
