"""Fuzzing over Arrow types: Parquet and Feather files whose key and value columns have any type.

Each example writes a small panel whose entity, time and variable columns are
drawn from a long list of Arrow types (integers signed and unsigned, half and
full floats, decimals of every width, text and binary of every layout,
dictionaries, booleans, dates, timestamps with and without zones, times,
durations, lists, structs, maps, unions, nulls), with some nulls, and runs
``audit`` and ``prepare`` on it through the command line.  Every run must end
in exit 0 or 1 with a strict JSON report, or exit 2 with one line, never an
exception and never ``internal failure``.  ``PANELPREP_FUZZ_SCALE`` scales the
example counts (see DEVELOPERS.md).
"""

from __future__ import annotations

import datetime as dt
import decimal
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from conftest import examples
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from pyarrow import feather
from test_fuzz import check_cli_run
from typer.testing import CliRunner

from panelprep.cli import app

_QUIET = [HealthCheck.too_slow, HealthCheck.function_scoped_fixture]
Values = list[int | None]


def _numbers(kind: pa.DataType, shift: int = 0) -> Callable[[Values], pa.Array]:
    return lambda v: pa.array([None if x is None else x + shift for x in v], kind)


def _text(kind: pa.DataType, form: str = "s{:03d}") -> Callable[[Values], pa.Array]:
    return lambda v: pa.array([None if x is None else form.format(x) for x in v], kind)


def _binary(kind: pa.DataType) -> Callable[[Values], pa.Array]:
    return lambda v: pa.array([None if x is None else f"b{x:03d}".encode() for x in v], kind)


def _decimal(kind: pa.DataType, divisor: int = 1) -> Callable[[Values], pa.Array]:
    """x / divisor rounded to the type's scale (1/7 at scale 30 has 30 digits)."""
    step = decimal.Decimal(1).scaleb(-kind.scale)

    def make(v: Values) -> pa.Array:
        with decimal.localcontext(prec=80):
            return pa.array([None if x is None else (decimal.Decimal(x) / divisor).quantize(step)
                             for x in v], kind)
    return make


def _dates(kind: pa.DataType, year: bool = True) -> Callable[[Values], pa.Array]:
    def make(v: Values) -> pa.Array:
        start = dt.date(2000, 1, 1)
        return pa.array([None if x is None else
                         (dt.date(2000 + x, 1, 1) if year else start + dt.timedelta(days=x))
                         for x in v], kind)
    return make


def _stamps(kind: pa.DataType) -> Callable[[Values], pa.Array]:
    return lambda v: pa.array([None if x is None else dt.datetime(2000 + x, 6, 30, 12)
                               for x in v], kind)


def _wrapped(kind: pa.DataType, wrap: Callable[[int], object]) -> Callable[[Values], pa.Array]:
    return lambda v: pa.array([None if x is None else wrap(x) for x in v], kind)


def _dictionary(index: pa.DataType, inner: Callable[[Values], pa.Array]) -> Callable:
    return lambda v: inner(v).dictionary_encode().cast(
        pa.dictionary(index, inner(v).type))


def _union(v: Values) -> pa.Array:
    types = pa.array([0 if x is None or x % 2 else 1 for x in v], pa.int8())
    return pa.UnionArray.from_sparse(types, [pa.array([x for x in v], pa.int64()),
                                             pa.array([None if x is None else f"u{x}"
                                                       for x in v])])


def _nulls(v: Values) -> pa.Array:
    return pa.nulls(len(v))


ZONES = (None, "UTC", "America/New_York", "+05:30", "Asia/Kolkata")
TYPES: dict[str, Callable[[Values], pa.Array]] = {
    **{str(t): _numbers(t) for t in (pa.int8(), pa.int16(), pa.int32(), pa.int64(),
                                     pa.uint8(), pa.uint16(), pa.uint32(), pa.uint64())},
    "uint64-high": _numbers(pa.uint64(), 2**63),
    "int64-huge": _numbers(pa.int64(), 2**62),
    "float16": lambda v: pa.array(np.array([np.nan if x is None else x for x in v],
                                           dtype=np.float16),
                                  pa.float16(), from_pandas=True),
    "float32": _numbers(pa.float32()),
    "float64": _numbers(pa.float64()),
    "decimal32(5,0)": _decimal(pa.decimal32(5, 0)),
    "decimal64(12,3)": _decimal(pa.decimal64(12, 3), 8),
    "decimal128(10,2)": _decimal(pa.decimal128(10, 2), 4),
    "decimal128(38,0)": lambda v: pa.array([None if x is None else
                                            decimal.Decimal(10**37 + x * 10**20 + x)
                                            for x in v], pa.decimal128(38, 0)),
    "decimal128(38,30)": _decimal(pa.decimal128(38, 30), 7),
    "decimal256(76,10)": _decimal(pa.decimal256(76, 10), 3),
    "string": _text(pa.string()),
    "large_string": _text(pa.large_string()),
    "string_view": _text(pa.string_view()),
    "numeric string": _text(pa.string(), "{}"),
    "quarter string": _text(pa.string(), "2021Q{}"),
    "week string": _text(pa.string(), "2020-W{:02d}"),
    "binary": _binary(pa.binary()),
    "large_binary": _binary(pa.large_binary()),
    "binary_view": _binary(pa.binary_view()),
    "fixed_size_binary": _binary(pa.binary(4)),
    "dictionary<int8, string>": _dictionary(pa.int8(), _text(pa.string())),
    "dictionary<int32, int64>": _dictionary(pa.int32(), _numbers(pa.int64())),
    "dictionary<uint16, large_string>": _dictionary(pa.uint16(), _text(pa.large_string())),
    "bool": _wrapped(pa.bool_(), lambda x: x % 2 == 0),
    "date32": _dates(pa.date32()),
    "date64": _dates(pa.date64()),
    "date32 days": _dates(pa.date32(), year=False),
    **{f"timestamp[{unit}, {zone}]": _stamps(pa.timestamp(unit, tz=zone))
       for unit in ("s", "ms", "us", "ns") for zone in ZONES},
    "time32[s]": _wrapped(pa.time32("s"), lambda x: dt.time(x % 24)),
    "time64[ns]": _wrapped(pa.time64("ns"), lambda x: dt.time(x % 24, 30)),
    "duration[s]": _wrapped(pa.duration("s"), lambda x: dt.timedelta(days=x)),
    "list<int64>": _wrapped(pa.list_(pa.int64()), lambda x: [x]),
    "large_list<string>": _wrapped(pa.large_list(pa.string()), lambda x: [f"s{x}"]),
    "fixed_size_list<int64, 2>": _wrapped(pa.list_(pa.int64(), 2), lambda x: [x, x]),
    "list_view<int64>": _wrapped(pa.list_view(pa.int64()), lambda x: [x]),
    "struct<a: int64>": _wrapped(pa.struct([("a", pa.int64())]), lambda x: {"a": x}),
    "map<string, int64>": _wrapped(pa.map_(pa.string(), pa.int64()), lambda x: [("k", x)]),
    "sparse_union": _union,
    "month_day_nano_interval": _wrapped(pa.month_day_nano_interval(),
                                        lambda x: pa.MonthDayNano([x, 0, 0])),
    "null": _nulls,
}


def _with_nulls(draw, codes: list[int], share: int) -> Values:
    """``codes`` with about one in ``share`` replaced by null (none when share is 0)."""
    if share == 0:
        return list(codes)
    return [None if draw(st.integers(0, share - 1)) == 0 else c for c in codes]


@st.composite
def arrow_panels(draw) -> tuple[pa.Table, str, str]:
    """A table with entity ``firm``, time ``period``, variables ``y`` and ``x``; the file format."""
    entities = draw(st.integers(1, 4))
    periods = draw(st.integers(1, 5))
    cells = [(e, t) for e in range(entities) for t in range(periods)]
    kept = draw(st.lists(st.sampled_from(cells), min_size=1, max_size=2 * len(cells)))
    firm_type, time_type, x_type = (draw(st.sampled_from(sorted(TYPES))) for _ in range(3))
    share = draw(st.sampled_from([0, 0, 8, 3]))
    firm = _with_nulls(draw, [e for e, _ in kept], share)
    period = _with_nulls(draw, [t + 1 for _, t in kept], share)
    x = _with_nulls(draw, [draw(st.integers(0, 40)) for _ in kept], share)
    rng = np.random.default_rng(draw(st.integers(0, 2**16)))
    columns = {
        "firm": TYPES[firm_type](firm),
        "period": TYPES[time_type](period),
        "y": pa.array(rng.normal(size=len(kept)) + [e for e, _ in kept]),
        "x": TYPES[x_type](x),
    }
    fmt = draw(st.sampled_from(["parquet", "feather"]))
    return pa.table(columns), fmt, f"{firm_type} / {time_type} / {x_type}"


def _write(table: pa.Table, fmt: str, folder: Path) -> Path | None:
    path = folder / f"panel.{fmt}"
    try:
        if fmt == "parquet":
            pq.write_table(table, path)
        else:
            feather.write_feather(table, path)
    except (pa.ArrowException, TypeError, ValueError):
        return None  # a type the format cannot hold (a union in Parquet): nothing to read
    return path


def _fuzz(count: int) -> settings:
    return settings(max_examples=examples(count), deadline=None, suppress_health_check=_QUIET)


@_fuzz(60)
@given(panel=arrow_panels())
def test_audit_of_any_arrow_types_ends_in_a_verdict_or_one_line(tmp_path, panel):
    table, fmt, _ = panel
    path = _write(table, fmt, tmp_path)
    assume(path is not None)
    report = tmp_path / "report.json"
    report.unlink(missing_ok=True)
    result = CliRunner().invoke(app, ["audit", str(path), "-e", "firm", "-t", "period",
                                      "--report", str(report), "--quiet"])
    check_cli_run(result, report)
    assert "internal failure" not in result.output
    if result.exit_code == 2:
        assert not report.exists()


@_fuzz(40)
@given(panel=arrow_panels(), transform=st.sampled_from(["within,between,quasi", "twoway"]))
def test_preparation_of_any_arrow_types_ends_in_a_verdict_or_one_line(tmp_path, panel,
                                                                      transform):
    table, fmt, _ = panel
    path = _write(table, fmt, tmp_path)
    assume(path is not None)
    out = tmp_path / "out"
    result = CliRunner().invoke(app, [
        "prepare", str(path), "-e", "firm", "-t", "period", "--y", "y", "--x", "x",
        "--out", str(out), "--force", "--transform", transform, "--quiet",
        "--duplicates", "keep-first", "--severity", "panel-shape=info"])
    written = {0: out, 1: tmp_path / "out.failed"}.get(result.exit_code)
    check_cli_run(result, None if written is None else written / "diagnostics.json")
    assert "internal failure" not in result.output


def test_every_listed_type_can_be_built():
    # the fuzz is only as wide as this list: every builder makes an array of its type
    for name, build in TYPES.items():
        built = build([0, 1, None, 3])
        assert len(built) == 4, name


@settings(max_examples=examples(4), deadline=None, derandomize=True,
          suppress_health_check=_QUIET)
@given(panel=arrow_panels())
def test_any_arrow_types_in_a_real_process(tmp_path_factory, panel):
    """The entry point itself: exit 0/1/2, one line for 2, and nothing else on stderr."""
    table, fmt, _ = panel
    folder = tmp_path_factory.mktemp("arrow")
    path = _write(table, fmt, folder)
    assume(path is not None)
    code = "from panelprep.cli import main; main()"
    done = subprocess.run([sys.executable, "-c", code, "audit", str(path), "-e", "firm", "-t",
                           "period", "--quiet"], capture_output=True, text=True, timeout=120,
                          check=False)
    assert done.returncode in (0, 1, 2), done.stderr
    if done.returncode == 2:
        lines = done.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("panelprep: error: "), done.stderr
        assert "internal failure" not in lines[0], lines[0]
    else:
        assert done.stderr == "", done.stderr
