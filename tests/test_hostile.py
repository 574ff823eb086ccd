"""The catalogue of bad inputs: each gets its exit code and the key words of its message.

Every entry runs ``audit`` and ``prepare`` in this process (typer's runner,
which surfaces any exception that is not a clean exit) and checks: the exit
code; for exit 2 one line on stderr starting ``panelprep: error:`` with the
entry's key words, no report and no output folder left behind; for exit 0/1
the finding ids and words in the JSON report, and an output folder holding
only the diagnostics when the gate failed.  A handful of entries also run
through the installed entry point in a real process, to see that stderr
never holds a traceback.  Small bad files live in ``fixtures/hostile/``;
the rest are made here.
"""

from __future__ import annotations

import io
import json
import os
import subprocess
import sys
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

import panelprep
from panelprep.cli import app
from panelprep.io import TEMP_PREFIX

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
HOSTILE = FIXTURES / "hostile"
DIAGNOSTICS = {"diagnostics.json", "diagnostics.txt", "report.html"}
GOOD = ("firm_id,year,sales,capital\n00101,2020,93.5,77.1\n00101,2021,101.2,76.3\n"
        "00102,2020,151.0,146.6\n00102,2021,166.2,145.1\n00103,2020,88.0,60.2\n"
        "00103,2021,95.5,59.9\n")


def _write(name: str, content: str | bytes) -> Callable[[Path], Path]:
    def make(root: Path) -> Path:
        path = root / name
        path.write_bytes(content.encode("utf-8") if isinstance(content, str) else content)
        return path
    return make


USED_FIXTURES: set[str] = set()


def _fixture(name: str) -> Callable[[Path], Path]:
    USED_FIXTURES.add(name)
    return lambda root: HOSTILE / name


def _parquet(frame: pd.DataFrame, name: str, cut: int | None = None) -> Callable[[Path], Path]:
    def make(root: Path) -> Path:
        path = root / name
        frame.to_parquet(path)
        if cut is not None:
            path.write_bytes(path.read_bytes()[:cut])
        return path
    return make


def _corrupt_parquet(root: Path) -> Path:
    # bytes overwritten inside the first data page: the footer still reads, the data does not
    path = _parquet(_good_frame(), "corrupt.parquet")(root)
    data = bytearray(path.read_bytes())
    data[100:108] = b"\xff" * 8
    path.write_bytes(bytes(data))
    return path


def _good_frame() -> pd.DataFrame:
    return pd.read_csv(io.StringIO(GOOD), dtype={"firm_id": str})


def _rows(*rows: str, header: str = "firm_id,year,sales,capital") -> str:
    return "\n".join([header, *rows]) + "\n"


# four firms at periods 1, 2, 3 and 10^9: a grid of a billion periods, four of them used
BILLION = _rows(*(f"0010{e},{t},{e * 3 + t % 7},{(e * t) % 5}" for e in range(1, 5)
                  for t in (1, 2, 3, 10**9)))
SINGLETONS = _rows("00101,2019,1,2", "00102,2020,2,3", "00103,2021,4,3")


@dataclass(frozen=True)
class Entry:
    """One bad input, what ``audit`` and ``prepare`` must say about it.

    ``audit`` / ``prepare`` are the expected exit codes (None: not run);
    ``words`` must appear in the stderr line (exit 2) or in the message of
    one of the ``ids`` findings (exit 0/1); ``ids`` must all be in the
    report (and ``prepare_ids`` in the diagnostics of ``prepare``).
    ``args`` are extra options for both commands, ``env`` environment
    variables set for the run.
    """

    make: Callable[[Path], Path]
    audit: int | None
    prepare: int | None
    words: tuple[str, ...] = ()
    ids: tuple[str, ...] = ()
    args: tuple[str, ...] = ()
    time: str = "year"
    x: str = "capital"
    prepare_ids: tuple[str, ...] = ()
    env: dict[str, str] = field(default_factory=dict)


CATALOGUE: dict[str, Entry] = {
    "missing path": Entry(lambda root: root / "absent.csv", 2, 2, ("absent.csv", "no such file")),
    "a directory": Entry(lambda root: root, 2, 2, ("is a directory",)),
    "empty file": Entry(_write("empty.csv", ""), 2, 2, ("the file is empty",)),
    "header only": Entry(_fixture("header_only.csv"), 2, 2, ("no data rows, only a header",)),
    "header only, no newline": Entry(_write("bare.csv", "firm_id,year,sales,capital"), 2, 2,
                                     ("no data rows, only a header",)),
    "unknown extension": Entry(_write("panel.xlsx", GOOD), 2, 2,
                               ("cannot tell the format", "'.xlsx'", "--input-format")),
    "truncated parquet": Entry(_parquet(_good_frame(), "cut.parquet", cut=300), 2, 2,
                               ("cut.parquet", "cannot read as parquet")),
    "corrupt parquet": Entry(_corrupt_parquet, 2, 2, ("corrupt.parquet", "cannot read as parquet")),
    "not parquet at all": Entry(_write("fake.parquet", GOOD), 2, 2, ("cannot read as parquet",)),
    "latin-1 bytes": Entry(_fixture("latin1.csv"), 2, 2,
                           ("latin1.csv", "not UTF-8 text", "byte 0xfc", "line 4")),
    "utf-16 text": Entry(_fixture("utf16.csv"), 2, 2, ("UTF-16", "save the file as UTF-8")),
    "non-UTF-8 byte in a number": Entry(
        _write("bytes.csv", _rows("00101,2020,93.5,77.1", "00101,2021,1\xb5,76.3")
               .encode("utf-8").replace(b"\xc2\xb5", b"\xb5")), 2, 2,
        ("not UTF-8 text", "byte 0xb5", "line 3")),
    "file ends inside a character": Entry(
        _write("cut.csv", (_rows("00101,2020,93.5,77.1") + "00101,2021,1,\u00e9")
               .encode("utf-8")[:-1]), 2, 2, ("ends inside a character",)),
    "byte-order mark": Entry(_fixture("bom.csv"), 0, 1, ids=("panel-shape",)),
    "semicolons and decimal commas": Entry(
        lambda root: FIXTURES / "semicolon_decimal_comma.csv", 1, 1,
        ("--decimal-comma",), ("values-not-numeric",), x="capital,staff"),
    "semicolons and decimal commas, declared": Entry(
        lambda root: FIXTURES / "semicolon_decimal_comma.csv", 0, 0, (), ("panel-shape",),
        ("--decimal-comma",)),
    "duplicate column names": Entry(_fixture("duplicate_columns.csv"), 2, 2,
                                    ("duplicate column names ['sales']",)),
    "missing key column": Entry(_write("nokey.csv", GOOD.replace("firm_id", "firm")), 2, 2,
                                ("key column 'firm_id' not found",)),
    "missing variable column": Entry(_write("novar.csv", GOOD.replace("capital", "cap")), 2, 2,
                                     ("capital", "not found")),
    "keys all missing": Entry(_fixture("keys_all_missing.csv"), 1, 1,
                              ("no row has both an entity and a time value",),
                              ("key-missing", "panel-shape")),
    "unparseable time": Entry(_fixture("bad_time.csv"), 2, 2,
                              ("time column 'year'", "'20x1'", "row 4")),
    "unparseable date": Entry(_write("dates.csv", _rows("00101,2021-01-31,1,2", "00101,2021-02-28,2,3",
                                                        "00102,2021-01-31,3,4", "00102,next month,4,1",
                                                        header="firm_id,when,sales,capital")),
                              2, 2, ("time column 'when'", "'next month'", "row 4"), time="when"),
    "mixed kinds in the time column": Entry(_fixture("mixed_time.csv"), 2, 2,
                                            ("'2021Q1'", "row 2", "whole numbers")),
    "quarters mixed with months": Entry(
        _write("qm.csv", _rows("00101,2021Q1,1,2", "00101,2021-02,2,3", "00102,2021Q1,3,4",
                               "00102,2021Q2,4,1")), 2, 2, ("mixes kinds of period", "'2021-02'")),
    "float periods": Entry(_parquet(_good_frame().assign(year=[2020.5, 2021, 2020, 2021, 2020,
                                                                2021]), "half.parquet"),
                           2, 2, ("value 2020.5", "row 1", "not a whole-number period")),
    "text in numbers": Entry(lambda root: FIXTURES / "non_numeric.csv", 1, 1,
                             ("'n/a'", "'1,234'", "'12%'", "--missing-token"),
                             ("values-not-numeric",), x="capital,staff"),
    "text in numbers, tokens declared": Entry(
        lambda root: FIXTURES / "non_numeric.csv", 1, 1, ("'1,234'", "'12%'"),
        ("values-not-numeric", "values-declared-missing"), ("--missing-token", "n/a,-"),
        x="capital,staff"),
    "infinities": Entry(_fixture("infinities.csv"), 1, 1,
                        ("'inf'", "'-Infinity'", "'1e400'", "infinite"), ("values-not-numeric",)),
    "integers beyond 2^53": Entry(_fixture("big_integers.csv"), 1, 1,
                                  ("'9007199254740993'", "'123456789012345678901234'", "2^53"),
                                  ("values-not-numeric",)),
    "int64 integers beyond 2^53": Entry(
        _parquet(_good_frame().assign(sales=np.array([2**53 + 1, 2, 3, 4, 5, 6], dtype=np.int64)),
                 "big.parquet"), 1, 1, ("'9007199254740993'", "2^53"), ("values-not-numeric",)),
    # 1e300 itself is usable (moments are taken on scaled columns); 1e400 is not a float64
    "magnitudes beyond float64": Entry(
        _write("huge.csv", GOOD.replace("93.5", "1e400")), 1, 1, ("'1e400'", "rescale"),
        ("values-not-numeric",)),
    "variable entirely missing": Entry(_fixture("variable_all_missing.csv"), 1, 1,
                                       ("capital has no usable value",), ("panel-shape",),
                                       ("--fail-on", "error")),
    "one entity": Entry(_write("one.csv", _rows("00101,2019,1,2", "00101,2020,2,3",
                                                "00101,2021,4,3")), 0, 1,
                        ("only one entity",), ("panel-shape",),
                        prepare_ids=("components-underidentified",)),
    "one period": Entry(_write("period.csv", _rows("00101,2020,1,2", "00102,2020,2,3",
                                                   "00103,2020,4,3")), 0, 1,
                        ("only one period",), ("panel-shape", "entity-single-obs")),
    "only singletons": Entry(_write("single.csv", SINGLETONS), 0, 1,
                             ("single observation",), ("entity-single-obs",)),
    "only singletons, dropped": Entry(_write("single.csv", SINGLETONS), None, 2,
                                      ("no rows left after cleaning",), (),
                                      ("--singletons", "drop")),
    "empty after listwise deletion": Entry(
        _write("holes.csv", _rows("00101,2020,1,", "00101,2021,,3", "00102,2020,,1",
                                  "00102,2021,5,")), 1, 1,
        ("the estimation sample is empty", "no keyed row has every selected variable"),
        ("panel-shape", "values-missing")),
    "ragged rows": Entry(_fixture("ragged.csv"), 2, 2, ("cannot parse as CSV", "Expected 4 columns")),
    "a date typed centuries off": Entry(_fixture("mistyped_date.csv"), 0, 0,
                                        ("182,628 day periods", "mistyped time values"),
                                        ("panel-shape",), time="day"),
    "a date typed centuries off, every grid-sized step": Entry(
        _fixture("mistyped_date.csv"), None, 0, ("182,628 day periods",), ("panel-shape",),
        ("--transform", "within,twoway", "--balance", "largest-block", "--singletons", "drop",
         "--severity", "period-holes=info"), time="day"),
    "integer periods a billion apart": Entry(
        _write("billion.csv", BILLION), 0, 0, ("1,000,000,000 int:1 periods", "mistyped"),
        ("panel-shape",)),
    "integer periods a billion apart, every grid-sized step": Entry(
        _write("billion.csv", BILLION), None, 0, ("1,000,000,000 int:1 periods",),
        ("panel-shape",), ("--transform", "within,twoway", "--balance", "largest-block",
                           "--singletons", "drop", "--severity", "period-holes=info")),
    "periods too far apart for int64": Entry(
        _parquet(_good_frame().assign(year=[-(9 * 10**18), 9 * 10**18] * 3), "wide.parquet"),
        2, 2, ("time column 'year'", "too wide a range")),
    "period too large": Entry(
        _parquet(_good_frame().assign(year=[2020.0, 1e300] * 3), "far.parquet"), 2, 2,
        ("value 1e+300", "too large to be a period")),
    "larger than memory": Entry(lambda root: FIXTURES / "clean_balanced.csv", 2, 2,
                                ("would need about", "is available", "PANELPREP_MEMORY_LIMIT=off"),
                                x="capital,staff", env={"PANELPREP_MEMORY_LIMIT": "1K"}),
    "memory limit misspelt": Entry(lambda root: FIXTURES / "clean_balanced.csv", 2, 2,
                                   ("PANELPREP_MEMORY_LIMIT='lots'",), x="capital,staff",
                                   env={"PANELPREP_MEMORY_LIMIT": "lots"}),
}


def _audit_args(entry: Entry, data: Path, report: Path) -> list[str]:
    return ["audit", str(data), "-e", "firm_id", "-t", entry.time, "--vars", f"sales,{entry.x}",
            "--report", str(report), "--quiet", *entry.args]


def _prepare_args(entry: Entry, data: Path, out: Path) -> list[str]:
    return ["prepare", str(data), "-e", "firm_id", "-t", entry.time, "--y", "sales",
            "--x", entry.x, "--out", str(out), "--quiet", *entry.args]


def _findings(document: dict) -> dict[str, dict]:
    return {f["id"]: f for f in document["findings"]}


def _check_unusable(stderr: str, words: tuple[str, ...]) -> None:
    assert "Traceback" not in stderr
    lines = stderr.strip().splitlines()
    assert len(lines) == 1, stderr
    assert lines[0].startswith("panelprep: error: ")
    assert "internal error" not in lines[0], lines[0]
    for word in words:
        assert word in lines[0], (word, lines[0])


def _check_verdict(document: dict, entry: Entry, code: int, extra: tuple[str, ...] = ()) -> None:
    assert document["verdict"] == ("pass" if code == 0 else "fail")
    found = _findings(document)
    assert {*entry.ids, *extra} <= set(found), sorted(found)
    messages = " ".join(found[i]["message"] for i in entry.ids)
    for word in entry.words:
        assert word in messages, (word, messages)


@pytest.fixture
def runner_env(monkeypatch):
    def apply(entry: Entry) -> None:
        for key, value in entry.env.items():
            monkeypatch.setenv(key, value)
    return apply


@pytest.mark.parametrize("name", [n for n, e in CATALOGUE.items() if e.audit is not None])
def test_audit(name, tmp_path, runner_env):
    entry = CATALOGUE[name]
    runner_env(entry)
    data = entry.make(tmp_path)
    report = tmp_path / "report.json"
    result = CliRunner().invoke(app, _audit_args(entry, data, report))
    assert result.exception is None or isinstance(result.exception, SystemExit), result.exception
    assert result.exit_code == entry.audit, (result.stdout, result.stderr)
    if entry.audit == 2:
        _check_unusable(result.stderr, entry.words)
        assert not report.exists()
    else:
        _check_verdict(json.loads(report.read_text(encoding="utf-8")), entry, entry.audit)


@pytest.mark.parametrize("name", [n for n, e in CATALOGUE.items() if e.prepare is not None])
def test_prepare(name, tmp_path, runner_env):
    entry = CATALOGUE[name]
    runner_env(entry)
    data = entry.make(tmp_path)
    before = data.read_bytes() if data.is_file() else None
    out = tmp_path / "out"
    result = CliRunner().invoke(app, _prepare_args(entry, data, out))
    assert result.exception is None or isinstance(result.exception, SystemExit), result.exception
    assert result.exit_code == entry.prepare, (result.stdout, result.stderr)
    assert not list(tmp_path.glob(".out.*")), "a temporary folder was left behind"
    assert not list(tmp_path.glob(f"{TEMP_PREFIX}*")), "a temporary folder was left behind"
    if entry.prepare == 2:
        _check_unusable(result.stderr, entry.words)
        assert not out.exists()
    else:
        # a failed gate leaves --out alone and writes its diagnostics to OUT.failed
        if entry.prepare == 1:
            assert not out.exists()
            out = tmp_path / "out.failed"
        written = {p.name for p in out.iterdir()}
        if entry.prepare == 1:
            assert written == DIAGNOSTICS
        else:
            assert "clean.parquet" in written and DIAGNOSTICS <= written
        document = json.loads((out / "diagnostics.json").read_text(encoding="utf-8"))
        _check_verdict(document, entry, entry.prepare, entry.prepare_ids)
    if before is not None:
        assert data.read_bytes() == before


def test_every_entry_of_the_issue_is_in_the_catalogue():
    # the list the catalogue answers to; a missing name fails here
    wanted = ["missing path", "a directory", "empty file", "header only", "unknown extension",
              "truncated parquet", "corrupt parquet", "latin-1 bytes", "byte-order mark",
              "semicolons and decimal commas", "duplicate column names", "missing key column",
              "keys all missing", "unparseable time", "mixed kinds in the time column",
              "text in numbers", "infinities", "integers beyond 2^53",
              "variable entirely missing", "one entity", "one period", "only singletons",
              "empty after listwise deletion", "a date typed centuries off",
              "larger than memory"]
    assert [w for w in wanted if w not in CATALOGUE] == []


def test_every_file_in_the_hostile_folder_has_an_entry():
    assert {p.name for p in HOSTILE.glob("*.csv")} == USED_FIXTURES


# --- the same, through the installed entry point -------------------------------------------

REAL = ["missing path", "truncated parquet", "latin-1 bytes", "unparseable time",
        "integers beyond 2^53", "larger than memory", "ragged rows", "only singletons, dropped"]


def _command() -> list[str]:
    beside = Path(sys.executable).with_name("panelprep")
    if beside.exists():
        return [str(beside)]
    return [sys.executable, "-c", "from panelprep.cli import main; main()"]


def _real_run(name: str, root: Path) -> tuple[str, subprocess.CompletedProcess, Path, Path]:
    entry = CATALOGUE[name]
    folder = root / name.replace(" ", "_").replace("^", "")
    folder.mkdir()
    data = entry.make(folder)
    out = folder / "out"
    args = (_prepare_args(entry, data, out) if entry.audit is None
            else _audit_args(entry, data, folder / "report.json"))
    env = {**os.environ, **entry.env,
           "PYTHONPATH": str(Path(panelprep.__file__).resolve().parent.parent)}
    done = subprocess.run([*_command(), *args], capture_output=True, text=True, timeout=300,
                          env=env, check=False)
    return name, done, folder, out


@pytest.fixture(scope="module")
def real_runs(tmp_path_factory) -> dict[str, tuple]:
    root = tmp_path_factory.mktemp("real")
    with ThreadPoolExecutor(max_workers=4) as pool:
        done = list(pool.map(lambda n: _real_run(n, root), REAL))
    return {name: rest for name, *rest in done}


@pytest.mark.parametrize("name", REAL)
def test_in_a_real_process_no_traceback(real_runs, name):
    entry = CATALOGUE[name]
    done, folder, out = real_runs[name]
    expected = entry.prepare if entry.audit is None else entry.audit
    assert done.returncode == expected, done.stderr
    assert "Traceback" not in done.stderr and "Traceback" not in done.stdout
    if expected == 2:
        _check_unusable(done.stderr, entry.words)
        assert not out.exists() and not (folder / "report.json").exists()
    else:
        _check_verdict(json.loads((folder / "report.json").read_text(encoding="utf-8")), entry,
                       expected)
    assert not list(folder.glob(".out.*"))
