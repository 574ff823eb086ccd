"""The text log as a person (and a CI log) reads it: stdout of ``audit`` and diagnostics.txt.

Counts in the expected lines come from ``fixtures/expected.json`` (hand counts,
explained in ``fixtures/EXPECTED.md``) or are recounted with pandas.
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import panelprep
from panelprep.evidence import read_evidence
from panelprep.report import HINTS
from panelprep.report.text import audit_lines, preparation_lines, verdict_line
from panelprep.words import p_phrase, p_text, plural

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
EXPECTED = json.loads((FIXTURES / "expected.json").read_text(encoding="utf-8"))["fixtures"]
VERDICT = re.compile(r"^(PASS|FAIL): \d+ errors?( \([a-z-, ]+\))?, \d+ warnings?( \([a-z-, ]+\))?, "
                     r"\d+ notes?; exit [01]$")


def _command() -> list[str]:
    beside = Path(sys.executable).with_name("panelprep")
    found = str(beside) if beside.exists() else shutil.which("panelprep")
    return [found] if found else [sys.executable, "-c", "from panelprep.cli import main; main()"]


@pytest.fixture(scope="module")
def failing(tmp_path_factory):
    """``audit`` of the conflicting-keys fixture with both reports, in a real process."""
    root = tmp_path_factory.mktemp("log")
    json_path, html_path = root / "audit.json", root / "audit.html"
    done = subprocess.run([*_command(), "audit", str(FIXTURES / "conflicting_duplicates.csv"),
                           "-e", "firm_id", "-t", "year", "--report", str(json_path),
                           "--report-html", str(html_path), "--quiet"],
                          capture_output=True, text=True, timeout=300, check=False)
    return done, json_path, html_path


def test_the_last_line_states_the_verdict_counts_and_exit_code(failing):
    done, json_path, _ = failing
    assert done.returncode == 1, done.stderr
    last = done.stdout.rstrip("\n").splitlines()[-1]
    assert VERDICT.match(last), last
    report = json.loads(json_path.read_text(encoding="utf-8"))
    counts = {s: sum(1 for f in report["findings"] if f["severity"] == s)
              for s in ("error", "warning", "info")}
    assert last.startswith(f"FAIL: {plural(counts['error'], 'error')} (key-conflict), ")
    assert f"{plural(counts['warning'], 'warning')}" in last and last.endswith("; exit 1")


def test_audit_says_where_it_wrote_its_reports(failing):
    done, json_path, html_path = failing
    lines = done.stdout.splitlines()
    assert f"wrote the JSON report: {json_path}" in lines
    assert f"wrote the HTML report: {html_path}" in lines
    assert json_path.exists() and html_path.exists()


def test_the_findings_table_has_a_header_row_and_hints_for_what_fails(failing):
    done, _, _ = failing
    lines = done.stdout.splitlines()
    start = next(i for i, x in enumerate(lines) if x.startswith("Findings ("))
    header = lines[start + 1].split()
    assert header[:4] == ["severity", "finding", "count", "what"]
    row = next(x for x in lines[start:] if x.split()[:2] == ["ERROR", "key-conflict"])
    # the count is right-aligned under its header
    assert row.index("key-conflict") == lines[start + 1].index("finding")
    expected = EXPECTED["conflicting_duplicates.csv"]["conflicting_duplicate_keys"]
    assert row.split()[2] == f"{expected:,}"
    hints = lines[lines.index("What addresses them"):]
    hint = next(x for x in hints if x.split()[:1] == ["key-conflict"])
    assert "fails the gate" in hint and "--duplicates" in hint and "[clean.duplicates]" in hint


def test_every_finding_id_has_a_hint_naming_an_option_or_a_key():
    from panelprep.checks import CHECKS
    from panelprep.components import FINDING_IDS
    from panelprep.findings import CONTRACT_FINDING_ID, SKIPPED_COLUMNS_ID

    ids = {c.id for c in CHECKS} | set(FINDING_IDS) | {CONTRACT_FINDING_ID, SKIPPED_COLUMNS_ID}
    # findings with nothing an option can do (a negative idiosyncratic variance) may go without
    for fid in ids - {"idiosyncratic-variance-negative", "values-declared-missing"}:
        assert fid in HINTS, fid
        assert "--" in HINTS[fid] or "[" in HINTS[fid] or "rescale" in HINTS[fid], fid


@pytest.mark.parametrize("name", sorted(p.name for p in FIXTURES.glob("*.csv")))
def test_no_makeshift_plurals_or_raw_values_in_any_fixture_log(name):
    sep = ";" if name.startswith("semicolon") else ","
    frame = pd.read_csv(FIXTURES / name, dtype=str, sep=sep)
    entity = "firm_id" if "firm_id" in frame.columns else frame.columns[0]
    time = next(c for c in ("year", "quarter", "month", "date", "period") if c in frame.columns)
    report = panelprep.audit(frame, entity=entity, time=time)
    text = "\n".join(audit_lines(report.to_dict()) + [verdict_line(report.to_dict())])
    for bad in ("(ies)", "(s)", "True", "False", "■"):
        assert bad not in text, (bad, name)
    assert VERDICT.match(text.splitlines()[-1]), text.splitlines()[-1]


def test_years_and_codes_have_no_thousands_separators_and_decimals_line_up():
    rng = np.random.default_rng(5)
    frame = pd.DataFrame({"firm": np.repeat([f"f{i}" for i in range(30)], 6),
                          "year": np.tile(range(2001, 2007), 30)})
    frame["founded"] = np.repeat(rng.integers(1946, 2019, size=30), 6)
    frame["sales"] = rng.lognormal(3, 1, size=len(frame))
    frame["code"] = np.repeat(rng.integers(1000, 9999, size=30), 6)
    report = panelprep.audit(frame, entity="firm", time="year", vars=["founded", "sales", "code"])
    lines = audit_lines(report.to_dict())
    start = next(i for i, x in enumerate(lines) if x.startswith("Variables ("))
    table = lines[start + 1:start + 5]
    founded = next(x for x in table if x.split()[0] == "founded").split()
    assert founded[4] == str(frame["founded"].min()) and founded[5] == str(frame["founded"].max())
    assert "," not in "".join(founded[2:])
    # the mean is written with its decimals, recomputed by pandas
    assert float(founded[2]) == pytest.approx(frame["founded"].mean(), abs=0.01)
    rows = [x for x in table[1:]]
    for column in ("mean", "sd"):
        end = table[0].index(column) + len(column)
        points = {x[:end].rfind(".") for x in rows if "." in x[:end].split()[-1]}
        assert len(points) == 1, (column, rows)


def test_an_underflowing_p_value_is_a_bound_not_zero():
    assert p_text(0.0) == "< 1e-16" and p_text(3e-300) == "< 1e-16"
    assert p_text(0.0321) == "0.032" and p_text(4.1e-7) == "4.1e-07"
    assert p_phrase(0.0) == "p < 1e-16" and p_phrase(0.5) == "p = 0.500"
    reading = read_evidence({"breusch_pagan": {"statistic": 14142.1, "df": 1, "p_value": 0.0},
                             "honda": {"statistic": 118.9, "p_value": 0.0}})
    assert "Breusch-Pagan LM = 14142.1 (p < 1e-16)" in reading[0]
    assert "one-sided p < 1e-16" in reading[0]
    assert "p = 0)" not in " ".join(reading)


def test_a_preparation_log_ends_with_the_verdict_and_words_not_raw_values(tmp_path):
    from panelprep.prepare import prepare

    prep = prepare(FIXTURES / "gaps.csv", tmp_path / "out", entity="firm_id", time="year",
                   y="sales", x="capital,staff", transforms="within,quasi,twoway")
    lines = (tmp_path / "out" / "diagnostics.txt").read_text(encoding="utf-8").splitlines()
    assert lines == preparation_lines(prep.summary)
    assert VERDICT.match(lines[-1]) and lines[-1].startswith("PASS: ")
    built = next(x for x in lines if x.startswith("  twoway: "))
    assert "converged" in built and "True" not in built
    # the precision as a rounded number, never its full repr
    precision = prep.summary["transforms"]["twoway"]["precision"]
    assert repr(precision) not in built and f"{precision:.1e}" in built
    text = "\n".join(lines)
    assert "Error variance, split by level" in text and "Demeaning weight per entity" in text
    assert "entity effect variance" not in text and "idiosyncratic variance (s2_e)" not in text
    assert "without an added constant" not in text
    assert "pp_intercept (1 - theta_i) takes the place of the constant" in text
