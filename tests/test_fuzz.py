"""Fuzzing: generated frames through the API, generated CSV bytes through the command line.

Whatever goes in, a run ends in one of two ways: a verdict (exit 0 or 1) with
a strict JSON report, or an ``InputError`` (exit 2) with a one-line message.
Any other exception is a bug, and so is a traceback on stderr.  Example
counts are small so CI stays quick; ``PANELPREP_FUZZ_SCALE=50`` multiplies
them for a longer local run (see DEVELOPERS.md).
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from conftest import examples
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from panelprep.choices import METHODS, TRANSFORMS
from panelprep.clean import Policies
from panelprep.cli import app
from panelprep.errors import InputError
from panelprep.io import TEMP_PREFIX
from panelprep.lags import parse_shifts
from panelprep.pipeline import audit
from panelprep.prepare import PrepareOptions, prepare_frame

_QUIET = [HealthCheck.too_slow, HealthCheck.function_scoped_fixture]


def fuzz(count: int) -> settings:
    """Settings of a fuzz test: ``count`` examples (scaled), no per-example deadline."""
    return settings(max_examples=examples(count), deadline=None, suppress_health_check=_QUIET)


def strict_json(document: object) -> object:
    """Round-trip through JSON, refusing NaN and infinities as strict JSON does."""
    def refuse(token: str) -> None:
        raise ValueError(f"not strict JSON: {token}")

    return json.loads(json.dumps(document, allow_nan=False), parse_constant=refuse)


def assert_one_line(message: str) -> None:
    assert message and "\n" not in message.strip(), message
    assert "Traceback" not in message


# --- generated frames through the API -----------------------------------------------------

IDS = st.one_of(
    st.text(st.characters(codec="utf-8", exclude_categories=("Cs",)), max_size=6),
    st.sampled_from(["00123", "0123", "A 1", "a 1", " A1", "A1 ", "", "   ", "ÄÖ", "e\u0301",
                     "\u00e9", "NA", "null", "nan"]),
)
FLOATS = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True),
    st.sampled_from([0.0, -0.0, 1e308, -1e308, 5e-324, 2.0**53, 2.0**53 + 2, np.nan]),
)
TEXT_NUMBERS = st.sampled_from(["1.5", "2", "", " ", "n/a", "1,234", "12%", "-", "inf", "NaN",
                                "9007199254740993", "1e5", "3,5", "x"])


@st.composite
def time_columns(draw, n: int) -> pd.Series:
    kind = draw(st.sampled_from(["int", "int", "wide-int", "nullable-int", "float", "quarter",
                                 "month", "date", "datetime", "tz-datetime", "mixed", "text",
                                 "category"]))
    if kind in ("int", "nullable-int", "category"):
        values = draw(st.lists(st.integers(1990, 1999), min_size=n, max_size=n))
        if kind == "category":
            return pd.Series(values).astype(str).astype("category")
        series = pd.Series(values, dtype="int64" if kind == "int" else "Int64")
        if kind == "nullable-int" and n:
            series.iloc[draw(st.integers(0, n - 1))] = pd.NA
        return series
    if kind == "wide-int":
        values = draw(st.lists(st.integers(-(2**63), 2**63 - 1), min_size=n, max_size=n))
        return pd.Series(values, dtype="int64")
    if kind == "float":
        return pd.Series(draw(st.lists(st.one_of(st.integers(0, 5).map(float), FLOATS),
                                       min_size=n, max_size=n)), dtype="float64")
    if kind == "quarter":
        return pd.Series([f"{y}Q{q}" for y, q in draw(st.lists(
            st.tuples(st.integers(2019, 2021), st.integers(1, 4)), min_size=n, max_size=n))])
    if kind == "month":
        return pd.Series([f"{y}-{m:02d}" for y, m in draw(st.lists(
            st.tuples(st.integers(2019, 2021), st.integers(0, 13)), min_size=n, max_size=n))])
    if kind in ("date", "datetime", "tz-datetime"):
        stamps = draw(st.lists(st.datetimes(min_value=pd.Timestamp("1700-01-01").to_pydatetime(),
                                            max_value=pd.Timestamp("2200-01-01").to_pydatetime()),
                               min_size=n, max_size=n))
        series = pd.Series(pd.to_datetime(stamps), dtype="datetime64[ns]")
        if kind == "tz-datetime":
            return series.dt.tz_localize("UTC").dt.tz_convert("Europe/Berlin")
        return series.dt.strftime("%Y-%m-%d") if kind == "date" else series
    if kind == "mixed":
        pool = st.one_of(st.integers(1990, 1995), st.sampled_from(["2021Q1", "1991", None, "x"]))
        return pd.Series(draw(st.lists(pool, min_size=n, max_size=n)), dtype=object)
    return pd.Series(draw(st.lists(st.one_of(st.none(), st.text(max_size=4)),
                                   min_size=n, max_size=n)), dtype=object)


def variable_column(draw, n: int) -> pd.Series:
    kind = draw(st.sampled_from(["float", "float", "normal", "int", "nullable-int", "big-int",
                                 "text", "string", "bool", "empty", "category"]))
    if kind == "float":
        return pd.Series(draw(st.lists(FLOATS, min_size=n, max_size=n)), dtype="float64")
    if kind == "normal":
        scale = draw(st.sampled_from([1e-300, 1e-8, 1.0, 1e8, 1e99]))
        return pd.Series(draw(st.lists(st.floats(-3, 3), min_size=n, max_size=n)),
                         dtype="float64") * scale
    if kind in ("int", "nullable-int"):
        values = pd.Series(draw(st.lists(st.integers(-5, 5), min_size=n, max_size=n)),
                           dtype="int64" if kind == "int" else "Int64")
        if kind == "nullable-int" and n:
            values.iloc[0] = pd.NA
        return values
    if kind == "big-int":
        return pd.Series(draw(st.lists(st.integers(-(2**63), 2**63 - 1), min_size=n, max_size=n)),
                         dtype="int64")
    if kind in ("text", "string", "category"):
        values = pd.Series(draw(st.lists(TEXT_NUMBERS, min_size=n, max_size=n)), dtype=object)
        return values.astype({"text": object, "string": "string", "category": "category"}[kind])
    if kind == "bool":
        return pd.Series(draw(st.lists(st.booleans(), min_size=n, max_size=n)), dtype=bool)
    return pd.Series([np.nan] * n, dtype="float64")


@st.composite
def panels(draw) -> pd.DataFrame:
    """Small hostile panels: odd dtypes, missing values, repeated keys, extremes.

    Columns ``id`` (and ``id2`` for two-part keys), ``t``, ``y``, ``x``.
    """
    n = draw(st.integers(0, 30))
    ids = draw(st.lists(st.one_of(st.none(), IDS), min_size=1, max_size=8))
    entity = [ids[i] for i in draw(st.lists(st.integers(0, len(ids) - 1), min_size=n, max_size=n))]
    frame = pd.DataFrame({"id": pd.Series(entity, dtype=object)})
    id_kind = draw(st.sampled_from(["object", "str", "int", "category"]))
    if id_kind == "str":
        frame["id"] = frame["id"].astype("str").where(frame["id"].notna())
    elif id_kind == "int":
        frame["id"] = pd.Series([hash(v) % 7 if v is not None else None for v in entity],
                                dtype="Int64")
    elif id_kind == "category":
        frame["id"] = frame["id"].astype("category")
    frame["id2"] = pd.Series(draw(st.lists(st.sampled_from(["a", "b", None]), min_size=n,
                                           max_size=n)), dtype=object)
    frame["t"] = draw(time_columns(n)).reset_index(drop=True)
    for name in ("y", "x"):
        frame[name] = variable_column(draw, n).reset_index(drop=True)
    if n and draw(st.booleans()):
        # repeat some rows exactly, and some keys with other values
        rows = draw(st.lists(st.integers(0, n - 1), max_size=4))
        frame = pd.concat([frame, frame.iloc[rows]], ignore_index=True)
    return frame


def _ends_well(run) -> object:
    """Call ``run``; a report or a one-line InputError is fine, anything else fails the test."""
    try:
        return run()
    except InputError as err:
        assert_one_line(str(err))
        return None


@fuzz(120)
@given(panels(), st.sampled_from([None, "year", "day", "int", "month"]), st.booleans())
def test_audit_of_a_generated_frame_ends_in_a_verdict_or_one_line(frame, freq, two_part):
    entity = ["id", "id2"] if two_part else "id"
    report = _ends_well(lambda: audit(frame.copy(), entity, "t", freq=freq,
                                      missing_tokens=["n/a"]))
    if report is not None:
        document = strict_json(report.to_dict())
        assert document["verdict"] in ("pass", "fail")
        assert document["panel"]["rows"] <= len(frame)


@fuzz(80)
@given(panels(), st.sampled_from(["fail", "drop-exact", "keep-first", "mean"]),
       st.sampled_from(["keep", "drop"]),
       st.sampled_from(["keep", "complete-entities", "largest-block"]),
       st.sampled_from(METHODS), st.booleans(), st.sampled_from(["none", "trim-fold"]))
def test_preparation_of_a_generated_frame_ends_in_a_verdict_or_one_line(
        frame, duplicates, singletons, balance, method, lag, normalise):
    options = PrepareOptions(
        entity=["id"], time="t", y="y", x=["x_lag1" if lag else "x"], method=method,
        transforms=list(TRANSFORMS), shifts=parse_shifts("lag", "x:1" if lag else None),
        policies=Policies(duplicates=duplicates, singletons=singletons, balance=balance,
                          normalise_ids=normalise),
        # let degenerate samples through the gate, to reach every step after it
        severities={"components-underidentified": "warning", "panel-shape": "info",
                    "key-missing": "warning", "values-not-numeric": "warning"},
    )
    prep = _ends_well(lambda: prepare_frame(frame.copy(), options))
    if prep is None:
        return
    strict_json(prep.summary)
    for name, table in prep.tables.items():
        numbers = table.select_dtypes("number").to_numpy(dtype=np.float64, na_value=np.nan)
        if name == "dropped":
            continue
        # the sample holds finite values only, so nothing written may be NaN or infinite
        assert np.isfinite(numbers).all(), name


# --- generated CSV bytes through the command line -----------------------------------------

FIELDS = st.one_of(
    st.sampled_from(["", " ", "a", "00123", "A 1", "2001", "2002", "2001.0", "2021Q3", "2021-03",
                     "2021-W07", "2021-02-30", "1.5", "-2", "n/a", "1,234", "12%", "-", "inf",
                     "-inf", "NaN", "1e308", "9007199254740993", "123456789012345678901234",
                     "3,5", '"a,b"', '"x""y"', "ÄÖ", "\u00e9t\u00e9", "1999-12-31T23:00:00+01:00"]),
    st.integers(-3, 3).map(str),
    st.floats(allow_nan=False, allow_infinity=False, width=32).map(repr),
)
# plausible values per column, so most files get past the reader to the checks
POOLS = {
    "id": st.sampled_from(["a", "b", "c", "00123", "0123", "A 1", " a", "ÄÖ", '"a,b"', ""]),
    "year": st.sampled_from(["2001", "2002", "2003", "2004", "2002", "2001.0", "", "2009"]),
    "number": st.one_of(st.integers(-9, 9).map(str),
                        st.floats(-1e6, 1e6, allow_nan=False, width=32).map(repr),
                        st.sampled_from(["", "n/a", "1,5", "inf", "1e300", "9007199254740993"])),
}
HEADERS = [["id", "year", "y", "x"]] * 6 + [
    ["id", "year", "y", "y"], ["id", "year", "y"], ["year", "id", "x", "y", "z"],
    ["id ", " year", "y", "x"], ["\ufeffid", "year", "y", "x"]]
RAW = st.sampled_from([b"\xff", b"\x00", b"\xc3", b"\r", b'"', b"\xef\xbb\xbf", b"\t", b";",
                       b"\n", b","])


@st.composite
def csv_bytes(draw) -> bytes:
    """A CSV file as bytes: plausible rows, then a few broken fields, bytes, headers, endings."""
    delimiter = draw(st.sampled_from([",", ",", ",", ";", "\t", "|"]))
    header = draw(st.sampled_from(HEADERS))
    pools = [POOLS.get(name.strip().lstrip("\ufeff"), POOLS["number"]) for name in header]
    rows = draw(st.lists(st.tuples(*pools).map(list), max_size=16))
    for _ in range(draw(st.integers(0, 3))):
        if rows:
            row = draw(st.integers(0, len(rows) - 1))
            rows[row][draw(st.integers(0, len(header) - 1))] = draw(FIELDS)
    if rows and draw(st.integers(0, 7)) == 0:
        rows[draw(st.integers(0, len(rows) - 1))].append("9")  # one ragged row
    newline = draw(st.sampled_from(["\n", "\n", "\r\n", "\r"]))
    text = newline.join(delimiter.join(r) for r in [header, *rows])
    data = text.encode("utf-8") + (newline.encode() if draw(st.booleans()) else b"")
    if draw(st.integers(0, 3)) == 0:
        at = draw(st.integers(0, len(data)))
        data = data[:at] + draw(RAW) + data[at:]
    if draw(st.integers(0, 15)) == 0:
        data = data[: draw(st.integers(0, len(data)))]
    return data


def check_cli_run(result, report: Path | None) -> None:
    """Exit 0/1 with a strict JSON report, or exit 2 with one line; never an exception."""
    assert result.exception is None or isinstance(result.exception, SystemExit), (
        f"{type(result.exception).__name__}: {result.exception}")
    assert result.exit_code in (0, 1, 2)
    assert "Traceback" not in result.output
    if result.exit_code == 2:
        lines = result.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("panelprep: error: "), result.stderr
    elif report is not None:
        document = strict_json(json.loads(report.read_text(encoding="utf-8")))
        assert document["verdict"] == ("pass" if result.exit_code == 0 else "fail")


@fuzz(60)
@given(data=csv_bytes(), decimal_comma=st.booleans())
def test_audit_of_generated_csv_bytes(tmp_path, data, decimal_comma):
    path = tmp_path / "fuzz.csv"
    path.write_bytes(data)
    report = tmp_path / "report.json"
    report.unlink(missing_ok=True)
    args = ["audit", str(path), "-e", "id", "-t", "year", "--report", str(report), "--quiet",
            "--missing-token", "n/a"]
    result = CliRunner().invoke(app, args + (["--decimal-comma"] if decimal_comma else []))
    check_cli_run(result, report)
    if result.exit_code == 2:
        assert not report.exists()


@fuzz(40)
@given(data=csv_bytes(), transform=st.sampled_from(["within,between,quasi", "twoway"]),
       output_format=st.sampled_from(["parquet", "csv"]))
def test_preparation_of_generated_csv_bytes(tmp_path, data, transform, output_format):
    path = tmp_path / "fuzz.csv"
    path.write_bytes(data)
    out = tmp_path / "out"
    result = CliRunner().invoke(app, [
        "prepare", str(path), "-e", "id", "-t", "year", "--y", "y", "--x", "x", "--out", str(out),
        "--force", "--transform", transform, "--format", output_format, "--quiet",
        "--duplicates", "keep-first"])
    # a failed gate leaves --out alone and writes its diagnostics beside it, to OUT.failed
    written = {0: out, 1: tmp_path / "out.failed"}.get(result.exit_code)
    check_cli_run(result, None if written is None else written / "diagnostics.json")
    if result.exit_code == 1:
        assert not out.exists() or (out / "clean.parquet").exists() or (
            out / "clean.csv").exists(), "a failed gate touched the output folder"
    if result.exit_code == 2:
        assert not out.exists() or not any(out.iterdir()) or (out / "diagnostics.json").exists()
    assert not list(tmp_path.glob(f"{TEMP_PREFIX}*")), "a temporary folder was left behind"
    assert path.read_bytes() == data


@settings(max_examples=examples(6), deadline=None, derandomize=True)
@given(data=csv_bytes())
def test_generated_csv_bytes_in_a_real_process(tmp_path_factory, data):
    """The installed entry point: exit 0/1/2, one line for 2, no traceback, no hang."""
    folder = tmp_path_factory.mktemp("fuzz")
    path = folder / "fuzz.csv"
    path.write_bytes(data)
    code = "from panelprep.cli import main; main()"
    done = subprocess.run([sys.executable, "-c", code, "audit", str(path), "-e", "id", "-t",
                           "year", "--quiet"], capture_output=True, text=True, timeout=120,
                          check=False)
    assert done.returncode in (0, 1, 2), done.stderr
    assert "Traceback" not in done.stderr
    if done.returncode == 2:
        lines = done.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("panelprep: error: ")
        assert "internal error" not in lines[0], lines[0]


def test_strict_json_refuses_nan():
    # the checker itself must be able to fail
    with pytest.raises(ValueError, match="not JSON compliant"):
        strict_json({"x": math.nan})
