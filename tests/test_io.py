"""Readers: CSV dialects, formats by extension, leading zeros, hashing and read errors."""

from __future__ import annotations

import bz2
import gzip
import hashlib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from statsmodels.datasets import grunfeld

from panelprep.errors import ColumnError, InputError
from panelprep.io import (
    ReadOptions,
    column_names,
    detect_format,
    read_frame,
    sha256_file,
    sniff_delimiter,
)
from panelprep.pipeline import audit, audit_file

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"

PANEL = "firm_id,year,sales\n00101,2001,1.5\n00101,2002,2.5\n00102,2001,3.0\n00102,2002,4.5\n"


def write(tmp_path: Path, name: str, text: str, encoding: str = "utf-8") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding=encoding)
    return path


def test_leading_zero_ids_survive_csv(tmp_path):
    path = write(tmp_path, "p.csv", PANEL)
    frame = read_frame(path, None, ["firm_id"], "year")
    assert frame["firm_id"].tolist() == ["00101", "00101", "00102", "00102"]
    assert frame["year"].dtype == np.int64
    assert frame["sales"].dtype == np.float64


def test_ids_as_numbers_only_when_asked(tmp_path):
    path = write(tmp_path, "p.csv", PANEL)
    frame = read_frame(path, None, ["firm_id"], "year", ReadOptions(entity_as_text=False))
    assert frame["firm_id"].tolist() == [101, 101, 102, 102]


def test_byte_order_mark_is_not_part_of_the_first_name(tmp_path):
    path = write(tmp_path, "bom.csv", PANEL, encoding="utf-8-sig")
    assert path.read_bytes().startswith(b"\xef\xbb\xbf")
    assert column_names(path) == ["firm_id", "year", "sales"]
    report = audit_file(path, "firm_id", "year")
    assert report.panel["entities"] == 2
    assert report.context.index.entity_labels["firm_id"].tolist() == ["00101", "00102"]


@pytest.mark.parametrize(("delimiter", "suffix"), [("\t", ".tsv"), ("\t", ".txt"), (";", ".csv"),
                                                   ("|", ".csv")])
def test_delimiter_is_sniffed_from_the_header(tmp_path, delimiter, suffix):
    path = write(tmp_path, "p" + suffix, PANEL.replace(",", delimiter))
    frame = read_frame(path, None, ["firm_id"], "year")
    assert frame.columns.tolist() == ["firm_id", "year", "sales"]
    assert frame["sales"].tolist() == [1.5, 2.5, 3.0, 4.5]


def test_explicit_delimiter_wins(tmp_path):
    # a header with more commas than tabs, but the file is tab separated
    text = "firm,id\tyear\tsales\n001\t2001\t1\n001\t2002\t2\n"
    path = write(tmp_path, "p.csv", text)
    assert column_names(path, ReadOptions(delimiter="\t")) == ["firm,id", "year", "sales"]


def test_sniffing_prefers_the_most_frequent_delimiter():
    assert sniff_delimiter("a;b;c,d") == ";"
    assert sniff_delimiter("a\tb\tc") == "\t"
    assert sniff_delimiter("single") == ","


def test_header_names_are_trimmed(tmp_path):
    path = write(tmp_path, "p.csv", " firm_id , year ,sales\n001,2001,1\n")
    assert column_names(path) == ["firm_id", "year", "sales"]
    assert read_frame(path, None, ["firm_id"], "year")["firm_id"].tolist() == ["001"]


@pytest.mark.parametrize("header", ["id,year,x,x", "id,year,x, x "])
def test_duplicate_column_names_are_an_input_error(tmp_path, header):
    path = write(tmp_path, "dup.csv", header + "\na,2001,1,2\n")
    with pytest.raises(ColumnError, match=r"duplicate column names \['x'\]"):
        column_names(path)


def test_decimal_comma_needs_another_delimiter(tmp_path):
    path = write(tmp_path, "p.csv", PANEL)
    with pytest.raises(InputError, match="decimal commas"):
        read_frame(path, None, ["firm_id"], "year", ReadOptions(decimal_comma=True))


def test_decimal_comma_reads_numbers(tmp_path):
    path = write(tmp_path, "p.csv", "id;year;x\n001;2001;1,25\n001;2002;-3,5\n")
    frame = read_frame(path, None, ["id"], "year", ReadOptions(decimal_comma=True))
    assert frame["x"].tolist() == [1.25, -3.5]


@pytest.mark.parametrize(("name", "fmt"), [
    ("a.csv", "csv"), ("a.tsv", "csv"), ("a.TXT", "csv"), ("a.csv.gz", "csv"),
    ("a.parquet", "parquet"), ("a.pq", "parquet"),
    ("a.feather", "arrow"), ("a.arrow", "arrow"), ("a.ipc", "arrow"),
])
def test_format_by_extension(name, fmt):
    assert detect_format(Path(name)) == fmt


@pytest.mark.parametrize(("suffix", "compress"), [(".csv.gz", "gzip"), (".csv.bz2", "bz2")])
def test_compressed_csv(tmp_path, suffix, compress):
    path = tmp_path / ("p" + suffix)
    path.write_bytes({"gzip": gzip, "bz2": bz2}[compress].compress(PANEL.encode("utf-8")))
    assert column_names(path) == ["firm_id", "year", "sales"]
    frame = read_frame(path, None, ["firm_id"], "year")
    assert frame["firm_id"].tolist() == ["00101", "00101", "00102", "00102"]


def test_unknown_extension_asks_for_input_format():
    with pytest.raises(InputError, match="--input-format"):
        detect_format(Path("data.dat"))
    assert detect_format(Path("data.dat"), "csv") == "csv"
    with pytest.raises(InputError, match="not one of"):
        detect_format(Path("data.csv"), "excel")


def test_input_format_reads_an_oddly_named_file(tmp_path):
    path = write(tmp_path, "panel.dat", PANEL)
    frame = read_frame(path, None, ["firm_id"], "year", ReadOptions(input_format="csv"))
    assert frame["firm_id"].tolist()[0] == "00101"
    with pytest.raises(InputError, match="cannot read as parquet"):
        read_frame(path, None, ["firm_id"], "year", ReadOptions(input_format="parquet"))


def test_parquet_and_feather_keep_stored_types(tmp_path):
    frame = pd.DataFrame({"firm_id": ["00101", "00102"], "year": [2001, 2001],
                          "x": [1.5, 2.5]})
    frame.to_parquet(tmp_path / "p.parquet")
    frame.to_feather(tmp_path / "p.feather")
    for name in ("p.parquet", "p.feather"):
        back = read_frame(tmp_path / name, ["firm_id", "year", "x"], ["firm_id"], "year")
        assert back["firm_id"].tolist() == ["00101", "00102"]
        assert back["year"].dtype == np.int64
        assert column_names(tmp_path / name) == ["firm_id", "year", "x"]


def test_only_the_asked_columns_are_read(tmp_path):
    path = write(tmp_path, "p.csv", PANEL)
    frame = read_frame(path, ["year", "firm_id"], ["firm_id"], "year")
    assert frame.columns.tolist() == ["year", "firm_id"]
    with pytest.raises(ColumnError, match=r"\['nope'\] not found"):
        read_frame(path, ["firm_id", "nope"], ["firm_id"], "year")


def test_time_text_stays_text_unless_all_whole_numbers(tmp_path):
    path = write(tmp_path, "p.csv", "id,when\n1,2021-01-31\n1,2021-02-28\n")
    assert read_frame(path, None, ["id"], "when")["when"].tolist() == ["2021-01-31", "2021-02-28"]
    path = write(tmp_path, "q.csv", "id,when\n1,2001\n1,\n")
    when = read_frame(path, None, ["id"], "when")["when"]
    assert str(when.dtype) == "Int64" and when.isna().tolist() == [False, True]


def test_float_years_written_by_pandas_read_as_years(tmp_path):
    # statsmodels' Grunfeld data stores years as floats, so to_csv writes "1935.0"
    data = grunfeld.load_pandas().data
    data = data[data["firm"] != "American Steel"]
    path = tmp_path / "grunfeld.csv"
    data.to_csv(path, index=False)
    assert "1935.0" in path.read_text(encoding="utf-8")
    frame = read_frame(path, None, ["firm"], "year")
    assert frame["year"].dtype == np.int64 and frame["year"].min() == 1935
    from_file = audit_file(path, "firm", "year")
    from_frame = audit(data.reset_index(drop=True), "firm", "year")
    assert from_file.panel["balanced"] is True and from_file.panel["periods"] == 20
    for name in ("invest", "value", "capital"):
        assert from_file.variables[name]["sd_within"] == pytest.approx(
            from_frame.variables[name]["sd_within"], rel=1e-12)


def test_inf_text_is_not_a_number_and_nan_text_is_missing_reported_apart(tmp_path):
    path = write(tmp_path, "p.csv", "id,year,x\na,1,1.0\na,2,inf\nb,1,NaN\nb,2,3\nb,3,\n")
    report = audit_file(path, "id", "year")
    finding = report.finding("values-not-numeric")
    assert [e["value"] for e in finding.examples] == ["inf"]
    nan = report.finding("values-nan-missing")
    assert (nan.count, nan.examples) == (1, [{"column": "x", "row": 3}])
    # the empty field needs no declaration and no finding of its own
    assert report.finding("values-missing").details["per_variable"] == {"x": 3}
    declared = audit_file(path, "id", "year", options=ReadOptions(missing_tokens=("NaN", "inf")))
    assert declared.finding("values-not-numeric") is None
    assert declared.finding("values-nan-missing") is None
    assert declared.finding("values-declared-missing").count == 2


def test_sha256_matches_hashlib(tmp_path):
    path = write(tmp_path, "p.csv", PANEL)
    assert sha256_file(path, chunk=7) == hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.mark.parametrize(("setup", "message"), [
    (lambda d: d / "absent.csv", "no such file"),
    (lambda d: d, "is a directory"),
    (lambda d: write(d, "empty.csv", ""), "the file is empty"),
    (lambda d: write(d, "blank.csv", "\nid,year\n"), "first line is blank"),
])
def test_unreadable_inputs_are_one_line_input_errors(tmp_path, setup, message):
    with pytest.raises(InputError, match=message) as caught:
        column_names(setup(tmp_path))
    assert "\n" not in str(caught.value)


def test_header_that_is_not_utf8(tmp_path):
    path = tmp_path / "latin.csv"
    path.write_bytes("gr\xf6\xdfe,year\n1,2001\n".encode("latin-1"))
    with pytest.raises(InputError, match="not UTF-8"):
        column_names(path)


def test_ragged_csv_is_an_input_error(tmp_path):
    path = write(tmp_path, "p.csv", "id,year,x\na,2001,1\na,2002,2,9\n")
    with pytest.raises(InputError, match="cannot parse as CSV"):
        read_frame(path, None, ["id"], "year")


def test_bracketed_column_names_are_a_csv_header(tmp_path):
    path = tmp_path / "brackets.csv"
    path.write_text("[firm],[year],[sales]\na,2001,1\n", encoding="utf-8")
    assert column_names(path) == ["[firm]", "[year]", "[sales]"]


@pytest.mark.parametrize("first", ['[{"firm": "a", "year": 2001}]', "[", '{"rows": []}',
                                   "<!DOCTYPE html>", "<html lang=en>", '<?xml version="1.0"?>'])
def test_json_xml_and_html_under_a_csv_name_are_named(tmp_path, first):
    path = tmp_path / "notes.csv"
    path.write_text(first + "\n" + "x" * 2000 + "\n", encoding="utf-8")
    with pytest.raises(InputError, match="does not look like CSV column names") as err:
        column_names(path)
    assert len(str(err.value)) < 300


def test_many_duplicate_names_give_a_short_message(tmp_path):
    path = tmp_path / "wide.csv"
    names = [f"column_with_a_rather_long_name_{i % 40:02d}_" + "z" * 30 for i in range(400)]
    path.write_text(",".join(names) + "\n" + ",".join("1" * 400) + "\n", encoding="utf-8")
    with pytest.raises(ColumnError, match="duplicate column names .* and 35 more") as err:
        column_names(path)
    assert len(str(err.value)) < 400


def test_xz_csv_reads_like_the_plain_csv(tmp_path):
    import lzma

    (tmp_path / "panel.csv").write_text(PANEL, encoding="utf-8")
    (tmp_path / "panel.csv.xz").write_bytes(lzma.compress(PANEL.encode()))
    plain = read_frame(tmp_path / "panel.csv", None, ["firm_id"], "year")
    packed = read_frame(tmp_path / "panel.csv.xz", None, ["firm_id"], "year")
    pd.testing.assert_frame_equal(plain, packed)
