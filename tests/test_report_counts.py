"""Counts in diagnostics.txt and report.html are the JSON's, for the demo and for a failing run.

Also: a failed gate never claims a ledger file it did not write.
"""

from __future__ import annotations

import html
import json
import re
from pathlib import Path

import pandas as pd
import pytest

from panelprep.demo import run_demo
from panelprep.prepare import prepare

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"


def _texts(folder: Path) -> tuple[dict, str, str, str]:
    """The JSON, the text log, the page as words, and the page's raw markup."""
    summary = json.loads((folder / "diagnostics.json").read_text())
    text = (folder / "diagnostics.txt").read_text()
    raw = (folder / "report.html").read_text()
    page = html.unescape(re.sub(r"<[^>]+>", " ", raw))
    return summary, text, " ".join(page.split()), raw


def _plural(n: int, word: str) -> str:
    return f"{n:,} {word}" + ("" if n == 1 else "s")


def _assert_counts_agree(summary: dict, text: str, page: str, raw: str) -> None:
    read, panel = summary["input"]["rows"], summary["panel"]
    # one source for "rows read": the header of both and the panel block of both
    assert f"rows {read:,}" in text
    assert f"rows read {read:,}" in page
    words = f"{panel['rows']:,} of {read:,} read"
    assert words in text and words in page
    if panel["rows_read"] != read:
        assert f"{panel['rows_read']:,} audited" in text and f"{panel['rows_read']:,} audited" in page
    assert f"{read:,} rows read" in page  # the story's first number
    # the panel block: entities and periods, in the text table and the page's table
    for label in ("entities", "periods"):
        assert re.search(rf"^  {label} +{panel[label]:,}\b", text, re.MULTILINE), label
        assert re.search(rf"<th>{label}</th><td[^>]*>{panel[label]:,}\b", raw), label
    # every finding with its count, beside its id, in both
    for finding in summary["findings"]:
        fid, count = finding["id"], finding["count"]
        assert re.search(rf"\b{fid} +{count:,} ", text), (fid, count)
        assert re.search(rf"<code>{fid}</code></td><td class=\"num\">{count:,}</td>", raw), fid
    # the counts by severity: the closing line of the text, the counters of the page
    counts = summary["gate"]["counts"]
    closing = text.rstrip().splitlines()[-1]
    assert closing.startswith(f"{summary['verdict'].upper()}: {_plural(counts['error'], 'error')}")
    assert f"{_plural(counts['warning'], 'warning')}, {_plural(counts['info'], 'note')}" in closing
    for level in ("error", "warning", "info"):
        assert f'<div class="count {level}"><b>{counts[level]:,}</b>' in raw, level
    # each step's rows and entities before and after, on one line of the text and one table
    # row of the page
    for step in summary["steps"]:
        numbers = [step["rows_before"], step["rows_after"], step["entities_before"],
                   step["entities_after"]]
        assert re.search(re.escape(step["step"]) + "".join(rf" +{n:,}" for n in numbers), text)
        cells = [f'<td class="num">{n:,}</td>' for n in numbers[:2]]
        assert f"<td>{html.escape(step['step'])}</td>{''.join(cells)}" in raw, step["id"]
    # rows removed in all, and by reason
    dropped = summary["dropped"]["rows"]
    assert f"{dropped:,} (" in text
    assert re.search(rf"(Rows dropped in all|Rows the steps removed): {dropped:,} ", page)
    for reason, rows in summary["dropped"]["by_reason"].items():
        assert f"{reason}: {rows:,}" in text and f"{reason} {rows:,}" in page, reason


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    folder = tmp_path_factory.mktemp("demo")
    run_demo(folder)
    return folder


def test_demo_counts_agree(demo):
    summary, text, page, raw = _texts(demo / "out")
    _assert_counts_agree(summary, text, page, raw)
    # the demo's pre-audit steps remove rows, so the audited count differs from the rows read
    assert summary["panel"]["rows_read"] < summary["input"]["rows"]
    assert "each is listed in dropped.parquet" in text
    assert "dropped.parquet" in page
    assert (demo / "out" / "dropped.parquet").exists()


def test_failed_gate_counts_agree_and_claim_no_ledger(tmp_path):
    # key-missing rows are removed before the gate, which then fails on the conflicting keys
    source = pd.read_csv(FIXTURES / "conflicting_duplicates.csv", dtype={"firm_id": str})
    source.loc[0, "year"] = None
    data = tmp_path / "data.csv"
    source.to_csv(data, index=False)
    prep = prepare(data, tmp_path / "out", entity="firm_id", time="year", y="sales",
                   x="capital,staff")
    assert prep.verdict == "fail"
    folder = prep.written_to
    summary, text, page, raw = _texts(folder)
    assert summary["dropped"]["rows"] >= 1
    _assert_counts_agree(summary, text, page, raw)
    assert "dropped.parquet" not in text and "dropped.parquet" not in page
    assert "no ledger of dropped rows was written" in text
    assert "no ledger of dropped rows was written" in page
    # the panel block names the rows the files would have held, not files that exist
    assert "the rows the data files hold" not in text + page
    assert "the gate failed, so none was written" in text and "none was written" in page
    assert sorted(p.name for p in folder.iterdir()) == ["diagnostics.json", "diagnostics.txt",
                                                          "report.html"]


@pytest.mark.parametrize("in_files", [True, False])
def test_a_run_failed_by_its_evidence_claims_no_files(tmp_path, monkeypatch, in_files):
    """The gate can fail after the files are built (a test float64 cannot carry out, made an
    error): the diagnostics then speak of no file, whether the evidence ran beside the writes
    (a run into a folder) or in line (in memory)."""
    import numpy as np

    from panelprep import evidence
    from panelprep.prepare import PrepareOptions, prepare_frame

    def overflowing(*args, **kwargs):
        return np.float64(1e300) * np.float64(1e300)

    monkeypatch.setattr(evidence, "mundlak_test", overflowing)
    frame = pd.read_csv(FIXTURES / "clean_balanced.csv", dtype={"firm_id": str})
    settings = {"entity": "firm_id", "time": "year", "y": "sales", "x": "capital,staff",
                "severities": {"evidence-not-computable": "error"}}
    if in_files:
        prep = prepare(frame, tmp_path / "out", **settings)
        assert prep.written_to == tmp_path / "out.failed" and not (tmp_path / "out").exists()
        summary, text, page, _ = _texts(prep.written_to)
        assert "the rows the data files hold" not in text + page
    else:
        prep = prepare_frame(frame, PrepareOptions(
            entity=["firm_id"], time="year", y="sales", x=["capital", "staff"],
            severities={"evidence-not-computable": "error"}))
        summary = prep.summary
        assert prep.tables == {}
    assert summary["verdict"] == "fail"
    assert summary["gate"]["failed_by"] == ["evidence-not-computable"]
    assert summary["cautions"] == [("the gate failed (evidence-not-computable); no data files "
                                    "were written. Fix the input, or state a cleaning policy, "
                                    "and run again.")]
    assert summary["samples"]["definition"].endswith("the gate failed, so none was written")
