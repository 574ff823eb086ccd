"""The evidence computed in a thread while the data files are written (``run_preparation``).

The deferred evidence must be the in-line evidence, number for number; a
test float64 cannot carry out must still fail a ``--fail-on warning`` gate,
and then no data file may reach the output folder; an error inside the
thread must surface as it would in line.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from statsmodels.datasets import grunfeld

from panelprep.prepare import PrepareOptions, prepare_frame, run_preparation


def _grunfeld() -> pd.DataFrame:
    # outside data: statsmodels' copy of the Grunfeld investment panel (10 firms, 20 years)
    frame = grunfeld.load_pandas().data
    return frame[["firm", "year", "invest", "value", "capital"]].astype(
        {"firm": str, "year": int})


OPTIONS = {"entity": ["firm"], "time": "year", "y": "invest", "x": ["value", "capital"]}


def _parquet(tmp_path: Path) -> Path:
    path = tmp_path / "grunfeld.parquet"
    _grunfeld().to_parquet(path, index=False)
    return path


def test_deferred_evidence_is_the_in_line_evidence(tmp_path):
    in_line = prepare_frame(_grunfeld(), PrepareOptions(**OPTIONS)).summary
    written = run_preparation(_parquet(tmp_path), tmp_path / "out", PrepareOptions(**OPTIONS))
    assert written.evidence_job is not None  # it did run beside the writes
    assert written.summary["evidence"] == in_line["evidence"]
    assert written.summary["cautions"] == in_line["cautions"]
    on_disk = json.loads((tmp_path / "out" / "diagnostics.json").read_text())
    assert on_disk["evidence"] == json.loads(json.dumps(in_line["evidence"]))
    steps = [s["id"] for s in on_disk["run"]["steps"]]
    assert steps.count("evidence") == 1 and steps.index("evidence") > steps.index("write.clean")


def _overflowing(monkeypatch):
    from panelprep import evidence

    def overflowing(*args, **kwargs):
        return np.float64(1e300) * np.float64(1e300)

    monkeypatch.setattr(evidence, "mundlak_test", overflowing)


def test_an_uncomputable_test_found_beside_the_writes_fails_a_warning_gate_and_writes_no_data(
        tmp_path, monkeypatch):
    _overflowing(monkeypatch)
    out = tmp_path / "out"
    prep = run_preparation(_parquet(tmp_path), out,
                           PrepareOptions(**OPTIONS, fail_on="warning"))
    assert prep.verdict == "fail" and prep.outputs is None
    assert not out.exists()  # the data files written meanwhile went with the abandoned folder
    failed = tmp_path / "out.failed"
    assert sorted(p.name for p in failed.iterdir()) == ["diagnostics.json", "diagnostics.txt",
                                                         "report.html"]
    document = json.loads((failed / "diagnostics.json").read_text())
    assert document["verdict"] == "fail" and document["files"] == []
    assert "evidence-not-computable" in document["gate"]["failed_by"]


def test_an_uncomputable_test_under_the_default_gate_keeps_the_files(tmp_path, monkeypatch):
    _overflowing(monkeypatch)
    prep = run_preparation(_parquet(tmp_path), tmp_path / "out", PrepareOptions(**OPTIONS))
    assert prep.verdict == "pass"
    found = {f["id"] for f in prep.summary["findings"]}
    assert "evidence-not-computable" in found
    assert (tmp_path / "out" / "within.parquet").exists()


def test_an_error_in_the_evidence_thread_is_raised_and_leaves_no_folder(tmp_path, monkeypatch):
    from panelprep import prepare

    def broken(*args, **kwargs):
        raise ZeroDivisionError("inside the evidence")

    monkeypatch.setattr(prepare, "collect_evidence", broken)
    with pytest.raises(ZeroDivisionError, match="inside the evidence"):
        run_preparation(_parquet(tmp_path), tmp_path / "out", PrepareOptions(**OPTIONS))
    # nothing half-written beside the input: no output folder, no temporary one
    assert sorted(p.name for p in tmp_path.iterdir()) == ["grunfeld.parquet"]
