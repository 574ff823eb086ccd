"""Inputs whose message used to mislead, each run through the installed command in a real process.

Every case says what the command must answer: the exit code and, for exit 2,
the words of the one line on stderr (no traceback, no report, no output
folder, the input untouched); for exit 0/1 what the report holds.  All the
processes run once, a few at a time, in a module fixture; the tests look at
the results by name.
"""

from __future__ import annotations

import json
import lzma
import os
import shutil
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
GOOD = ("firm_id,year,sales,capital\n00101,2020,93.5,77.1\n00101,2021,101.2,76.3\n"
        "00102,2020,151.0,146.6\n00102,2021,166.2,145.1\n00103,2020,88.0,60.2\n"
        "00103,2021,95.5,59.9\n")
AUDIT = ("-e", "firm_id", "-t", "year", "--vars", "sales,capital")


def _command() -> list[str]:
    beside = Path(sys.executable).with_name("panelprep")
    found = str(beside) if beside.exists() else shutil.which("panelprep")
    return [found] if found else [sys.executable, "-c", "from panelprep.cli import main; main()"]


def _rows(*rows: str, header: str = "firm_id,year,sales,capital") -> str:
    return "\n".join([header, *rows]) + "\n"


def _panel(firms: int = 6, years: int = 5) -> pd.DataFrame:
    """An invented balanced panel with varying numbers (firm ids keep their zeros)."""
    rng = np.random.default_rng(7)
    firm = [f"{101 + i:05d}" for i in range(firms) for _ in range(years)]
    year = [2010 + t for _ in range(firms) for t in range(years)]
    return pd.DataFrame({"firm_id": firm, "year": year,
                         "sales": np.round(rng.normal(100, 20, firms * years), 1),
                         "capital": np.round(rng.normal(50, 10, firms * years), 1)})


def _inputs(root: Path) -> dict[str, Path]:
    files: dict[str, str | bytes] = {
        "good.csv": GOOD,
        # item 4: decimal fractions in a time column
        "half_years.csv": _rows(*(f"0010{e},{y}.5,{e + y % 7},{e * 2}" for e in (1, 2, 3)
                                  for y in range(2000, 2006))),
        "tenths.csv": _rows("00101,2021.1,1,2", "00101,2021.2,2,3", "00101,2021.3,3,4",
                            "00101,2021.4,4,5", "00101,2022.1,5,6", "00102,2021.1,2,1",
                            "00102,2021.2,3,1"),
        "whole_floats.csv": _rows("00101,2001.0,1,2", "00101,2002.0,2,3", "00102,2001.0,3,4",
                                  "00102,2002.0,5,1"),
        # item 6
        "q5.csv": _rows("00101,2021Q3,1,2", "00101,2021Q4,2,3", "00101,2021Q5,3,4",
                        "00102,2021Q3,3,4"),
        "same_day.csv": _rows("00101,2021-01-31,93.5,77.1", "00101,2021-01-31T00:00:00,93.5,77.1",
                              "00101,2021-02-28,101.2,76.3", "00101,2021-03-31,99.0,75.0",
                              "00102,2021-01-31,151.0,146.6", "00102,2021-02-28,166.2,145.1",
                              "00102,2021-03-31,160.0,140.0",
                              header="firm_id,day,sales,capital"),
        "json.csv": json.dumps([{"firm_id": f"{i:05d}", "year": 2000 + i % 5, "sales": i,
                                 "capital": i * 2} for i in range(60)]) + "\n",
        "gzipped.csv": __import__("gzip").compress(GOOD.encode()),
        "good.csv.xz": lzma.compress(GOOD.encode()),
        "bool.csv": _rows("00101,2020,1.5,true", "00101,2021,2.5,false", "00101,2022,2.0,",
                          "00102,2020,3.5,TRUE", "00102,2021,4.0,False", "00102,2022,4.5,true",
                          header="firm_id,year,sales,listed"),
    }
    for name, content in files.items():
        (root / name).write_bytes(content.encode() if isinstance(content, str) else content)
    pq.write_table(pa.table({"firm_id": ["00101", "00101", "00102", "00102"],
                             "year": [2020.5, 2021.5, 2020.5, 2021.5],
                             "sales": [1.0, 2.0, 3.0, 4.0], "capital": [1.0, 3.0, 2.0, 5.0]}),
                   root / "half_years.parquet")
    pq.write_table(pa.table({
        "firm_id": ["00101", "00101", "00101", "00102", "00102", "00102"],
        "year": [2020, 2021, 2022] * 2,
        "sales": [1.5, 2.5, 2.0, 3.5, 4.0, 4.5],
        "listed": pa.array([True, False, None, True, False, True], pa.bool_()),
    }), root / "bool.parquet")
    # the same NaN and empty cells as the CSV fixture, stored as Parquet NaN and null
    nan_csv = FIXTURES / "messages" / "nan_values.csv"
    shutil.copy(nan_csv, root / "nan_values.csv")
    text = pd.read_csv(nan_csv, dtype=str, keep_default_na=False)
    nan = {"sales": [float(v) for v in text["sales"]],
           "capital": [float(v) for v in text["capital"]]}
    pq.write_table(pa.table({"firm_id": text["firm_id"], "year": text["year"].astype(int),
                             **{k: pa.array(v, pa.float64()) for k, v in nan.items()}}),
                   root / "nan_values.parquet")
    nulls = {k: pa.array([None if np.isnan(x) else x for x in v], pa.float64())
             for k, v in nan.items()}
    pq.write_table(pa.table({"firm_id": text["firm_id"], "year": text["year"].astype(int),
                             **nulls}), root / "null_values.parquet")
    panel = _panel()
    tokens = panel.astype({"capital": object})
    tokens.loc[7, "capital"] = "n/a"
    tokens.to_csv(root / "tokens.csv", index=False)
    os.mkfifo(root / "pipe.csv")
    odd = os.fsencode(root) + b"/b\xffd.csv"
    with open(odd, "wb") as handle:
        handle.write(GOOD.encode())
    return {p.name: p for p in root.iterdir()}


def _jobs(root: Path, f: dict[str, Path]) -> dict[str, list]:
    """name -> command line after the program; ``{out}`` is the job's output folder."""
    good = f["good.csv"]
    prepare = [good, "-e", "firm_id", "-t", "year", "--y", "sales", "--x", "capital"]
    lagged = [f["tokens.csv"], "-e", "firm_id", "-t", "year", "--y", "sales",
              "--missing-token", "n/a", "--transform", "within"]
    return {
        "half-years": ["audit", f["half_years.csv"], *AUDIT],
        "half-years-month": ["audit", f["half_years.csv"], *AUDIT, "--freq", "month"],
        "tenths": ["audit", f["tenths.csv"], *AUDIT],
        "half-years-parquet": ["audit", f["half_years.parquet"], *AUDIT],
        "whole-floats": ["audit", f["whole_floats.csv"], *AUDIT],
        "nan-csv": ["audit", f["nan_values.csv"], *AUDIT],
        "nan-parquet": ["audit", f["nan_values.parquet"], *AUDIT],
        "null-parquet": ["audit", f["null_values.parquet"], *AUDIT],
        "window-reversed": ["prepare", *prepare, "--window", "2022,2021"],
        "window-outside": ["prepare", *prepare, "--window", "2030,2031"],
        "window-before": ["prepare", *prepare, "--window", ",2019"],
        "lag-token": ["prepare", *lagged, "--x", "capital_lag1", "--lag", "capital:1"],
        "diff-token": ["prepare", *lagged, "--x", "capital_diff1", "--diff", "capital:1"],
        "lag-undeclared": ["prepare", f["tokens.csv"], "-e", "firm_id", "-t", "year", "--y",
                           "sales", "--x", "capital_lag1", "--lag", "capital:1"],
        "xz": ["audit", f["good.csv.xz"], *AUDIT],
        "plain": ["audit", good, *AUDIT],
        "gzip-named-csv": ["audit", f["gzipped.csv"], *AUDIT],
        "fifo": ["audit", f["pipe.csv"], *AUDIT],
        "dev-zero": ["audit", Path("/dev/zero"), *AUDIT, "--input-format", "csv"],
        "non-utf8-name": ["audit", os.fsencode(root) + b"/b\xffd.csv", *AUDIT],
        "json-as-csv": ["audit", f["json.csv"], *AUDIT],
        "bool-parquet": ["audit", f["bool.parquet"], "-e", "firm_id", "-t", "year",
                         "--vars", "sales,listed"],
        "bool-csv": ["audit", f["bool.csv"], "-e", "firm_id", "-t", "year",
                     "--vars", "sales,listed"],
        "quarter-5": ["audit", f["q5.csv"], *AUDIT],
        "same-day": ["audit", f["same_day.csv"], "-e", "firm_id", "-t", "day",
                     "--vars", "sales,capital"],
    }


@dataclass
class Run:
    returncode: int
    stdout: str
    stderr: str
    report: dict | None
    out: Path
    inputs_before: dict[Path, bytes]


def _run(name: str, args: list, root: Path) -> Run:
    out = root / f"{name}.out"
    report = root / f"{name}.json"
    args = [str(a) if isinstance(a, Path) else a for a in args]
    extra = ["--out", str(out)] if args[0] == "prepare" else ["--report", str(report)]
    inputs = [Path(os.fsdecode(a)) for a in args[1:2]]
    before = {p: p.read_bytes() for p in inputs if p.is_file() and p.stat().st_size < 1 << 20}
    done = subprocess.run([*_command(), *args, *extra, "--quiet"], capture_output=True,
                          timeout=300, check=False)
    document = None
    target = out / "diagnostics.json" if args[0] == "prepare" else report
    if target.exists():
        document = json.loads(target.read_text(encoding="utf-8"))
    return Run(done.returncode, done.stdout.decode("utf-8", "replace"),
               done.stderr.decode("utf-8", "replace"), document, out, before)


@pytest.fixture(scope="module")
def runs(tmp_path_factory) -> dict[str, Run]:
    root = tmp_path_factory.mktemp("messages")
    jobs = _jobs(root, _inputs(root))
    with ThreadPoolExecutor(max_workers=4) as pool:
        futures = {name: pool.submit(_run, name, args, root) for name, args in jobs.items()}
        return {name: future.result() for name, future in futures.items()}


def unusable(run: Run, *words: str) -> str:
    """The one stderr line of an exit-2 run, checked for ``words``; nothing written or touched."""
    assert run.returncode == 2, (run.stdout, run.stderr)
    assert "Traceback" not in run.stderr
    lines = run.stderr.strip().splitlines()
    assert len(lines) == 1, run.stderr
    line = lines[0]
    assert line.startswith("panelprep: error: ") and "internal error" not in line, line
    for word in words:
        assert word in line, (word, line)
    assert run.report is None and not run.out.exists()
    for path, content in run.inputs_before.items():
        assert path.read_bytes() == content
    return line


def findings(run: Run) -> dict[str, dict]:
    assert run.report is not None, run.stderr
    return {f["id"]: f for f in run.report["findings"]}


# --- time values with a decimal point (issue 19, item 4) -----------------------------------

@pytest.mark.parametrize("name, value", [("half-years", "'2000.5'"), ("tenths", "'2021.1'"),
                                         ("half-years-month", "'2000.5'")])
def test_decimal_time_values_are_refused_naming_value_row_and_ways(runs, name, value):
    # before: read as dates in May on a yearly grid, or as months with only a holes warning
    unusable(runs[name], "time column 'year'", value, "row 1", "not a whole-number period",
             "2001Q3", "2001-03", "2001-06-30")


def test_decimal_time_values_from_parquet_get_the_same_message(runs):
    unusable(runs["half-years-parquet"], "time column 'year'", "value 2020.5", "row 1",
             "not a whole-number period", "2001Q3")


def test_whole_number_texts_with_a_point_zero_still_read_as_years(runs):
    run = runs["whole-floats"]
    assert run.returncode == 0, run.stderr
    assert run.report["keys"]["freq"] == "year"
    assert run.report["panel"]["periods"] == 2


# --- NaN in CSV text and in Parquet floats (issue 19, item 4) ------------------------------

def test_nan_is_missing_and_reported_the_same_from_csv_and_parquet(runs):
    # fixtures/messages/nan_values.csv: by hand, three NaN cells (sales rows 2 and 6,
    # capital row 3), so listwise deletion removes three of nine rows
    for name in ("nan-csv", "nan-parquet"):
        found = findings(runs[name])
        assert runs[name].returncode == 0, runs[name].stderr
        assert "values-not-numeric" not in found, name
        nan = found["values-nan-missing"]
        assert (nan["count"], nan["severity"]) == (3, "warning"), name
        assert sorted((e["column"], e["row"]) for e in nan["examples"]) == [
            ("capital", 3), ("sales", 2), ("sales", 6)]
        assert found["values-missing"]["count"] == 3
        assert runs[name].report["panel"]["rows"] == 6
    csv_doc, parquet_doc = runs["nan-csv"].report, runs["nan-parquet"].report
    assert csv_doc["variables"] == parquet_doc["variables"]


def test_parquet_nulls_are_plain_missing_values(runs):
    found = findings(runs["null-parquet"])
    assert "values-nan-missing" not in found
    assert found["values-missing"]["count"] == 3


# --- messages that misled (issue 19, item 6) ----------------------------------------------

def test_reversed_window_is_a_bad_option(runs):
    unusable(runs["window-reversed"], "--window 2022,2021", "comes after")


@pytest.mark.parametrize("name", ["window-outside", "window-before"])
def test_window_outside_the_data_is_a_bad_option(runs, name):
    unusable(runs[name], "--window", "no row lies inside the window", "2020 to 2021")


def _lags_by_pandas(column: str, kind: str) -> pd.Series:
    # outside source: pandas groupby-shift on the consecutive, balanced invented panel
    panel = _panel()
    values = panel["capital"].where(panel.index != 7)
    previous = values.groupby(panel["firm_id"]).shift(1)
    return previous if kind == "lag" else values - previous


@pytest.mark.parametrize("name, column, kind", [("lag-token", "capital_lag1", "lag"),
                                                ("diff-token", "capital_diff1", "diff")])
def test_lag_and_diff_read_a_declared_missing_token_as_missing(runs, name, column, kind):
    run = runs[name]
    assert run.returncode == 0, run.stderr
    clean = pd.read_parquet(run.out / "clean.parquet")
    panel = _panel()
    expected = _lags_by_pandas(column, kind).rename(column)
    merged = panel[["firm_id", "year"]].assign(expected=expected).merge(
        clean[["firm_id", "year", column]], on=["firm_id", "year"])
    # rows whose lag is missing are left out of the estimation sample; the rest match
    assert len(merged) == expected.notna().sum()
    np.testing.assert_allclose(merged[column], merged["expected"])


def test_lag_of_undeclared_text_names_the_value_and_the_option(runs):
    unusable(runs["lag-undeclared"], "--lag 'capital'", "'n/a'", "--missing-token")


def test_xz_compressed_csv_is_read_like_the_plain_file(runs):
    xz, plain = runs["xz"], runs["plain"]
    assert xz.returncode == plain.returncode == 0, xz.stderr
    assert xz.report["panel"] == plain.report["panel"]
    assert xz.report["variables"] == plain.report["variables"]
    assert xz.report["input"]["rows"] == 6


def test_compressed_file_without_its_suffix_says_so(runs):
    unusable(runs["gzip-named-csv"], "gzipped.csv", "gzip-compressed", ".csv.gz", ".csv.xz")


@pytest.mark.parametrize("name, kind", [("fifo", "a named pipe"), ("dev-zero", "a device")])
def test_special_files_are_not_regular_files(runs, name, kind):
    line = unusable(runs[name], kind, "not a regular file")
    assert "empty" not in line


def test_non_utf8_file_name_is_named_with_escapes(runs):
    line = unusable(runs["non-utf8-name"], "b\\xffd.csv", "not UTF-8", "rename")
    assert "codec" not in line


def test_json_named_csv_gets_a_short_message(runs):
    line = unusable(runs["json-as-csv"], "json.csv", "does not look like CSV column names")
    assert len(line) < 300, len(line)


@pytest.mark.parametrize("name", ["bool-parquet", "bool-csv"])
def test_booleans_with_a_null_are_zero_one_with_the_null_missing(runs, name):
    run = runs[name]
    assert run.returncode == 0, run.stderr
    found = findings(run)
    assert "values-not-numeric" not in found
    assert found["values-missing"]["count"] == 1
    listed = run.report["variables"]["listed"]
    # outside source: numpy on the five present values, true as 1 and false as 0
    present = np.array([1, 0, 1, 0, 1], dtype=float)
    assert (listed["n"], listed["min"], listed["max"]) == (5, 0.0, 1.0)
    assert listed["mean"] == pytest.approx(present.mean())
    assert listed["sd_overall"] == pytest.approx(present.std(ddof=1))


def test_quarter_five_says_there_is_no_such_quarter(runs):
    line = unusable(runs["quarter-5"], "'2021Q5'", "row 3", "no such quarter")
    assert "mixes kinds" not in line


def test_one_day_written_two_ways_is_an_exact_repeat_not_a_conflict(runs):
    run = runs["same-day"]
    assert run.returncode == 0, run.stderr
    found = findings(run)
    assert "key-conflict" not in found
    assert found["row-repeated"]["count"] == 1
    assert run.report["keys"]["freq"] == "month"
    assert "period-off-grid" not in found
