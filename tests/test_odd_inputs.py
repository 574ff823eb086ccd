"""Odd but legitimate inputs that once ended in an internal failure or a stray warning.

Each case runs the installed command in a real process (all of them once, a
few at a time, in a module fixture) and says what it must answer: exit 0/1
with the right numbers and findings, or exit 2 with one line on stderr naming
the file, column, value or option, never an exception class, and nothing
else on stderr.  A few cases on the numerics underneath run in this process.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import shutil
import subprocess
import warnings
from concurrent.futures import ThreadPoolExecutor
from decimal import Decimal
from fractions import Fraction
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from test_messages import Run, _command

FIRMS = ["00101"] * 4 + ["00102"] * 4 + ["00103"] * 4
YEARS = [2018, 2019, 2020, 2021] * 3
# invented numbers, varying within and between firms
SALES = [93.5, 101.2, 99.0, 104.4, 151.0, 166.2, 160.0, 171.3, 88.0, 95.5, 90.1, 97.6]
CAPITAL = [77.1, 76.3, 80.2, 79.9, 146.6, 145.1, 150.3, 149.0, 60.2, 59.9, 63.5, 61.1]
PREPARE = ("-e", "firm_id", "-t", "year", "--y", "sales", "--x", "capital")
AUDIT = ("-e", "firm_id", "-t", "year", "--vars", "sales,capital")


def _frame(**columns) -> pd.DataFrame:
    base = {"firm_id": FIRMS, "year": YEARS, "sales": SALES, "capital": CAPITAL}
    return pd.DataFrame({**base, **columns})


def _corrupt_page(path: Path, column: int, group: int = 0) -> None:
    """Overwrite 8 bytes in the middle of a data page; the footer and page header still read."""
    chunk = pq.read_metadata(path).row_group(group).column(column)
    start = chunk.data_page_offset
    middle = start + (chunk.total_compressed_size - (start - (chunk.dictionary_page_offset
                                                             or start))) // 2
    data = bytearray(path.read_bytes())
    data[middle:middle + 8] = bytes(b ^ 0xFF for b in data[middle:middle + 8])
    path.write_bytes(bytes(data))


def _inputs(root: Path) -> dict[str, Path]:
    f: dict[str, Path] = {}

    def parquet(name: str, table: pa.Table, **options) -> None:
        f[name] = root / name
        pq.write_table(table, f[name], **options)

    def csv(name: str, frame: pd.DataFrame) -> None:
        f[name] = root / name
        frame.to_csv(f[name], index=False)

    csv("good.csv", _frame())
    good = pa.Table.from_pandas(_frame(), preserve_index=False)
    parquet("list_key.parquet", good.set_column(0, "firm_id", pa.array([[v] for v in FIRMS])))
    parquet("struct_time.parquet", good.set_column(
        1, "year", pa.array([{"y": v} for v in YEARS])))
    parquet("map_key.parquet", good.set_column(
        0, "firm_id", pa.array([[("id", v)] for v in FIRMS], pa.map_(pa.string(), pa.string()))))
    cents = [Decimal(f"{v:.2f}") for v in CAPITAL]
    parquet("decimal.parquet", good.set_column(3, "capital", pa.array(cents, pa.decimal128(12, 2))))
    # 22 significant digits: float64 keeps about 16 of them
    wide = [Decimal("12345678901234567890.12") + i * Decimal("1000.01") for i in range(12)]
    parquet("decimal_wide.parquet", good.set_column(
        3, "capital", pa.array(wide, pa.decimal128(38, 2))))
    csv("input_row.csv", _frame().rename(columns={"firm_id": "input_row"}))
    csv("pp_row.csv", _frame().rename(columns={"firm_id": "pp_row"}))
    csv("weeks.csv", _frame(year=["2021-W50", "2021-W51", "2021-W52", "2021-W53"] * 3)
        .rename(columns={"year": "week"}))
    csv("weeks_2020.csv", _frame(year=["2020-W50", "2020-W51", "2020-W52", "2020-W53"] * 3)
        .rename(columns={"year": "week"}))
    csv("spread.csv", _frame(year=[2000, 2001, 2002, 2003, 2010, 2011, 2012, 2013,
                                   2020, 2021, 2022, 2023]))
    csv("near_1e99.csv", _frame(sales=[v * 1e99 for v in SALES],
                                capital=[v * 1e99 for v in CAPITAL]))
    csv("near_max.csv", _frame(sales=[(-1) ** i * 1.7e308 for i in range(12)],
                               capital=[v * 1e306 for v in CAPITAL]))
    csv("scripts.csv", _frame(firm_id=["\u4f01\u696d\u7532"] * 4 + ["\u0634\u0631\u0643\u0629"] * 4
                              + ["x" * 10_000] * 4)
        .rename(columns={"sales": "\u58f2\u4e0a", "capital": "\u0440\u0430\u0441\u0445\u043e\u0434"}))
    # checksummed pages, one of them damaged: the values read back wrong without a check
    rows = 3000
    big = pa.table({"firm_id": [f"f{i // 10:04d}" for i in range(rows)],
                    "year": [2000 + i % 10 for i in range(rows)],
                    "sales": np.sin(np.arange(rows)) * 100 + 500,
                    "capital": np.cos(np.arange(rows)) * 50 + 200})
    parquet("damaged.parquet", big, write_page_checksum=True, row_group_size=1000)
    _corrupt_page(f["damaged.parquet"], column=3, group=1)
    # links that lead back to themselves, and a folder where a file is wanted
    for name in ("loop.csv", "loop_out", "loop.json", "loop.html"):
        os.symlink(name, root / name)
        f[name] = root / name
    (root / "a_folder").mkdir()
    f["a_folder"] = root / "a_folder"
    work = root / "work" / "here"
    work.mkdir(parents=True)
    (work / "keep.txt").write_text("a file of the user's own\n")
    f["work"] = work
    return f


def _jobs(f: dict[str, Path]) -> dict[str, tuple[list, Path | None]]:
    """name -> (command line after the program, working folder or None)."""
    good, here = f["good.csv"], f["work"]
    return {
        "list-key": (["audit", f["list_key.parquet"], *AUDIT], None),
        "struct-time": (["prepare", f["struct_time.parquet"], *PREPARE], None),
        "map-key": (["audit", f["map_key.parquet"], *AUDIT], None),
        "decimal": (["prepare", f["decimal.parquet"], *PREPARE], None),
        "decimal-audit": (["audit", f["decimal.parquet"], *AUDIT], None),
        "decimal-wide": (["audit", f["decimal_wide.parquet"], *AUDIT], None),
        "input-row-entity": (["prepare", f["input_row.csv"], "-e", "input_row", "-t", "year",
                              "--y", "sales", "--x", "capital", "--duplicates", "drop-exact"],
                             None),
        "pp-row-entity": (["prepare", f["pp_row.csv"], "-e", "pp_row", "-t", "year", "--y",
                           "sales", "--x", "capital"], None),
        "loop-data": (["audit", f["loop.csv"], *AUDIT], None),
        "loop-out": (["prepare", good, *PREPARE, "--out", f["loop_out"], "--force"], None),
        "loop-report": (["audit", good, *AUDIT, "--report", f["loop.json"]], None),
        "loop-html": (["audit", good, *AUDIT, "--report-html", f["loop.html"]], None),
        "out-dot": (["prepare", good, *PREPARE, "--out", ".", "--force"], here),
        "out-empty": (["prepare", good, *PREPARE, "--out", "", "--force"], here),
        "out-dotdot": (["prepare", good, *PREPARE, "--out", "..", "--force"], here),
        "out-parent": (["prepare", good, *PREPARE, "--out", here.parent, "--force"], here),
        "failed-out-dot": (["prepare", good, *PREPARE, "--out", "fresh", "--failed-out", ".",
                            "--fail-on", "warning"], here),
        "draft-missing-folder": (["draft", good, "-o", f["work"] / "nope" / "run.toml"], None),
        "draft-folder": (["draft", good, "-o", f["a_folder"], "--force"], None),
        "report-folder": (["audit", good, *AUDIT, "--report", f["a_folder"]], None),
        "week-53": (["audit", f["weeks.csv"], "-e", "firm_id", "-t", "week", "--vars",
                     "sales,capital"], None),
        "week-53-exists": (["audit", f["weeks_2020.csv"], "-e", "firm_id", "-t", "week",
                            "--vars", "sales,capital"], None),
        "lag-huge": (["prepare", good, *PREPARE, "--lag", "capital:99999999999999999999"], None),
        "lag-beyond": (["prepare", good, "-e", "firm_id", "-t", "year", "--y", "sales", "--x",
                        "capital,capital_lag5", "--lag", "capital:5"], None),
        "lead-beyond": (["prepare", good, *PREPARE, "--lead", "capital:4"], None),
        "lag-finds-nothing": (["prepare", f["spread.csv"], "-e", "firm_id", "-t", "year",
                               "--y", "sales", "--x", "capital,capital_lag5", "--lag",
                               "capital:5"], None),
        "near-1e99": (["prepare", f["near_1e99.csv"], *PREPARE], None),
        "unit-scale": (["prepare", good, *PREPARE], None),
        "near-max": (["prepare", f["near_max.csv"], *PREPARE, "--transform",
                      "within,between,quasi,twoway"], None),
        "scripts": (["audit", f["scripts.csv"], "-e", "firm_id", "-t", "year", "--report-html",
                     "{html}"], None),
        "damaged": (["audit", f["damaged.parquet"], "-e", "firm_id", "-t", "year"], None),
        "damaged-other-columns": (["audit", f["damaged.parquet"], "-e", "firm_id", "-t",
                                   "year", "--vars", "sales"], None),
    }


def _run(name: str, args: list, cwd: Path | None, root: Path) -> Run:
    out = root / f"{name}.out"
    report = root / f"{name}.json"
    args = ["" if a == "" else str(a) for a in args]
    args = [str(root / f"{name}.html") if a == "{html}" else a for a in args]
    extra = []
    if args[0] == "prepare" and "--out" not in args:
        extra = ["--out", str(out)]
    elif args[0] == "audit" and "--report" not in args:
        extra = ["--report", str(report)]
    # a read-only home: no library may need to write a cache there
    env = {**os.environ, "HOME": str(root / "readonly-home")}
    done = subprocess.run([*_command(), *args, *extra, "--quiet"] if args[0] != "draft"
                          else [*_command(), *args], capture_output=True, timeout=300,
                          check=False, cwd=cwd, env=env)
    target = out / "diagnostics.json" if args[0] == "prepare" else report
    document = json.loads(target.read_text(encoding="utf-8")) if target.is_file() else None
    return Run(done.returncode, done.stdout.decode("utf-8", "replace"),
               done.stderr.decode("utf-8", "replace"), document, out, inputs_before={})


@pytest.fixture(scope="module")
def inputs(tmp_path_factory) -> dict[str, Path]:
    root = tmp_path_factory.mktemp("odd")
    home = root / "readonly-home"
    home.mkdir()
    home.chmod(0o555)
    return _inputs(root)


@pytest.fixture(scope="module")
def runs(inputs) -> dict[str, Run]:
    root = inputs["good.csv"].parent
    jobs = _jobs(inputs)
    with ThreadPoolExecutor(max_workers=4) as pool:
        futures = {name: pool.submit(_run, name, args, cwd, root)
                   for name, (args, cwd) in jobs.items()}
        return {name: future.result() for name, future in futures.items()}


def unusable(run: Run, *words: str) -> str:
    """The one stderr line of an exit-2 run, checked for ``words``; no report, no output."""
    assert run.returncode == 2, (run.stdout, run.stderr)
    lines = run.stderr.strip().splitlines()
    assert len(lines) == 1, run.stderr
    line = lines[0]
    assert line.startswith("panelprep: error: "), line
    assert "internal failure" not in line and "Error:" not in line, line
    for word in words:
        assert word in line, (word, line)
    assert run.report is None and not run.out.exists()
    return line


def passed(run: Run, code: int = 0) -> dict[str, dict]:
    """The findings of a run that ended with ``code`` and wrote nothing on stderr."""
    assert run.returncode == code, run.stderr
    assert run.stderr == "", run.stderr
    assert run.report is not None
    return {f["id"]: f for f in run.report["findings"]}


# --- Parquet types ---------------------------------------------------------------------------

@pytest.mark.parametrize("name, column, kind", [
    ("list-key", "'firm_id'", "list<element: string>"),
    ("struct-time", "'year'", "struct<y: int64>"),
    ("map-key", "'firm_id'", "map<string, string"),
])
def test_nested_key_columns_are_refused_naming_column_and_type(runs, name, column, kind):
    # before: internal failure, TypeError: unhashable type
    unusable(runs[name], f"key column {column}", kind, "flatten")


def test_decimal_regressor_is_read_as_its_numbers(runs):
    # before: internal failure, TypeError: object of type 'decimal.Decimal' has no len()
    found = passed(runs["decimal"])
    assert "values-decimal-rounded" not in found
    assert "values-not-numeric" not in found
    capital = runs["decimal"].report["variables"]["capital"]
    # outside source: numpy on the same cents as Python floats
    cents = np.array([float(Decimal(f"{v:.2f}")) for v in CAPITAL])
    assert capital["mean"] == pytest.approx(cents.mean(), rel=1e-14)
    assert capital["sd_overall"] == pytest.approx(cents.std(ddof=1), rel=1e-12)
    clean = pd.read_parquet(runs["decimal"].out / "clean.parquet")
    np.testing.assert_array_equal(clean["capital"].to_numpy(dtype=float), cents)
    assert runs["decimal-audit"].returncode == 0, runs["decimal-audit"].stderr


def test_decimals_float64_cannot_hold_are_reported_with_row_and_value(runs):
    found = passed(runs["decimal-wide"])
    rounded = found["values-decimal-rounded"]
    assert (rounded["count"], rounded["severity"]) == (12, "warning")
    first = rounded["examples"][0]
    assert (first["column"], first["row"], first["value"]) == (
        "capital", 1, "12345678901234567890.12")
    # outside source: Python's own decimal-to-float conversion
    assert float(first["read_as"]) == float(Decimal("12345678901234567890.12"))
    assert "decimal128(38, 2)" in rounded["message"]


# --- names -----------------------------------------------------------------------------------

def test_entity_named_like_the_ledgers_old_column_prepares(runs):
    # before: ValueError: cannot insert input_row, already exists
    passed(runs["input-row-entity"])
    dropped = pd.read_parquet(runs["input-row-entity"].out / "dropped.parquet")
    assert {"input_row", "pp_row"} <= set(dropped.columns)


def test_entity_named_like_an_added_column_names_the_rename(runs):
    unusable(runs["pp-row-entity"], "'pp_row'", "--names row=")


# --- paths -----------------------------------------------------------------------------------

@pytest.mark.parametrize("name, path", [("loop-data", "loop.csv"), ("loop-out", "loop_out"),
                                        ("loop-report", "loop.json"), ("loop-html", "loop.html")])
def test_symbolic_link_loops_are_named(runs, name, path):
    # before: internal failure, RuntimeError: Symlink loop
    unusable(runs[name], path, "symbolic link loop")


@pytest.mark.parametrize("name, which", [
    ("out-dot", "is the current folder"), ("out-empty", "is the current folder"),
    ("out-dotdot", "is a folder above the current one"),
    ("out-parent", "is a folder above the current one"),
    ("failed-out-dot", "is the current folder"),
])
def test_current_folder_and_its_parents_are_refused_as_output(runs, inputs, name, which):
    # before: OSError: Device or resource busy (".") or, for a parent, replaced with --force
    unusable(runs[name], which, "--out prepared")
    assert (inputs["work"] / "keep.txt").read_text() == "a file of the user's own\n"


def test_draft_into_a_missing_folder_says_so(runs):
    unusable(runs["draft-missing-folder"], "run.toml", "parent folder", "does not exist")


@pytest.mark.parametrize("name", ["draft-folder", "report-folder"])
def test_a_folder_given_as_a_file_is_refused(runs, inputs, name):
    # before (draft): IsADirectoryError
    unusable(runs[name], "a_folder", "is a folder")
    assert inputs["a_folder"].is_dir() and not any(inputs["a_folder"].iterdir())


# --- time ------------------------------------------------------------------------------------

def test_a_week_53_the_year_does_not_have_names_value_and_row(runs):
    # before: a raw pandas parser message
    line = unusable(runs["week-53"], "'2021-W53'", "row 4", "no such week", "52 weeks")
    assert "format=" not in line


def test_a_week_53_the_year_has_is_read(runs):
    # outside source: Python's date.fromisocalendar says ISO 2020 has a week 53
    assert dt.date.fromisocalendar(2020, 53, 1) == dt.date(2020, 12, 28)
    passed(runs["week-53-exists"])
    assert runs["week-53-exists"].report["panel"]["periods"] == 4


def test_iso_week_mondays_match_the_standard_library():
    from panelprep.timeaxis import iso_week_monday

    years, weeks, days = [], [], []
    for year in range(1800, 2201):
        for week in (1, 2, 27, 52, 53):
            try:
                monday = dt.date.fromisocalendar(year, week, 1)
            except ValueError:
                continue
            years.append(year)
            weeks.append(week)
            days.append((monday - dt.date(1970, 1, 1)).days)
    # outside source: datetime.date.fromisocalendar
    np.testing.assert_array_equal(iso_week_monday(np.array(years), np.array(weeks)), days)


# --- options ---------------------------------------------------------------------------------

def test_a_lag_too_large_for_any_integer_is_refused(runs):
    # before: internal failure, OverflowError: Python int too large to convert to C long
    unusable(runs["lag-huge"], "--lag capital:99999999999999999999", "beyond the data",
             "4 period(s) run 2018 to 2021", "below 4")


@pytest.mark.parametrize("name, option", [("lag-beyond", "--lag capital:5"),
                                          ("lead-beyond", "--lead capital:4")])
def test_a_shift_longer_than_the_grid_is_refused(runs, name, option):
    # before: an all-missing column that listwise deletion turned into an empty sample
    unusable(runs[name], option, "beyond the data", "missing on every row")


def test_a_lag_that_finds_no_value_anywhere_is_refused(runs):
    unusable(runs["lag-finds-nothing"], "--lag capital:5", "no row has a value",
             "'capital_lag5'", "missing on every row")


# --- numbers near the ends of float64, and warnings ------------------------------------------

def test_values_near_1e99_give_the_evidence_of_the_same_data_at_unit_scale(runs):
    # before: RuntimeWarning: overflow encountered in matmul on stderr, evidence from infinities
    found = passed(runs["near-1e99"])
    assert "library-warnings" not in found and "evidence-not-computable" not in found
    big, unit = runs["near-1e99"].report["evidence"], runs["unit-scale"].report["evidence"]
    for test in ("breusch_pagan", "honda", "mundlak", "hausman"):
        assert big[test]["statistic"] is not None, test
        # the tests are scale-invariant: multiplying y and x by 1e99 changes no statistic
        assert big[test]["statistic"] == pytest.approx(unit[test]["statistic"], rel=1e-9), test


def test_values_near_the_largest_float_run_without_a_warning(runs):
    run = runs["near-max"]
    assert run.returncode in (0, 1), run.stderr
    assert run.stderr.strip() == "" or run.stderr.startswith("panelprep: the gate failed")
    document = run.report or json.loads(
        (run.out.with_name(run.out.name + ".failed") / "diagnostics.json").read_text())
    json.dumps(document, allow_nan=False)
    assert "library-warnings" not in {f["id"] for f in document["findings"]}


def test_non_latin_and_very_long_names_draw_the_report_without_a_warning(runs, inputs):
    # before: matplotlib glyph, layout and cache warnings on stderr (HOME read-only here)
    passed(runs["scripts"])
    page = (inputs["good.csv"].parent / "scripts.html").read_text(encoding="utf-8")
    assert "\u58f2\u4e0a" in page and "\u0634\u0631\u0643\u0629" in page


def test_within_means_of_values_near_the_largest_float_do_not_overflow():
    from panelprep.transforms import between, within

    values = np.array([-1e308, -9e307, 5.0, 7.0])  # their sum is beyond float64
    codes = np.array([0, 0, 1, 1])
    counts = np.array([2, 2])
    # outside source: exact rational arithmetic (fractions.Fraction)
    mean = float((Fraction(-1e308) + Fraction(-9e307)) / 2)
    np.testing.assert_array_equal(between(values, codes, counts), [mean, 6.0])
    np.testing.assert_array_equal(within(values, codes, counts),
                                  [-1e308 - mean, -9e307 - mean, -1.0, 1.0])


def test_an_overflowing_test_is_null_with_a_finding_naming_its_variables(monkeypatch):
    from panelprep import evidence
    from panelprep.prepare import PrepareOptions, prepare_frame

    def overflowing(*args, **kwargs):
        return np.float64(1e300) * np.float64(1e300)

    monkeypatch.setattr(evidence, "mundlak_test", overflowing)
    prep = prepare_frame(_frame(), PrepareOptions(entity=["firm_id"], time="year", y="sales",
                                                  x=["capital"]))
    mundlak = prep.summary["evidence"]["mundlak"]
    assert mundlak["statistic"] is None and mundlak["p_value"] is None
    assert "overflow" in mundlak["note"]
    found = {f["id"]: f for f in prep.summary["findings"]}
    lost = found["evidence-not-computable"]
    assert lost["severity"] == "warning" and "mundlak (sales, capital)" in lost["message"]
    # the other tests are computed as before
    assert prep.summary["evidence"]["hausman"]["statistic"] is not None
    json.dumps(prep.summary, allow_nan=False)


def test_a_library_warning_is_recorded_as_a_finding_not_printed(monkeypatch):
    from panelprep import prepare

    real = prepare.collect_evidence

    def warning(*args, **kwargs):
        warnings.warn("something odd in a library", RuntimeWarning, stacklevel=1)
        return real(*args, **kwargs)

    monkeypatch.setattr(prepare, "collect_evidence", warning)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # one that escaped would fail the test here
        prep = prepare.prepare_frame(_frame(), prepare.PrepareOptions(
            entity=["firm_id"], time="year", y="sales", x=["capital"]))
    said = {f["id"]: f for f in prep.summary["findings"]}["library-warnings"]
    assert said["severity"] == "info" and said["count"] == 1
    assert said["examples"][0]["message"] == "something odd in a library"
    assert prep.verdict == "pass"


# --- Parquet page checksums ------------------------------------------------------------------

def test_a_damaged_checksummed_page_is_refused_naming_column_and_row_group(runs):
    # before: exit 0 with the damaged numbers
    unusable(runs["damaged"], "damaged.parquet", "column 'capital'", "page checksum",
             "row group 2 of 3", "rows 1,001 to 2,000", "fresh copy")


def test_columns_outside_the_damage_still_read(runs):
    passed(runs["damaged-other-columns"])


def test_prepared_parquet_files_carry_page_checksums(runs, tmp_path):
    clean = runs["unit-scale"].out / "clean.parquet"
    copy = tmp_path / "clean.parquet"
    shutil.copy(clean, copy)
    column = pq.read_schema(copy).names.index("capital")
    _corrupt_page(copy, column)
    # outside check: pyarrow's own reader verifies the checksums panelprep wrote
    with pytest.raises(OSError, match="CRC checksum verification failed"):
        pq.read_table(copy, page_checksum_verification=True)
    done = subprocess.run([*_command(), "audit", str(copy), "-e", "firm_id", "-t", "year",
                           "--quiet"], capture_output=True, text=True, timeout=120, check=False)
    assert done.returncode == 2 and "column 'capital' fails its page checksum" in done.stderr
