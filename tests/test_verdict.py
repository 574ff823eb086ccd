"""What a scheduler relies on, through real processes: exit codes 0/1/2/3, ``--json`` on
stdout, the gate and run blocks, progress on stderr (plain lines on a pipe, a bar, none,
JSON lines), and the run file a preparation writes, which reproduces its data files.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import subprocess
import sys
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
from conftest import schema_validator

from panelprep.findings import severity_rank

ROOT = Path(__file__).resolve().parents[1]
FIXTURES = ROOT / "fixtures"
PANELPREP = Path(sys.executable).with_name("panelprep")
CLEAN = FIXTURES / "clean_balanced.csv"
CONFLICTS = FIXTURES / "conflicting_duplicates.csv"
KEYS = ("--entity", "firm_id", "--time", "year")
MODEL = ("--y", "sales", "--x", "capital,staff")
PLAIN_LINE = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}\.\d{3}Z panelprep \+\d+\.\ds "
                        r"[a-z0-9.-]+: .+$")


def run(*args, progress: str | None = "none", env: dict | None = None,
        command: list[str] | None = None) -> subprocess.CompletedProcess:
    """``panelprep ARGS`` in a real process; ``progress=None`` leaves the default
    (the suite sets PANELPREP_PROGRESS=none, removed here)."""
    environment = {k: v for k, v in os.environ.items() if k != "PANELPREP_PROGRESS"}
    if progress is not None:
        environment["PANELPREP_PROGRESS"] = progress
    environment.update(env or {})
    return subprocess.run([*(command or [str(PANELPREP)]), *map(str, args)], env=environment,
                          capture_output=True, text=True, timeout=300, check=False)


def sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


# --- exit codes ------------------------------------------------------------------------


def test_exit_0_when_the_gate_passes():
    assert run("audit", CLEAN, *KEYS).returncode == 0


def test_exit_1_when_the_gate_fails():
    done = run("audit", CONFLICTS, *KEYS)
    assert done.returncode == 1, done.stderr


def test_exit_2_on_bad_input_and_on_bad_usage(tmp_path):
    missing = run("audit", tmp_path / "absent.csv", *KEYS)
    assert missing.returncode == 2 and missing.stderr.startswith("panelprep: error: ")
    usage = run("audit", CLEAN, "--entity", "firm_id")  # no --time
    assert usage.returncode == 2 and "Traceback" not in usage.stderr
    mode = run("audit", CLEAN, *KEYS, "--progress", "loud")
    assert mode.returncode == 2 and "--progress" in mode.stderr


def test_exit_3_on_an_internal_error_with_the_traceback_saved(tmp_path):
    """A bug (here: the audit made to raise) is exit 3: one line asking for a bug report and
    naming the file holding the traceback; no traceback on stderr."""
    code = ("import sys, panelprep.pipeline as p\n"
            "def broken(*a, **k):\n"
            "    raise RuntimeError('planted for the test')\n"
            "p.audit_file = broken\n"
            "from panelprep.cli import main\n"
            "main()\n")
    done = run("audit", CLEAN, *KEYS, command=[sys.executable, "-c", code],
               env={"TMPDIR": str(tmp_path)})
    assert done.returncode == 3, done.stderr
    assert "Traceback" not in done.stderr and done.stdout == ""
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and "internal error" in lines[0] and "report it as a bug" in lines[0]
    saved = Path(re.search(r"saved in (\S+?);", lines[0]).group(1))
    assert saved.parent == tmp_path
    text = saved.read_text(encoding="utf-8")
    assert "Traceback" in text and "planted for the test" in text and "audit" in text


def test_help_documents_the_exit_codes():
    for command in ("audit", "prepare"):
        text = " ".join(run(command, "--help").stdout.split())
        assert "Exit codes: 0" in text and "3 internal error" in text, command
    assert "--log-json" in run("prepare", "--help").stdout


# --- --json ----------------------------------------------------------------------------


def test_audit_json_is_the_report_and_nothing_else_on_stdout(tmp_path):
    report = tmp_path / "report.json"
    done = run("audit", CONFLICTS, *KEYS, "--json", "--report", report)
    assert done.returncode == 1
    printed = json.loads(done.stdout)  # stdout holds one JSON document, nothing else
    assert printed == json.loads(report.read_text(encoding="utf-8"))
    assert done.stdout == report.read_text(encoding="utf-8")
    # the human summary went to stderr
    assert "key-conflict" in done.stderr and "Findings" in done.stderr


@pytest.mark.parametrize("fixture,code", [(CLEAN, 0), (CONFLICTS, 1)])
def test_prepare_json_equals_the_diagnostics_file(tmp_path, fixture, code):
    out = tmp_path / "out"
    done = run("prepare", fixture, *KEYS, *MODEL, "--out", out, "--json")
    assert done.returncode == code, done.stderr
    written = (out if code == 0 else tmp_path / "out.failed") / "diagnostics.json"
    assert json.loads(done.stdout) == json.loads(written.read_text(encoding="utf-8"))
    assert done.stdout == written.read_text(encoding="utf-8")


def test_json_with_quiet_leaves_stderr_empty():
    done = run("audit", CLEAN, *KEYS, "--json", "--quiet", progress=None)
    assert done.returncode == 0 and done.stderr == ""
    json.loads(done.stdout)


# --- the gate and run blocks, the order of findings, step ids ----------------------------


def test_gate_block_names_the_ids_that_failed_it(tmp_path):
    done = run("audit", CONFLICTS, *KEYS, "--json", "--fail-on", "warning")
    document = json.loads(done.stdout)
    gate, findings = document["gate"], document["findings"]
    assert gate["verdict"] == "fail" == document["verdict"] and gate["fail_on"] == "warning"
    # recounted here from the findings, by hand
    expected = [f["id"] for f in findings
                if not f.get("resolved_by") and f["severity"] in ("error", "warning")]
    assert gate["failed_by"] == list(dict.fromkeys(expected)) and "key-conflict" in expected
    for severity in ("error", "warning", "info"):
        assert gate["counts"][severity] == sum(f["severity"] == severity for f in findings)


def test_findings_are_worst_first_in_the_json_and_the_text(tmp_path):
    done = run("audit", FIXTURES / "missing_values.csv", *KEYS, "--json")
    findings = json.loads(done.stdout)["findings"]
    ranks = [-severity_rank(f["severity"]) for f in findings if not f.get("resolved_by")]
    assert ranks == sorted(ranks) and len(set(ranks)) > 1
    # the text summary (on stderr here) lists them in the same order
    positions = [done.stderr.index(f" {f['id']} ") for f in findings]
    assert positions == sorted(positions)


def test_run_block_records_the_run(tmp_path):
    before = datetime.now(UTC)
    out = tmp_path / "out"
    done = run("prepare", CLEAN, *KEYS, *MODEL, "--out", out, "--singletons", "drop",
               "--lag", "capital:1", "--missing-token", "n/a", "--severity",
               "period-holes=error")
    assert done.returncode == 0, done.stderr
    block = json.loads((out / "diagnostics.json").read_text(encoding="utf-8"))["run"]
    started = datetime.strptime(block["started_at"], "%Y-%m-%dT%H:%M:%S.%fZ").replace(tzinfo=UTC)
    assert before.replace(microsecond=0) <= started.replace(microsecond=0) <= datetime.now(UTC)
    assert block["duration_seconds"] > 0
    assert block["argv"][1:3] == ["prepare", str(CLEAN)]
    assert block["input_sha256"] == sha256(CLEAN)
    assert block["versions"]["panelprep"] and block["versions"]["pandas"] == pd.__version__
    options = block["options"]
    assert options["clean.singletons"] == "drop" and options["derive.lag"] == ["capital:1"]
    assert options["input.missing_tokens"] == ["n/a"]
    assert options["checks.severity"] == {"period-holes": "error"}
    assert options["clean.window"] == [None, None] and options["clean.balance"] == "keep"
    assert block["inferred"] == {"panel.freq": "year", "input.format": "csv"}
    steps = [s["id"] for s in block["steps"]]
    assert steps[0] == "read" and "check.key-conflict" in steps and "write.within" in steps
    assert all(s["wall_seconds"] >= 0 and s["peak_rss_bytes"] > 0 for s in block["steps"])


def test_ledger_steps_are_the_story_ids(tmp_path):
    out = tmp_path / "out"
    done = run("prepare", FIXTURES / "singletons.csv", *KEYS, "--y", "sales", "--x", "capital",
               "--out", out, "--singletons", "drop")
    assert done.returncode == 0, done.stderr
    story = json.loads((out / "diagnostics.json").read_text(encoding="utf-8"))["steps"]
    ids = [s["id"] for s in story]
    assert "singletons" in ids and all(re.fullmatch(r"[a-z-]+", i) for i in ids)
    dropped = pd.read_parquet(out / "dropped.parquet")
    assert set(dropped["pp_step"]) <= set(ids) and "singletons" in set(dropped["pp_step"])


# --- progress ----------------------------------------------------------------------------


def test_plain_progress_is_the_default_on_a_pipe():
    done = run("audit", CLEAN, *KEYS, progress=None)
    assert done.returncode == 0
    lines = done.stderr.strip().splitlines()
    assert len(lines) > 3 and all(PLAIN_LINE.match(line) for line in lines), done.stderr
    assert any(line.split()[3] == "read:" for line in lines)
    rows = len(pd.read_csv(CLEAN))
    assert any(line.endswith(f"({rows:,} rows)") for line in lines)  # rows of the step
    # stdout holds the summary only
    assert not any(PLAIN_LINE.match(line) for line in done.stdout.splitlines())


def test_quiet_and_none_print_no_progress():
    assert run("audit", CLEAN, *KEYS, "--quiet", progress=None).stderr == ""
    assert run("audit", CLEAN, *KEYS, "--progress", "none", progress=None).stderr == ""


def test_bar_progress_runs_and_keeps_stdout_clean():
    done = run("audit", CLEAN, *KEYS, "--progress", "bar", "--json", "--quiet")
    json.loads(done.stdout)
    done = run("audit", CLEAN, *KEYS, "--progress", "bar", "--json")
    assert done.returncode == 0
    json.loads(done.stdout)


def test_log_json_is_one_valid_json_line_per_step_then_the_end(tmp_path):
    validator = schema_validator("log-line")
    out = tmp_path / "out"
    done = run("prepare", CLEAN, *KEYS, *MODEL, "--out", out, "--log-json", progress=None)
    assert done.returncode == 0, done.stderr
    records = [json.loads(line) for line in done.stderr.strip().splitlines()]
    for record in records:
        assert not list(validator.iter_errors(record)), record
    assert [r["event"] for r in records[:-1]] == ["step"] * (len(records) - 1)
    assert records[-1]["event"] == "end" and records[-1]["exit_code"] == 0
    assert records[-1]["verdict"] == "pass"
    diagnostics = json.loads((out / "diagnostics.json").read_text(encoding="utf-8"))
    recorded = [s["id"] for s in diagnostics["run"]["steps"]]
    assert [r["id"] for r in records[:len(recorded)]] == recorded
    # an error is one JSON line too
    bad = run("audit", tmp_path / "absent.csv", *KEYS, "--log-json", progress=None)
    last = json.loads(bad.stderr.strip().splitlines()[-1])
    assert bad.returncode == 2 and last["event"] == "error" and last["exit_code"] == 2
    assert "absent.csv" in last["message"]
    assert not list(validator.iter_errors(last))


# --- the run file a preparation writes -------------------------------------------------


def test_run_toml_reproduces_the_data_files_byte_for_byte(tmp_path):
    data = tmp_path / "data" / "firms.csv"
    data.parent.mkdir()
    data.write_bytes((FIXTURES / "singletons.csv").read_bytes())
    first = tmp_path / "first"
    done = run("prepare", data, *KEYS, *MODEL, "--out", first, "--singletons", "drop",
               "--lag", "capital:1", "--x", "capital,staff,capital_lag1", "--transform",
               "within,quasi,twoway", "--method", "amemiya", "--severity",
               "period-holes=info", "--names", "theta=re_theta")
    assert done.returncode == 0, done.stderr
    again = tmp_path / "again"
    done = run("prepare", "--config", first / "run.toml", "--out", again)
    assert done.returncode == 0, done.stderr
    data_files = sorted(p.name for p in first.glob("*.parquet"))
    assert data_files == sorted(p.name for p in again.glob("*.parquet")) and len(data_files) == 5
    for name in data_files:
        assert (first / name).read_bytes() == (again / name).read_bytes(), name
    assert (first / "run.toml").read_text() == (again / "run.toml").read_text()
    meta = json.loads(pq.read_schema(first / "quasi.parquet").metadata[b"panelprep"])
    options = meta["options"]
    assert options["clean.singletons"] == "drop" and options["output.method"] == "amemiya"
    assert options["derive.lag"] == ["capital:1"] and options["names.theta"] == "re_theta"
    assert options["checks.severity"] == {"period-holes": "info"}
    assert "input.path" not in options and "output.dir" not in options
    assert meta["input_sha256"] == sha256(data)


def test_run_toml_reproduces_a_stated_step_and_the_diff_file(tmp_path):
    # invented waves 80, 90, 100, one row missing (a hole): the stated step int:10, a derived
    # difference among the regressors and the diff file must come back from run.toml alike
    rng = np.random.default_rng(1)
    frame = pd.DataFrame({"person": np.repeat([f"p{i:02d}" for i in range(12)], 3),
                          "wave": np.tile([80, 90, 100], 12)})
    frame["hours"] = rng.normal(40, 5, len(frame)).round(2)
    frame["wage"] = (10 + 0.1 * frame["hours"] + rng.normal(0, 1, len(frame))).round(2)
    data = tmp_path / "data" / "waves.csv"
    data.parent.mkdir()
    frame.drop(index=[4]).to_csv(data, index=False)
    first = tmp_path / "first"
    done = run("prepare", data, "-e", "person", "-t", "wave", "--y", "wage", "--x",
               "hours,hours_diff1", "--diff", "hours", "--freq", "int:10", "--transform",
               "within,quasi,diff", "--out", first)
    assert done.returncode == 0, done.stderr
    record = (first / "run.toml").read_text()
    assert 'freq = "int:10"' in record and 'diff = ["hours:1"]' in record
    assert 'transforms = ["within", "quasi", "diff"]' in record
    again = tmp_path / "again"
    done = run("prepare", "--config", first / "run.toml", "--out", again)
    assert done.returncode == 0, done.stderr
    data_files = sorted(p.name for p in first.glob("*.parquet"))
    assert data_files == ["clean.parquet", "diff.parquet", "dropped.parquet", "quasi.parquet",
                          "within.parquet"]
    for name in data_files:
        assert (first / name).read_bytes() == (again / name).read_bytes(), name
    assert (first / "run.toml").read_text() == (again / "run.toml").read_text()
    options = json.loads((again / "diagnostics.json").read_text())["run"]["options"]
    assert options["panel.freq"] == "int:10" and options["derive.diff"] == ["hours:1"]


def test_run_toml_with_compare_reproduces_the_data_files_and_restated_parquet(tmp_path):
    """A run with [compare]: run.toml keeps the previous vintage (relative to the folder) and
    its tolerances, and the rerun writes every Parquet file, restated.parquet too, byte for
    byte; the Parquet metadata leaves the previous vintage's path out, as every location."""
    data = tmp_path / "data" / "firms.csv"
    data.parent.mkdir()
    frame = pd.read_csv(FIXTURES / "singletons.csv")
    frame.to_csv(data, index=False)
    previous = frame.copy()
    previous.loc[previous.index[:3], "sales"] += 1.0  # three cells restated
    previous.to_csv(tmp_path / "data" / "firms_before.csv", index=False)
    first = tmp_path / "first"
    done = run("prepare", data, *KEYS, *MODEL, "--out", first, "--previous",
               tmp_path / "data" / "firms_before.csv")
    assert done.returncode == 0, done.stderr
    record = (first / "run.toml").read_text()
    assert 'previous = "../data/firms_before.csv"' in record
    again = tmp_path / "again"
    done = run("prepare", "--config", first / "run.toml", "--out", again)
    assert done.returncode == 0, done.stderr
    data_files = sorted(p.name for p in first.glob("*.parquet"))
    assert "restated.parquet" in data_files
    assert data_files == sorted(p.name for p in again.glob("*.parquet"))
    for name in data_files:
        assert (first / name).read_bytes() == (again / name).read_bytes(), name
    assert len(pq.read_table(first / "restated.parquet")) == 3
    diagnostics = json.loads((first / "diagnostics.json").read_text(encoding="utf-8"))
    options = diagnostics["run"]["options"]
    assert options["compare.previous"] == str(tmp_path / "data" / "firms_before.csv")
    assert options["compare.rtol"] == 1e-9 and options["compare.max_restated_share"] is None
    meta = json.loads(pq.read_schema(first / "restated.parquet").metadata[b"panelprep"])
    assert "compare.previous" not in meta["options"] and "compare.rtol" in meta["options"]
    assert meta["old_sha256"] == sha256(tmp_path / "data" / "firms_before.csv")
    assert meta["new_sha256"] == meta["input_sha256"] == sha256(data)


def test_run_toml_names_no_output_folder(tmp_path):
    out = tmp_path / "out"
    assert run("prepare", CLEAN, *KEYS, *MODEL, "--out", out).returncode == 0
    done = run("prepare", "--config", out / "run.toml")
    assert done.returncode == 2 and "output.dir is required" in done.stderr
    assert not (tmp_path / "out.failed").exists()
