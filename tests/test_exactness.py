"""Exactness: entity ids and time values come back from every output file as they went in.

Ids keep leading zeros, case, inner and outer spaces, commas, quotes and any
unicode (no normalisation unless a policy asks for one); time values keep
their text (``01``, ``2021Q3``, ``2021-03-31``) or their stored type
(integers, timestamps).  A property test writes random ids and periods,
prepares them, and reads the keys back from every file with pandas and
pyarrow, which are the outside readers here.
"""

from __future__ import annotations

import csv
import io
import string
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
from conftest import examples
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import panelprep.report.html
from panelprep.names import DEFAULT_NAMES as N
from panelprep.prepare import prepare

# these transforms write the key columns; between writes the ids only
KEYED_FILES = ("clean", "within", "quasi", "twoway")
LENIENT = {"components-underidentified": "warning", "entity-variance-negative": "info"}

IDS = st.text(
    st.characters(codec="utf-8", exclude_categories=("Cs", "Cc", "Zl", "Zp")),
    min_size=1, max_size=8,
).filter(lambda s: s.strip() != "")
PERIOD_KINDS = {
    "year": st.integers(1900, 2100).map(str),
    "wave": st.integers(1, 99).map(lambda v: f"{v:02d}"),
    "quarter": st.tuples(st.integers(2000, 2030), st.integers(1, 4)).map(lambda p: f"{p[0]}Q{p[1]}"),
    "month": st.tuples(st.integers(2000, 2030), st.integers(1, 12)).map(
        lambda p: f"{p[0]}-{p[1]:02d}"),
    "date": st.dates(min_value=pd.Timestamp("1950-01-01").date(),
                     max_value=pd.Timestamp("2050-12-31").date()).map(lambda d: d.isoformat()),
}


@st.composite
def keyed_panels(draw) -> tuple[list[str], str, pd.DataFrame]:
    """Distinct ids, one kind of period, each entity on a random subset of the periods."""
    ids = draw(st.lists(IDS, min_size=3, max_size=6, unique=True))
    kind = draw(st.sampled_from(sorted(PERIOD_KINDS)))
    periods = draw(st.lists(PERIOD_KINDS[kind], min_size=2, max_size=5, unique=True))
    rows = []
    for entity in ids:
        chosen = draw(st.lists(st.sampled_from(periods), min_size=1, unique=True))
        rows += [(entity, period) for period in chosen]
    rng = np.random.default_rng(len(rows))
    frame = pd.DataFrame(rows, columns=["firm", "when"])
    frame["y"] = rng.normal(size=len(frame))
    frame["x"] = rng.normal(size=len(frame))
    return ids, kind, frame


def write_csv(frame: pd.DataFrame, path: Path) -> None:
    """CSV as a spreadsheet would write it: the csv module, quoting only where needed."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(frame.columns)
    writer.writerows(frame.astype(str).itertuples(index=False))
    path.write_text(buffer.getvalue(), encoding="utf-8")


def read_back(path: Path) -> pd.DataFrame:
    """An output file read by pandas (CSV: every cell as text, nothing read as missing)."""
    if path.suffix == ".csv":
        return pd.read_csv(path, dtype=str, keep_default_na=False)
    return pq.read_table(path).to_pandas()


def expected_keys(frame: pd.DataFrame, name: str) -> set[tuple[str, str]]:
    """Keys each file must hold: every row, or rows of entities observed twice or more."""
    keys = set(zip(frame["firm"], frame["when"]))
    if name in ("within", "twoway"):
        counts = frame["firm"].value_counts()
        keys = {k for k in keys if counts[k[0]] >= 2}
    return keys


def quick_report():
    """The HTML report is not what is tested here; rendering it would dominate the time."""
    patch = pytest.MonkeyPatch()
    patch.setattr(panelprep.report.html, "render_html", lambda *a, **k: "<html></html>")
    return patch


@settings(max_examples=examples(25), deadline=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(keyed_panels(), st.sampled_from(["parquet", "csv"]))
def test_random_ids_and_periods_come_back_from_every_file(tmp_path_factory, case, output_format):
    ids, kind, frame = case
    root = tmp_path_factory.mktemp("exact")
    data = root / "panel.csv"
    write_csv(frame, data)
    patch = quick_report()
    try:
        # random dates follow no coarser grid; as days none of them is off the grid
        prep = prepare(data, root / "out", entity="firm", time="when", y="y", x="x",
                       transforms="within,between,quasi,twoway", output_format=output_format,
                       severities=LENIENT, freq="day" if kind == "date" else None)
    finally:
        patch.undo()
    assert prep.verdict == "pass", [f["id"] for f in prep.summary["findings"]]
    suffix = "." + output_format
    # whole numbers written without leading zeros are read as integers, and Parquet keeps
    # them as int64; any other period (02, 2021Q3, a date) stays the text it was
    integers = kind in ("year", "wave") and not any(p.startswith("0") for p in frame["when"])
    for name in KEYED_FILES:
        back = read_back(root / "out" / f"{name}{suffix}")
        if output_format == "parquet" and integers:
            assert back["when"].dtype == np.int64, name
            when = [str(v) for v in back["when"]]
        else:
            when = back["when"].tolist()
            assert all(isinstance(v, str) for v in when), name
        assert set(zip(back["firm"], when)) == expected_keys(frame, name), name
        assert len(back) == len(expected_keys(frame, name)), name
        assert all(isinstance(v, str) for v in back["firm"]), name
    between = read_back(root / "out" / f"between{suffix}")
    assert sorted(between["firm"]) == sorted(ids)
    dropped = read_back(root / "out" / "dropped.parquet")
    assert len(dropped) == 0 and list(dropped.columns)[:3] == [N.row, "firm", "when"]


TRICKY_IDS = ["00123", "0123", "123", "A 1", "a 1", "A  1", " A1", "A1 ", "a,b", 'say "hi"',
              "Ä\u0308", "\u00c4", "e\u0301", "\u00e9", "NA", "null", "nan", "-", "1e5", "TRUE"]


def test_tricky_ids_keep_every_character_in_every_file(tmp_path):
    # NFC and NFD spellings (precomposed vs combining accent) stay two different ids
    periods = ["2001", "2002", "2003"]
    rows = [(e, p, float(i + j * 0.5), float((i * 7 + j) % 5))
            for i, e in enumerate(TRICKY_IDS) for j, p in enumerate(periods)]
    frame = pd.DataFrame(rows, columns=["firm", "when", "y", "x"])
    data = tmp_path / "panel.csv"
    write_csv(frame, data)
    for fmt in ("parquet", "csv"):
        out = tmp_path / fmt
        prep = prepare(data, out, entity="firm", time="when", y="y", x="x",
                       transforms="within,between,quasi,twoway", output_format=fmt,
                       severities={"entity-id-lookalike": "info"})
        assert prep.verdict == "pass"
        for name in (*KEYED_FILES, "between"):
            back = read_back(out / f"{name}.{fmt}")
            assert sorted(set(back["firm"])) == sorted(TRICKY_IDS), (fmt, name)


def test_integer_ids_can_be_asked_for_and_then_drop_zeros(tmp_path):
    # the documented way to get numbers: entity_as_text=False; the default keeps the zeros
    from panelprep.io import ReadOptions

    data = tmp_path / "panel.csv"
    data.write_text("firm,when,y,x\n007,1,1,2\n007,2,2,1\n008,1,3,5\n008,2,5,3\n"
                    "009,1,2,2\n009,2,4,4\n", encoding="utf-8")
    kept = prepare(data, tmp_path / "text", entity="firm", time="when", y="y", x="x",
                   severities=LENIENT)
    assert sorted(kept.tables["clean"]["firm"].unique()) == ["007", "008", "009"]
    numbers = prepare(data, tmp_path / "numbers", entity="firm", time="when", y="y", x="x",
                      read_options=ReadOptions(entity_as_text=False), severities=LENIENT)
    assert sorted(numbers.tables["clean"]["firm"].unique()) == [7, 8, 9]


@pytest.mark.parametrize("time_kind", ["int32", "int64", "datetime", "datetime-tz", "text"])
def test_parquet_time_types_survive_every_output(tmp_path, time_kind):
    rng = np.random.default_rng(3)
    stamps = pd.to_datetime(["2020-03-31", "2020-06-30", "2020-09-30", "2020-12-31"])
    values = {
        "int32": np.array([3, 4, 5, 6], dtype=np.int32),
        "int64": np.array([1995, 1996, 1997, 1998], dtype=np.int64),
        "datetime": stamps,
        "datetime-tz": stamps.tz_localize("Europe/Berlin"),
        "text": np.array(["2020Q1", "2020Q2", "2020Q3", "2020Q4"], dtype=object),
    }[time_kind]
    frame = pd.DataFrame({
        "firm": np.repeat(["0001", "0002", "0003", "0004"], 4),
        "when": np.tile(values, 4),
        "y": rng.normal(size=16), "x": rng.normal(size=16),
    })
    data = tmp_path / "panel.parquet"
    frame.to_parquet(data)
    stored = pq.read_table(data).schema.field("when").type
    prep = prepare(data, tmp_path / "out", entity="firm", time="when", y="y", x="x",
                   transforms="within,between,quasi,twoway", severities=LENIENT)
    assert prep.verdict == "pass"
    for name in (*KEYED_FILES, "dropped"):
        table = pq.read_table(tmp_path / "out" / f"{name}.parquet")
        assert table.schema.field("when").type == stored, name
        assert table.schema.field("firm").type == pq.read_table(data).schema.field("firm").type
        if name != "dropped":
            back = table.to_pandas()
            original = pd.read_parquet(data)
            assert set(zip(back["firm"], back["when"])) == set(zip(original["firm"],
                                                                 original["when"])), name


def test_ids_with_every_printable_character(tmp_path):
    # one id per printable ASCII character, wrapped in letters so none is blank
    ids = [f"x{c}x" for c in string.printable if c not in "\n\r\t\x0b\x0c"]
    rows = [(e, p, float(i + p), float((i * 3 + p) % 4)) for i, e in enumerate(ids)
            for p in (1, 2)]
    frame = pd.DataFrame(rows, columns=["firm", "when", "y", "x"])
    data = tmp_path / "panel.csv"
    write_csv(frame, data)
    prepare(data, tmp_path / "out", entity="firm", time="when", y="y", x="x",
            output_format="csv", severities=LENIENT)
    back = read_back(tmp_path / "out" / "clean.csv")
    assert sorted(set(back["firm"])) == sorted(ids)
    assert set(back["when"]) == {"1", "2"}
