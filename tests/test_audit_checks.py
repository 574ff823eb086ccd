"""Every audit check on the small defect fixtures, against hand-counted truth.

The truth is ``fixtures/expected.json`` (counted by hand, see fixtures/EXPECTED.md),
never a number produced by panelprep.  A few facts not in that file (row numbers
of bad cells, periods missing inside spans) are counted by eye from the CSV
files and written here next to the test that uses them.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from statsmodels.datasets import grunfeld

from panelprep.errors import InputError
from panelprep.io import ReadOptions
from panelprep.pipeline import audit, audit_file

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
EXPECTED = json.loads((FIXTURES / "expected.json").read_text(encoding="utf-8"))["fixtures"]
NAMES = sorted(EXPECTED)

# The default severity of every finding id: the contract an ETL gate relies on.
DEFAULT_SEVERITY = {
    "key-missing": "error",
    "key-conflict": "error",
    "row-repeated": "warning",
    "entity-id-lookalike": "warning",
    "period-holes": "warning",
    "period-off-grid": "warning",
    "panel-shape": "info",
    "entity-single-obs": "warning",
    "values-not-numeric": "error",
    "values-declared-missing": "info",
    "values-nan-missing": "warning",
    "values-missing": "info",
    "sample-new-singletons": "warning",
    "var-fixed-within": "warning",
    "var-thin-within": "info",
    "var-fixed-per-period": "info",
}

_REPORTS: dict[str, object] = {}


def run(name: str):
    """Audit one fixture as the CLI would (cached: the fixtures never change)."""
    if name not in _REPORTS:
        spec = EXPECTED[name]
        options = ReadOptions(decimal_comma=spec["decimal"] == ",")
        _REPORTS[name] = audit_file(FIXTURES / name, spec["entity"], spec["time"], options=options)
    return _REPORTS[name]


def expected_ids(spec: dict) -> set[str]:
    """Which findings a fixture must raise, read off its hand counts."""
    ids = {"panel-shape"}
    rules = {
        "key-missing": spec["missing_key_rows"] > 0,
        "key-conflict": spec["conflicting_duplicate_keys"] > 0,
        "row-repeated": spec["exact_duplicate_rows"] > 0,
        "entity-id-lookalike": bool(spec["lookalike_groups"]),
        "period-holes": spec["entities_with_gaps"] > 0,
        "period-off-grid": spec["off_grid_rows"] > 0,
        "entity-single-obs": spec["singleton_entities"] > 0,
        "values-not-numeric": bool(spec["non_numeric"]),
        "values-missing": spec["listwise_rows_removed"] > 0,
        "sample-new-singletons": bool(spec["listwise_new_singletons"]),
        "var-fixed-within": bool(spec["time_invariant"]),
        "var-thin-within": bool(spec["low_within"]),
        "var-fixed-per-period": bool(spec["period_invariant"]),
    }
    return ids | {finding_id for finding_id, raised in rules.items() if raised}


@pytest.mark.parametrize("name", NAMES)
def test_exactly_the_expected_findings_with_default_severities(name):
    report = run(name)
    assert {f.id for f in report.findings} == expected_ids(EXPECTED[name])
    for finding in report.findings:
        assert finding.severity == DEFAULT_SEVERITY[finding.id], finding.id


@pytest.mark.parametrize("name", NAMES)
def test_verdict_fails_exactly_on_error_findings(name):
    spec = EXPECTED[name]
    has_error = bool(spec["missing_key_rows"] or spec["conflicting_duplicate_keys"]
                     or spec["non_numeric"])
    assert run(name).verdict == ("fail" if has_error else "pass")


@pytest.mark.parametrize("name", NAMES)
def test_panel_summary_matches_hand_counts(name):
    spec = EXPECTED[name]
    report = run(name)
    panel = report.panel
    assert report.input["rows"] == spec["rows"]
    assert panel["rows"] == spec["estimation_rows"]
    assert panel["entities"] == spec["estimation_entities"]
    assert report.context.index.n_entities == spec["entities"]
    assert panel["periods"] == spec["periods"]
    assert panel["balanced"] is spec["balanced"]
    assert panel["singleton_entities"] == spec["singleton_entities"]
    assert panel["entities_with_gaps"] == spec["entities_with_gaps"]
    assert panel["exact_duplicate_rows"] == spec["exact_duplicate_rows"]
    assert panel["conflicting_duplicate_keys"] == spec["conflicting_duplicate_keys"]
    assert report.keys["freq"] == spec["freq"]
    assert list(report.variables) == spec["variables"]


@pytest.mark.parametrize("name", NAMES)
def test_period_range_labels(name):
    spec = EXPECTED[name]
    details = run(name).finding("panel-shape").details
    assert (details["first_period"], details["last_period"]) == (
        spec["first_period"], spec["last_period"])
    assert details["balanced"] is spec["balanced"]


@pytest.mark.parametrize("name", NAMES)
def test_singletons_name_the_entities(name):
    spec = EXPECTED[name]
    finding = run(name).finding("entity-single-obs")
    if not spec["singleton_entities"]:
        assert finding is None
        return
    assert finding.count == spec["singleton_entities"]
    assert sorted(e["entity"] for e in finding.examples) == sorted(spec["singleton_ids"])


@pytest.mark.parametrize("name", NAMES)
def test_gap_details_per_entity(name):
    spec = EXPECTED[name]
    finding = run(name).finding("period-holes")
    if not spec["gaps"]:
        assert finding is None
        return
    assert finding.count == spec["entities_with_gaps"]
    shown = {e["entity"]: {"gaps": e["gaps"], "longest": e["longest_gap"]}
             for e in finding.examples}
    assert shown == spec["gaps"]
    assert finding.details["longest_gap"] == max(g["longest"] for g in spec["gaps"].values())
    assert finding.details["gap_episodes"] == sum(g["gaps"] for g in spec["gaps"].values())


def test_gaps_fixture_periods_missing_and_worst_first():
    # counted by eye from fixtures/gaps.csv: 00102 misses 2012, 2014, 2015;
    # 00103 misses 2011-2013; 00105 misses 2014
    finding = run("gaps.csv").finding("period-holes")
    missing = {e["entity"]: e["periods_missing"] for e in finding.examples}
    assert missing == {"00102": 3, "00103": 3, "00105": 1}
    assert finding.details["periods_missing"] == 7
    assert finding.examples[0]["entity"] == "00103"  # the longest gap (3 years) comes first


@pytest.mark.parametrize("name", NAMES)
def test_duplicate_keys_and_rows(name):
    spec = EXPECTED[name]
    report = run(name)
    repeated = report.finding("row-repeated")
    conflict = report.finding("key-conflict")
    assert (repeated.count if repeated else 0) == spec["exact_duplicate_rows"]
    assert (conflict.count if conflict else 0) == spec["conflicting_duplicate_keys"]
    if conflict:
        keys = sorted([e[spec["entity"]], str(e[spec["time"]])] for e in conflict.examples)
        assert keys == sorted(spec["conflicting_keys"])
        assert conflict.details["rows_involved"] == spec["conflicting_duplicate_rows"]


def test_exact_repeats_point_at_the_later_copies():
    # fixtures/exact_duplicates.csv: 00101/2021 is on data rows 2, 3 and 14,
    # 00103/2023 on rows 13 and 15; the first of each stays, the others repeat it
    finding = run("exact_duplicates.csv").finding("row-repeated")
    assert [(e["row"], e["firm_id"], e["year"]) for e in finding.examples] == [
        (3, "00101", 2021), (14, "00101", 2021), (15, "00103", 2023)]
    # and each names the row it repeats, counted the same way
    assert [e["repeats_row"] for e in finding.examples] == [2, 2, 13]


@pytest.mark.parametrize("name", NAMES)
def test_missing_keys(name):
    spec = EXPECTED[name]
    finding = run(name).finding("key-missing")
    if not spec["missing_key_rows"]:
        assert finding is None
        return
    assert finding.count == spec["missing_key_rows"]
    assert finding.details == {"rows_without_entity": spec["missing_entity_rows"],
                               "rows_without_time": spec["missing_time_rows"]}


def test_missing_key_examples_name_rows_and_blank_ids():
    # fixtures/missing_keys.csv data rows 6 (',2020'), 11 ('00102,,'), 12 ('" ",2021'),
    # 16 ('00103,,') and 17 (',,')
    finding = run("missing_keys.csv").finding("key-missing")
    assert [e["row"] for e in finding.examples] == [6, 11, 12, 16, 17]
    by_row = {e["row"]: e for e in finding.examples}
    assert by_row[6]["firm_id"] is None and by_row[6]["year"] == 2020
    assert by_row[12]["firm_id"] == " "
    assert by_row[17]["firm_id"] is None and by_row[17]["year"] is None


def test_off_grid_monthly_dates():
    spec = EXPECTED["off_grid_monthly.csv"]
    report = run("off_grid_monthly.csv")
    assert report.keys["freq"] == "month"
    finding = report.finding("period-off-grid")
    assert finding.count == spec["off_grid_rows"]
    assert sorted(e["date"] for e in finding.examples) == spec["off_grid_values"]
    assert sorted(e["firm_id"] for e in finding.examples) == ["00102", "00103"]
    # placed in the month that contains them: 6 periods, balanced, no gaps
    assert report.panel["periods"] == 6 and report.panel["balanced"] is True


def test_off_grid_dates_from_a_frame_of_timestamps():
    # the same panel handed over as datetimes rather than text
    frame = pd.read_csv(FIXTURES / "off_grid_monthly.csv", dtype={"firm_id": str},
                        parse_dates=["date"])
    report = audit(frame, entity="firm_id", time="date")
    assert report.keys["freq"] == "month"
    assert report.finding("period-off-grid").count == 2
    assert report.panel["balanced"] is True


def test_lookalike_ids():
    spec = EXPECTED["lookalike_ids.csv"]
    finding = run("lookalike_ids.csv").finding("entity-id-lookalike")
    assert finding.count == len(spec["lookalike_groups"])
    groups = sorted(sorted(e["ids"]) for e in finding.examples)
    assert groups == sorted(sorted(g) for g in spec["lookalike_groups"])
    assert finding.details["ids_involved"] == sum(len(g) for g in spec["lookalike_groups"])


def test_lookalike_ids_on_one_part_of_a_two_column_key():
    frame = pd.DataFrame({
        "country": ["DE", "DE", "de", "de", "FR", "FR"],
        "firm": ["001", "001", "001", "001", "001", "001"],
        "year": [2001, 2002, 2001, 2002, 2001, 2002],
        "x": [1.0, 2.0, 3.0, 4.0, 5.0, 7.0],
    })
    finding = audit(frame, entity=["country", "firm"], time="year").finding(
        "entity-id-lookalike")
    assert finding.count == 1
    assert sorted(finding.examples[0]["ids"]) == ["DE/001", "de/001"]


def test_no_lookalike_finding_for_numeric_ids():
    frame = pd.DataFrame({"firm": [1, 1, 2, 2], "year": [1, 2, 1, 2], "x": [1.0, 2, 3, 5]})
    assert audit(frame, entity="firm", time="year").finding("entity-id-lookalike") is None


@pytest.mark.parametrize("name", NAMES)
def test_non_numeric_cells(name):
    spec = EXPECTED[name]
    finding = run(name).finding("values-not-numeric")
    if not spec["non_numeric"]:
        assert finding is None
        return
    assert finding.count == sum(spec["non_numeric"].values())
    assert finding.details == {
        column: {"rows": count, "values": spec["non_numeric_values"][column]}
        for column, count in spec["non_numeric"].items()
    }


def test_non_numeric_examples_name_column_row_and_value():
    # data rows counted by eye in fixtures/non_numeric.csv
    finding = run("non_numeric.csv").finding("values-not-numeric")
    assert sorted((e["column"], e["row"], e["value"]) for e in finding.examples) == [
        ("capital", 10, "12.5k"),
        ("sales", 2, "n/a"),
        ("sales", 5, "1,234"),
        ("sales", 7, "12%"),
        ("sales", 12, "-"),
    ]
    assert "--missing-token" in finding.message


def test_missing_token_reads_declared_texts_as_missing_and_says_so():
    options = ReadOptions(missing_tokens=("n/a", "-"))
    report = audit_file(FIXTURES / "non_numeric.csv", "firm_id", "year", options=options)
    declared = report.finding("values-declared-missing")
    assert declared is not None, "declared missing texts must be reported, never silent"
    assert declared.severity == "info"
    assert declared.count == 2
    assert declared.details == {"per_variable": {"sales": 2}}
    still_bad = report.finding("values-not-numeric")
    assert still_bad.count == 3  # 1,234 and 12% in sales, 12.5k in capital
    assert still_bad.details["sales"]["values"] == ["1,234", "12%"]
    # the declared cells are absent: the same 5 rows leave the estimation sample
    assert report.finding("values-missing").details["rows_removed"] == 5
    assert report.panel["rows"] == 7


def test_missing_token_for_every_text_leaves_no_error():
    options = ReadOptions(missing_tokens=("n/a", "-", "1,234", "12%", "12.5k"))
    report = audit_file(FIXTURES / "non_numeric.csv", "firm_id", "year", options=options)
    assert report.finding("values-not-numeric") is None
    assert report.finding("values-declared-missing").count == 5
    assert report.verdict == "pass"


def test_numeric_missing_token_applies_to_numbers_too():
    frame = pd.DataFrame({"firm": ["a", "a", "a", "b", "b"], "year": [1, 2, 3, 1, 2],
                          "x": [1.0, -999.0, 3.0, 4.0, 6.0]})
    report = audit(frame, entity="firm", time="year", missing_tokens=["-999"])
    assert report.finding("values-declared-missing").count == 1
    assert report.variables["x"]["n"] == 4
    assert report.variables["x"]["min"] == 1.0
    # row a/2 left the sample: a now has a hole
    assert report.panel["entities_with_gaps"] == 1


def test_infinite_values_are_reported_not_averaged():
    frame = pd.DataFrame({"firm": ["a", "a", "b", "b"], "year": [1, 2, 1, 2],
                          "x": [1.0, np.inf, 3.0, 5.0]})
    report = audit(frame, entity="firm", time="year")
    finding = report.finding("values-not-numeric")
    assert finding.count == 1 and finding.examples[0]["row"] == 2
    assert report.variables["x"]["max"] == 5.0
    json.dumps(report.to_dict(), allow_nan=False)


@pytest.mark.parametrize("name", NAMES)
def test_missing_values_and_listwise_deletion(name):
    spec = EXPECTED[name]
    report = run(name)
    finding = report.finding("values-missing")
    if not spec["listwise_rows_removed"]:
        assert finding is None
        return
    assert finding.count == spec["listwise_rows_removed"]
    assert finding.details["rows_removed"] == spec["listwise_rows_removed"]
    # per variable the check counts every absent value: empty cells plus text cells
    absent = {v: spec["missing_cells"].get(v, 0) + spec["non_numeric"].get(v, 0)
              for v in spec["variables"]}
    assert finding.details["per_variable"] == absent
    new = report.finding("sample-new-singletons")
    if spec["listwise_new_singletons"]:
        assert new.count == len(spec["listwise_new_singletons"])
        assert sorted(e["entity"] for e in new.examples) == spec["listwise_new_singletons"]
    else:
        assert new is None


@pytest.mark.parametrize("name", NAMES)
def test_time_and_period_invariant_variables(name):
    spec = EXPECTED[name]
    report = run(name)
    for finding_id, key in (("var-fixed-within", "time_invariant"),
                            ("var-fixed-per-period", "period_invariant")):
        finding = report.finding(finding_id)
        named = [e["variable"] for e in finding.examples] if finding else []
        assert named == spec[key], finding_id
    flagged = [n for n, row in report.variables.items() if row["time_invariant"]]
    assert flagged == spec["time_invariant"]


def test_thin_within_variable_matches_hand_share():
    spec = EXPECTED["time_invariant.csv"]
    report = run("time_invariant.csv")
    finding = report.finding("var-thin-within")
    assert [e["variable"] for e in finding.examples] == list(spec["low_within"])
    # within SD / overall SD squared = share * (n - 1) / (n - N) with our ddofs;
    # the hand share (within SS / total SS) is 0.16 / 200000.16 (fixtures/EXPECTED.md)
    n, n_entities = spec["estimation_rows"], spec["estimation_entities"]
    ratio = finding.examples[0]["within_sd_ratio"]
    share = 0.16 / 200000.16
    assert ratio**2 * (n - n_entities) / (n - 1) == pytest.approx(share, rel=1e-6)
    assert spec["low_within"]["capital"] == pytest.approx(share, rel=1e-3)


def test_decimal_comma_with_semicolons_reads_the_numbers():
    report = run("semicolon_decimal_comma.csv")
    # outside check: pandas' own CSV reader with the same separator and decimal mark
    frame = pd.read_csv(FIXTURES / "semicolon_decimal_comma.csv", sep=";", decimal=",")
    for name in ("sales", "capital", "staff"):
        row = report.variables[name]
        assert row["n"] == 9
        assert row["mean"] == pytest.approx(frame[name].mean(), rel=1e-12)
        assert row["min"] == frame[name].min() and row["max"] == frame[name].max()
    assert report.context.index.entity_labels["firm_id"].tolist() == ["00101", "00102", "00103"]


def test_decimal_commas_without_the_option_are_not_numbers():
    report = audit_file(FIXTURES / "semicolon_decimal_comma.csv", "firm_id", "year",
                        vars="sales,capital,staff")
    finding = report.finding("values-not-numeric")
    assert finding.count == 27  # every one of 9 rows x 3 variables is written '138,5'
    assert report.verdict == "fail"


def test_quarter_labels_gap_across_the_year_end():
    report = run("quarters.csv")
    assert report.keys["freq"] == "quarter"
    finding = report.finding("period-holes")
    assert finding.examples == [
        {"entity": "00102", "gaps": 1, "longest_gap": 1, "periods_missing": 1}]
    cover = report.finding("panel-shape").details["coverage"]
    # counted by hand from fixtures/quarters.csv: 00101 and 00103 every quarter, 00102 skips 2021Q4
    assert [(s["entry"], s["exit"], s["holes"], s["entities"]) for s in cover["spells"]] == [
        ("2021Q1", "2022Q2", 0, 2), ("2021Q1", "2022Q2", 1, 1)]
    assert cover["spell_groups"] == 2 and cover["entities_full"] == 2
    assert cover["runs"] == {"1": 2, "2": 1}
    assert [(b["first"], b["present_fewest"], b["entering"], b["last_seen"])
            for b in cover["bands"]] == [("2021Q1", 3, 3, 0), ("2021Q2", 3, 0, 0),
                                         ("2021Q3", 3, 0, 0), ("2021Q4", 2, 0, 0),
                                         ("2022Q1", 3, 0, 0), ("2022Q2", 3, 0, 3)]


def test_month_labels_across_the_year_end_are_contiguous():
    report = run("months.csv")
    assert report.keys["freq"] == "month"
    assert report.finding("period-holes") is None
    assert report.panel["periods"] == 6 and report.panel["balanced"] is True


def test_two_column_entity_key():
    # firm ids repeat across countries: the entity is the (country, firm) pair
    frame = pd.DataFrame({
        "country": ["DE"] * 3 + ["FR"] * 3 + ["FR"],
        "firm": ["007", "007", "007", "007", "007", "007", "010"],
        "year": [2001, 2002, 2003, 2001, 2003, 2003, 2002],
        "x": [1.0, 2.0, 3.0, 4.0, 5.0, 5.0, 9.0],
    })
    report = audit(frame, entity=["country", "firm"], time="year")
    assert report.keys["entity"] == ["country", "firm"]
    assert report.panel["entities"] == 3
    assert report.panel["exact_duplicate_rows"] == 1       # FR/007/2003 written twice
    assert report.panel["entities_with_gaps"] == 1          # FR/007 lacks 2002
    assert report.panel["singleton_entities"] == 1          # FR/010
    assert report.finding("period-holes").examples[0]["entity"] == "FR/007"
    assert report.finding("entity-single-obs").examples == [{"entity": "FR/010"}]
    assert report.finding("entity-id-lookalike") is None


def test_two_column_key_from_csv_keeps_leading_zeros(tmp_path):
    path = tmp_path / "two_keys.csv"
    path.write_text("country,firm,year,x\n01,007,2001,1\n01,007,2002,2\n02,007,2001,3\n"
                    "02,007,2002,5\n", encoding="utf-8")
    report = audit_file(path, "country,firm", "year")
    assert report.context.index.entity_key([0, 1]) == ["01/007", "02/007"]
    assert report.panel["entities"] == 2 and report.panel["balanced"] is True


def test_missing_part_of_a_two_column_key_is_a_missing_key():
    frame = pd.DataFrame({"a": ["x", None, "x"], "b": ["1", "1", " "], "year": [1, 1, 2],
                          "v": [1.0, 2.0, 3.0]})
    finding = audit(frame, entity=["a", "b"], time="year").finding("key-missing")
    assert finding.count == 2
    assert finding.details == {"rows_without_entity": 2, "rows_without_time": 0}


def test_severity_overrides():
    report = audit_file(FIXTURES / "gaps.csv", "firm_id", "year",
                        severities={"period-holes": "error"})
    assert report.finding("period-holes").severity == "error"
    assert report.verdict == "fail"
    report = audit_file(FIXTURES / "missing_keys.csv", "firm_id", "year",
                        severities={"key-missing": "info"})
    assert report.finding("key-missing").severity == "info"
    assert report.verdict == "pass"
    with pytest.raises(InputError, match="period-holes"):
        audit_file(FIXTURES / "gaps.csv", "firm_id", "year", severities={"period-holes": "loud"})
    with pytest.raises(InputError, match="unknown finding id"):
        audit_file(FIXTURES / "gaps.csv", "firm_id", "year", severities={"period-gaps": "error"})


def test_fail_on_warning():
    assert run("gaps.csv").verdict == "pass"
    assert audit_file(FIXTURES / "gaps.csv", "firm_id", "year", fail_on="warning").verdict == "fail"
    clean = audit_file(FIXTURES / "clean_balanced.csv", "firm_id", "year", fail_on="warning")
    assert clean.verdict == "pass"  # the panel-shape finding is info only
    assert clean.to_dict()["fail_on"] == "warning"


@pytest.fixture(scope="module")
def grunfeld_ten():
    # Grunfeld (1958) investment data as tabulated in Baltagi, Econometric Analysis of
    # Panel Data, shipped by statsmodels.datasets.grunfeld; without American Steel it is
    # the familiar balanced panel of 10 firms over 1935-1954.
    data = grunfeld.load_pandas().data
    return data[data["firm"] != "American Steel"].reset_index(drop=True)


def test_grunfeld_is_a_clean_balanced_panel(grunfeld_ten):
    report = audit(grunfeld_ten, entity="firm", time="year")
    panel = report.panel
    assert report.keys["freq"] == "year"
    assert (panel["entities"], panel["periods"], panel["rows"]) == (10, 20, 200)
    assert panel["balanced"] is True
    assert panel["entities_with_gaps"] == 0
    assert panel["exact_duplicate_rows"] == 0 and panel["conflicting_duplicate_keys"] == 0
    assert panel["singleton_entities"] == 0
    details = report.finding("panel-shape").details
    assert (details["first_period"], details["last_period"]) == ("1935", "1954")
    assert report.verdict == "pass"


def test_grunfeld_between_and_within_sds_match_a_direct_computation(grunfeld_ten):
    report = audit(grunfeld_ten, entity="firm", time="year", vars=["invest", "value", "capital"])
    n, n_firms = len(grunfeld_ten), grunfeld_ten["firm"].nunique()
    for name in ("invest", "value", "capital"):
        # outside computation with pandas/numpy, our documented definitions:
        # between = SD (ddof 1) of the firm means; within = sqrt(SS about firm means / (n - N))
        x = grunfeld_ten[name].to_numpy()
        firm_means = grunfeld_ten.groupby("firm")[name].mean().to_numpy()
        deviation = x - grunfeld_ten.groupby("firm")[name].transform("mean").to_numpy()
        between = np.std(firm_means, ddof=1)
        within = np.sqrt((deviation**2).sum() / (n - n_firms))
        row = report.variables[name]
        assert row["sd_between"] == pytest.approx(between, rel=1e-12)
        assert row["sd_within"] == pytest.approx(within, rel=1e-12)
        assert row["sd_overall"] == pytest.approx(np.std(x, ddof=1), rel=1e-12)
        assert row["mean"] == pytest.approx(x.mean(), rel=1e-12)
        assert row["time_invariant"] is False


def test_grunfeld_with_planted_duplicates_is_caught(grunfeld_ten):
    # plant one conflicting key and one exact repeat in the outside data set
    broken = pd.concat([grunfeld_ten, grunfeld_ten.iloc[[0]], grunfeld_ten.iloc[[5]].assign(
        invest=grunfeld_ten["invest"].iloc[5] + 1.0)], ignore_index=True)
    panel = audit(broken, entity="firm", time="year").panel
    assert panel["exact_duplicate_rows"] == 1
    assert panel["conflicting_duplicate_keys"] == 1


def test_repeats_of_rows_holding_pandas_na_name_the_row_they_repeat():
    """Rows 1 and 3 are identical with <NA> in a nullable integer column (found by fuzzing)."""
    frame = pd.DataFrame({"id": ["0"] * 3, "t": ["2019Q1"] * 3, "y": [0, 0, 0],
                          "x": pd.array([pd.NA, 0, pd.NA], dtype="Int64")})
    from panelprep import audit

    report = audit(frame, "id", "t", ["y", "x"])
    repeated = next(f for f in report.to_dict()["findings"] if f["id"] == "row-repeated")
    assert [(e["row"], e["repeats_row"]) for e in repeated["examples"]] == [(3, 1)]
