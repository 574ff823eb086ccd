"""Schema contracts: loading pandera YAML strictly, findings from failures, never raising on data."""

from __future__ import annotations

import csv
import json
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml
from conftest import examples
from hypothesis import given, settings
from hypothesis import strategies as st

from panelprep.contracts import FINDING_ID, check_contract, load_contract
from panelprep.errors import InputError
from panelprep.findings import Finding
from panelprep.io import ReadOptions, read_frame

ROOT = Path(__file__).resolve().parent.parent
FIRM_YEAR = ROOT / "schemas" / "firm_year.yaml"
FIXTURES = ROOT / "fixtures"


@pytest.fixture(scope="module")
def firm_year():
    return load_contract(FIRM_YEAR)


def clean_frame() -> pd.DataFrame:
    return pd.DataFrame({
        "firm_id": ["F01", "F01", "F02", "F02"],
        "year": [2001, 2002, 2001, 2002],
        "sales": [10.0, 12.5, np.nan, 3.0],
        "capital": [5.0, 5.5, 2.0, 0.0],
        "staff": [3, 4, 2, 2],  # whole numbers, as a CSV headcount is read
    })


def by_check(findings: list[Finding]) -> dict[tuple[str, str], Finding]:
    return {(f.details["column"], f.details["check"]): f for f in findings}


def test_clean_frame_satisfies_the_example_contract(firm_year):
    frame = clean_frame()
    before = frame.copy()
    assert check_contract(frame, firm_year) == []
    # the contract converts staff to float for its check, on a copy only
    pd.testing.assert_frame_equal(frame, before)


def test_violations_counted_by_hand(firm_year):
    frame = pd.DataFrame({
        "firm_id": ["F01", "F01", None, "F 03", "F04", "F04"],
        "year": [2001, 1850, 2001, 2001, 2101, 2002],
        "sales": [10.0, -2.0, 3.0, np.nan, -0.5, 4.0],
        "capital": [1.0, 1.0, 1.0, 1.0, 1.0, 1.0],
        "staff": [1, 2, 3, 4, 5, 6],
    })
    findings = check_contract(frame, firm_year)
    assert all(f.id == FINDING_ID and f.severity == "error" for f in findings)
    found = by_check(findings)
    pattern = "str_matches('^[A-Za-z0-9][A-Za-z0-9_.-]*$')"
    # counted by hand from the frame above: one null id (row 3), one id with a space
    # (row 4), two years outside 1900..2100 (rows 2 and 5), two negative sales (rows 2, 5)
    assert set(found) == {("firm_id", "not_nullable"), ("firm_id", pattern),
                          ("year", "in_range(1900, 2100)"),
                          ("sales", "greater_than_or_equal_to(0)")}
    assert found[("firm_id", "not_nullable")].count == 1
    assert [e["row"] for e in found[("firm_id", "not_nullable")].examples] == [3]
    assert found[("firm_id", pattern)].examples == [
        {"column": "firm_id", "check": pattern, "row": 4, "value": "F 03"}]
    year = found[("year", "in_range(1900, 2100)")]
    assert year.count == 2
    assert [(e["row"], e["value"]) for e in year.examples] == [(2, 1850), (5, 2101)]
    sales = found[("sales", "greater_than_or_equal_to(0)")]
    assert sales.count == 2
    assert [(e["row"], e["value"]) for e in sales.examples] == [(2, -2.0), (5, -0.5)]
    assert sales.details == {"column": "sales", "check": "greater_than_or_equal_to(0)",
                             "where": "input"}
    assert "'sales'" in sales.message and "greater_than_or_equal_to(0)" in sales.message
    json.dumps([f.to_dict() for f in findings], allow_nan=False)


def test_labelled_index_reports_labels_and_examples_are_capped(firm_year):
    frame = pd.DataFrame({
        "firm_id": [f"F{i:02d}" for i in range(12)],
        "year": [2001] * 12,
        "sales": [-1.0] * 12,
        "capital": [1.0] * 12,
        "staff": [1.0] * 12,
    }, index=[f"r{i}" for i in range(12)])
    (sales,) = check_contract(frame, firm_year, where="within.parquet")
    assert sales.count == 12
    assert len(sales.examples) == 10
    assert [e["row"] for e in sales.examples] == [f"r{i}" for i in range(10)]
    assert sales.message.startswith("within.parquet:")
    assert sales.details["where"] == "within.parquet"


def test_absent_column_and_wrong_dtype_are_whole_column_failures(firm_year):
    frame = clean_frame().drop(columns="capital")
    frame["year"] = frame["year"].astype(float)
    found = by_check(check_contract(frame, firm_year))
    absent = found[("capital", "column_in_dataframe")]
    assert absent.count == 1
    assert absent.examples == [{"column": "capital", "check": "column_in_dataframe",
                                "row": None, "value": None}]
    dtype = found[("year", "dtype('int64')")]
    assert dtype.count == 1 and dtype.examples[0]["row"] is None


def test_fixture_counts_match_a_recount_with_csv_and_re(firm_year):
    # recount with the csv module and re, without panelprep or pandera
    pattern = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")
    for name in ("lookalike_ids.csv", "missing_keys.csv", "gaps.csv"):
        with open(FIXTURES / name, newline="", encoding="utf-8") as handle:
            rows = list(csv.DictReader(handle))
        empty = [i + 1 for i, r in enumerate(rows) if r["firm_id"] == ""]
        bad = [i + 1 for i, r in enumerate(rows)
               if r["firm_id"] != "" and not pattern.match(r["firm_id"])]
        no_year = [i + 1 for i, r in enumerate(rows) if r["year"].strip() == ""]
        frame = read_frame(FIXTURES / name, None, ["firm_id"], "year", ReadOptions())
        found = by_check(check_contract(frame, firm_year))
        pattern_key = ("firm_id", "str_matches('^[A-Za-z0-9][A-Za-z0-9_.-]*$')")
        if bad:
            assert [e["row"] for e in found[pattern_key].examples] == bad
        else:
            assert pattern_key not in found
        if empty:
            assert [e["row"] for e in found[("firm_id", "not_nullable")].examples] == empty
        if no_year:
            assert found[("year", "not_nullable")].count == len(no_year)
        if name == "gaps.csv":
            assert found == {}


def test_text_in_a_measure_is_reported_not_raised(firm_year):
    frame = read_frame(FIXTURES / "non_numeric.csv", None, ["firm_id"], "year", ReadOptions())
    found = by_check(check_contract(frame, firm_year))
    conversion = found[("sales", "coerce_dtype('float64')")]
    with open(FIXTURES / "non_numeric.csv", newline="", encoding="utf-8") as handle:
        texts = [r["sales"] for r in csv.DictReader(handle)]
    not_numbers = [t for t in texts if t and not re.fullmatch(r"-?\d+(\.\d+)?", t)]
    assert conversion.count == len(not_numbers)
    assert [e["value"] for e in conversion.examples] == not_numbers


def test_schema_from_pandera_inference_round_trips(tmp_path):
    # the recipe in schemas/README.md: infer from a sample, write YAML, load it back
    import pandera.pandas as pa

    sample = read_frame(FIXTURES / "clean_balanced.csv", None, ["firm_id"], "year", ReadOptions())
    path = tmp_path / "inferred.yaml"
    path.write_text(pa.infer_schema(sample).to_yaml(), encoding="utf-8")
    schema = load_contract(path)
    assert check_contract(sample, schema) == []
    shifted = sample.assign(sales=sample["sales"] * 100)
    assert any(f.details["column"] == "sales" for f in check_contract(shifted, schema))


def write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "contract.yaml"
    path.write_text(text, encoding="utf-8")
    return path


def error_of(path: Path) -> str:
    with pytest.raises(InputError) as caught:
        load_contract(path)
    message = str(caught.value)
    assert "\n" not in message and str(path) in message
    return message


def test_bad_yaml_names_file_and_line(tmp_path):
    message = error_of(write(tmp_path, "columns:\n  a:\n    dtype: [int64\n  b: 1\n"))
    assert "not valid YAML" in message
    assert re.search(r"contract\.yaml:\d+:", message)


@pytest.mark.parametrize("text,expected", [
    ("- a\n- b\n", "expected a mapping"),
    ("columns: {}\n", "'columns' must map"),
    ("colums:\n  a: {dtype: int64}\n", "contract.yaml:1: not a valid contract: unknown setting 'colums'"),
    ("columns:\n  a:\n    dtype: float64\n    chekcs:\n      ge: 0\n",
     "contract.yaml:4: not a valid contract: column 'a' has unknown setting 'chekcs'"),
    ("columns:\n  a:\n    dtype: floatt\n", "floatt"),
    ("columns:\n  a:\n    checks:\n      not_a_check: 1\n", "unknown check"),
    ("columns:\n  a:\n    checks:\n      in_range: {min: 1}\n", "min_value"),
    ("columns:\n  a: 3\n", "contract.yaml:2: not a valid contract: column 'a' must map"),
])
def test_bad_schema_is_an_input_error(tmp_path, text, expected):
    assert expected in error_of(write(tmp_path, text))


def test_missing_contract_file(tmp_path):
    assert "no such contract file" in error_of(tmp_path / "absent.yaml")


def test_column_with_no_settings_accepts_anything_but_must_exist(tmp_path):
    schema = load_contract(write(tmp_path, "columns:\n  firm_id:\n  year:\n"))
    assert check_contract(clean_frame(), schema) == []
    found = by_check(check_contract(clean_frame().drop(columns="year"), schema))
    assert list(found) == [("year", "column_in_dataframe")]


def test_example_contract_file_parses_as_plain_yaml():
    document = yaml.safe_load(FIRM_YEAR.read_text(encoding="utf-8"))
    assert document["coerce"] is False and document["strict"] is False
    assert set(document["columns"]) == {"firm_id", "year", "sales", "capital", "staff"}


cells = st.one_of(
    st.none(), st.integers(-10**6, 10**6), st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=6), st.booleans(),
)


@settings(max_examples=examples(25), deadline=None)
@given(data=st.data(), n=st.integers(0, 6))
def test_never_raises_on_any_data(firm_year, data, n):
    columns = data.draw(st.lists(st.sampled_from(["firm_id", "year", "sales", "capital", "staff",
                                                  "other"]), unique=True))
    frame = pd.DataFrame({c: pd.Series(data.draw(st.lists(cells, min_size=n, max_size=n)),
                                       dtype=object) for c in columns},
                         index=pd.RangeIndex(n))
    findings = check_contract(frame, firm_year)
    assert all(f.id == FINDING_ID and f.count >= 1 for f in findings)
    json.dumps([f.to_dict() for f in findings], allow_nan=False)


def test_nan_stored_in_parquet_is_null_to_the_contract(tmp_path):
    # read_frame keeps a Parquet float column holding NaN in Arrow's type, where NaN is not
    # null; a contract that does not coerce must still see it as missing, as the audit does
    import pyarrow as pa
    import pyarrow.parquet as pq

    contract = tmp_path / "plain.yaml"
    contract.write_text(yaml.safe_dump({"schema_type": "dataframe", "coerce": False, "columns": {
        "sales": {"dtype": "float64", "nullable": True,
                  "checks": {"greater_than_or_equal_to": 0}}}}), encoding="utf-8")
    pq.write_table(pa.table({"firm_id": ["F01", "F01", "F02", "F02"], "year": [2001, 2002] * 2,
                             "sales": pa.array([10.0, float("nan"), None, 3.0], pa.float64())}),
                   tmp_path / "nan.parquet")
    read = read_frame(tmp_path / "nan.parquet", None, ["firm_id"], "year")
    assert isinstance(read["sales"].dtype, pd.ArrowDtype)
    assert check_contract(read, load_contract(contract)) == []
