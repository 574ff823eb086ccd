"""The Python API: prepare takes a DataFrame or a path, like audit; the documented examples run.

The README's Python section and the docstring examples of audit, prepare and
prepare_frame are executed here as written.
"""

from __future__ import annotations

import doctest
import os
import re
import runpy
import sys
from pathlib import Path

import pandas as pd
import pytest

import panelprep
from panelprep import pipeline
from panelprep.prepare import prepare

prepare_module = sys.modules["panelprep.prepare"]

ROOT = Path(__file__).resolve().parent.parent
FIXTURES = ROOT / "fixtures"


def _frame() -> pd.DataFrame:
    return pd.read_csv(FIXTURES / "clean_balanced.csv", dtype={"firm_id": str})


def test_prepare_takes_a_dataframe_like_audit(tmp_path):
    frame = _frame()
    from_frame = prepare(frame, tmp_path / "a", entity="firm_id", time="year",
                                   y="sales", x="capital,staff")
    path = tmp_path / "data.csv"
    frame.to_csv(path, index=False)
    from_file = prepare(path, tmp_path / "b", entity="firm_id", time="year",
                                  y="sales", x="capital,staff")
    assert from_frame.verdict == from_file.verdict == "pass"
    assert from_frame.summary["input"]["path"] is None
    # its run file says where the data came from, and names no file
    record = (tmp_path / "a" / "run.toml").read_text()
    assert "came from a DataFrame in Python" in record and '\npath = ' not in record
    assert from_frame.summary["components"] == from_file.summary["components"]
    for name in ("within.parquet", "quasi.parquet", "between.parquet"):
        pd.testing.assert_frame_equal(pd.read_parquet(tmp_path / "a" / name),
                                      pd.read_parquet(tmp_path / "b" / name))
    # the frame given is not changed
    pd.testing.assert_frame_equal(frame, _frame())


def test_prepare_refuses_something_neither_a_path_nor_a_frame(tmp_path):
    with pytest.raises(panelprep.InputError, match="a file path or a pandas DataFrame, not list"):
        prepare([1, 2], tmp_path / "o", entity="e", time="t", y="y", x="x")


def test_prepare_refuses_a_frame_whose_columns_clash_with_added_names(tmp_path):
    frame = _frame().assign(pp_row=1)
    with pytest.raises(panelprep.InputError, match="pp_row"):
        prepare(frame, tmp_path / "o", entity="firm_id", time="year", y="sales",
                          x="capital")
    assert not (tmp_path / "o").exists()


@pytest.mark.parametrize("module", [pipeline, prepare_module])
def test_docstring_examples_run(tmp_path, module):
    here = os.getcwd()
    os.chdir(tmp_path)
    try:
        failures, tried = doctest.testmod(module, optionflags=doctest.ELLIPSIS)
    finally:
        os.chdir(here)
    assert tried > 0 and failures == 0


def test_readme_python_section_runs(tmp_path, capsys):
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text.split("### Python")[-1].split("\n## ", 1)[0]
    blocks = re.findall(r"```python\n(.+?)\n```", section, flags=re.DOTALL)
    assert blocks
    here = os.getcwd()
    os.chdir(tmp_path)
    try:
        for number, block in enumerate(blocks):
            script = tmp_path / f"readme_{number}.py"
            script.write_text(block, encoding="utf-8")
            runpy.run_path(str(script), run_name="__main__")
    finally:
        os.chdir(here)
    printed = capsys.readouterr().out.splitlines()
    assert printed[0] == "pass"
    assert printed[1] == "pass ['between', 'clean', 'dropped', 'quasi', 'within']"
    assert printed[-1] == "prepared"
    assert (tmp_path / "prepared" / "quasi.parquet").exists()
