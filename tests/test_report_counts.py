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


def _texts(folder: Path) -> tuple[dict, str, str]:
    summary = json.loads((folder / "diagnostics.json").read_text())
    text = (folder / "diagnostics.txt").read_text()
    page = html.unescape(re.sub(r"<[^>]+>", " ", (folder / "report.html").read_text()))
    return summary, text, " ".join(page.split())


def _assert_counts_agree(summary: dict, text: str, page: str) -> None:
    read, panel = summary["input"]["rows"], summary["panel"]
    # one source for "rows read": the header of both and the panel block of both
    assert f"rows {read:,}" in text
    assert f"rows read {read:,}" in page
    words = f"{panel['rows']:,} of {read:,} read"
    assert words in text and words in page
    if panel["rows_read"] != read:
        assert f"{panel['rows_read']:,} audited" in text and f"{panel['rows_read']:,} audited" in page
    assert f"{read:,} rows read" in page  # the story's first number
    dropped = summary["dropped"]["rows"]
    assert f"{dropped:,} (" in text
    assert re.search(rf"(Rows dropped in all|Rows the steps removed): {dropped:,} ", page)
    for step in summary["steps"]:
        assert f"{step['rows_before']:,}" in text and f"{step['rows_after']:,}" in text
    for finding in summary["findings"]:
        assert finding["id"] in text and finding["id"] in page


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    folder = tmp_path_factory.mktemp("demo")
    run_demo(folder)
    return folder


def test_demo_counts_agree(demo):
    summary, text, page = _texts(demo / "out")
    _assert_counts_agree(summary, text, page)
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
    summary, text, page = _texts(folder)
    assert summary["dropped"]["rows"] >= 1
    _assert_counts_agree(summary, text, page)
    assert "dropped.parquet" not in text and "dropped.parquet" not in page
    assert "no ledger of dropped rows was written" in text
    assert "no ledger of dropped rows was written" in page
    assert sorted(p.name for p in folder.iterdir()) == ["diagnostics.json", "diagnostics.txt",
                                                          "report.html"]
