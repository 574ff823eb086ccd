"""The command line answers a bad argument before the numeric stack loads.

Timing is for the benchmark (benchmarks/run_benchmark.py); what is tested
here is the cause of a fast answer: which modules a check of the arguments
imports.  A fresh interpreter per case, since this suite has long since
imported everything.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

FIXTURES = Path(__file__).parent.parent / "fixtures"
HEAVY = ("pandas", "pyarrow", "numpy", "scipy")

_PROBE = """
import json, sys
from typer.testing import CliRunner
from panelprep.cli import app
result = CliRunner().invoke(app, sys.argv[1:])
print(json.dumps({"exit": result.exit_code, "output": result.output,
                  "loaded": sorted(m for m in sys.modules if m.split(".")[0] in HEAVY)}))
""".replace("HEAVY", repr(HEAVY))


def _probe(*argv: str) -> dict:
    done = subprocess.run([sys.executable, "-c", _PROBE, *argv], capture_output=True,
                          text=True, check=True)
    return json.loads(done.stdout.strip().splitlines()[-1])


def test_checking_a_run_file_imports_no_numeric_stack():
    code = ("import sys, panelprep.config; print(sorted({m.split('.')[0] for m in sys.modules}"
            f" & set({HEAVY!r})))")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          check=True)
    assert done.stdout.strip() == "[]"


@pytest.mark.parametrize("argv, said", [
    (["prepare", str(FIXTURES / "gaps.csv"), "--entity", "firm", "--time", "year",
      "--method", "nope"], "output.method must be one of"),
    (["prepare", str(FIXTURES / "gaps.csv"), "--entity", "firm", "--time", "year",
      "--transform", "within,sideways"], "output.transforms"),
    (["prepare", str(FIXTURES / "gaps.csv"), "--entity", "firm", "--time", "year",
      "--freq", "int:0"], "panel.freq"),
    (["--version"], "panelprep"),
])
def test_a_bad_argument_is_answered_before_pandas_pyarrow_numpy_or_scipy_load(argv, said):
    out = _probe(*argv)
    assert said in out["output"]
    assert out["loaded"] == []
    assert out["exit"] == (0 if argv == ["--version"] else 2)


def test_choices_name_every_check_in_the_order_the_checks_run():
    from panelprep.checks import CHECK_IDS
    from panelprep.choices import CHECK_IDS as LISTED

    assert LISTED == CHECK_IDS
