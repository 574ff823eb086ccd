"""Two vintages compared: planted changes counted exactly, cross-checked with plain pandas merges.

The hand counts below follow from how ``planted_pair`` builds the new
vintage from the old one (each planted change on its own entities and
years, so the counts do not interact); the cross-checks recompute the same
quantities with ``pandas.merge`` on the key columns, a different route
than the integer-code alignment under test.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
from conftest import examples
from hypothesis import given, settings
from hypothesis import strategies as st

from panelprep.compare import CompareOptions, compare_frames
from panelprep.errors import InputError

ENTITIES = [f"E{i:02d}" for i in range(20)]
YEARS = list(range(2001, 2011))


def old_panel(seed: int = 7) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({"firm": np.repeat(ENTITIES, len(YEARS)),
                          "year": np.tile(YEARS, len(ENTITIES))})
    frame["sales"] = np.round(rng.uniform(100, 900, len(frame)), 3)
    frame["capital"] = np.round(rng.uniform(10, 90, len(frame)), 3)
    frame.loc[(frame.firm == "E11") & (frame.year == 2003), "capital"] = np.nan
    return frame


def _at(frame: pd.DataFrame, firm: str, year: int) -> pd.Series:
    return (frame.firm == firm) & (frame.year == year)


def planted_pair() -> tuple[pd.DataFrame, pd.DataFrame]:
    """The old panel and a new vintage with each kind of change planted on its own cells."""
    old = old_panel()
    new = old.copy()
    # seven sales restated by +5 %, three capital values by x1.2
    for firm, year in [("E00", 2002), ("E00", 2003), ("E01", 2004), ("E02", 2005),
                       ("E08", 2006), ("E09", 2007), ("E12", 2010)]:
        new.loc[_at(new, firm, year), "sales"] *= 1.05
    for firm, year in [("E13", 2002), ("E14", 2008), ("E15", 2009)]:
        new.loc[_at(new, firm, year), "capital"] *= 1.2
    # float noise (not restated by default) and a re-rounding of 0.0004 (restated unless atol)
    for firm, year in [("E16", 2002), ("E16", 2003), ("E17", 2004), ("E17", 2005)]:
        new.loc[_at(new, firm, year), "sales"] *= 1 + 1e-13
    for firm, year in [("E18", 2002), ("E18", 2003)]:
        new.loc[_at(new, firm, year), "sales"] += 0.0004
    # capital of E05 now in thousands of the old unit (divided by 1000), rounded to 6 decimals
    e05 = new.firm == "E05"
    new.loc[e05, "capital"] = np.round(new.loc[e05, "capital"] / 1000, 6)
    # E10's sales of 2004 withheld; E11's capital of 2003 (missing before) delivered
    new.loc[_at(new, "E10", 2004), "sales"] = np.nan
    new.loc[_at(new, "E11", 2003), "capital"] = 42.0
    # E07 re-keyed as X07, E19 gone for good, two rows removed, 2001 dropped
    new.loc[new.firm == "E07", "firm"] = "X07"
    new = new[(new.firm != "E19") & ~_at(new, "E03", 2005) & ~_at(new, "E04", 2006)]
    new = new[new.year != 2001]
    # 2011 delivered for ten firms (E00..E10 but E07) and a new firm N01 over 2006-2010
    rng = np.random.default_rng(11)
    later = pd.DataFrame({"firm": [e for e in ENTITIES[:11] if e != "E07"], "year": 2011,
                          "sales": np.round(rng.uniform(100, 900, 10), 3),
                          "capital": np.round(rng.uniform(10, 90, 10), 3)})
    newcomer = pd.DataFrame({"firm": "N01", "year": range(2006, 2011),
                             "sales": np.round(rng.uniform(100, 900, 5), 3),
                             "capital": np.round(rng.uniform(10, 90, 5), 3)})
    new = pd.concat([new, later, newcomer], ignore_index=True)
    return old, new


@pytest.fixture(scope="module")
def planted():
    old, new = planted_pair()
    return old, new, compare_frames(old, new, "firm", "year")


def finding(result, finding_id):
    return next((f for f in result.findings if f.id == finding_id), None)


# ------------------------------------------------------------------ hand counts


def test_rows_entities_and_periods_match_the_hand_count(planted):
    _, _, result = planted
    doc = result.to_dict()
    # removed: all 20 rows of 2001; E07 and E19 over 2002-2010 (9 each); E03 2005; E04 2006
    assert doc["rows"]["removed"] == 20 + 9 + 9 + 2
    # added: X07 over 2002-2010 (9), N01 (5), 2011 for ten firms (10)
    assert doc["rows"]["added"] == 9 + 5 + 10
    assert doc["rows"]["old_cells"] == 200
    assert doc["rows"]["new_cells"] == 200 - 40 + 24
    assert doc["rows"]["both"] == 200 - 40
    assert doc["entities"]["gone"] == 2 and doc["entities"]["appeared"] == 2
    assert doc["entities"]["gone_examples"] == ["E07", "E19"]
    assert doc["entities"]["appeared_examples"] == ["N01", "X07"]
    assert doc["periods"] == {"gone": ["2001"], "appeared": ["2011"]}
    by_period = {p["period"]: p for p in doc["by_period"]}
    assert by_period["2001"]["removed"] == 20 and by_period["2001"]["rows_new"] == 0
    assert by_period["2005"]["removed"] == 3 and by_period["2006"]["removed"] == 3
    assert by_period["2002"]["removed"] == 2 and by_period["2002"]["added"] == 1
    assert by_period["2006"]["added"] == 2  # X07 and N01
    assert by_period["2011"] == {"period": "2011", "rows_old": 0, "rows_new": 10,
                                 "removed": 0, "added": 10}
    assert finding(result, "vintage-rows-removed").count == 40
    assert finding(result, "vintage-rows-added").count == 24
    assert finding(result, "vintage-periods-gone").examples == [{"period": "2001"}]
    assert finding(result, "vintage-periods-new").count == 1


def test_restated_cells_match_the_hand_count(planted):
    _, _, result = planted
    sales = result.to_dict()["variables"]["sales"]
    capital = result.to_dict()["variables"]["capital"]
    # sales: 7 at +5 %, 2 re-rounded by 0.0004; the 1e-13 noise is within rtol 1e-9
    assert sales["restated"] == 9
    assert sales["unit_change_cells"] == 0
    # capital: 3 at x1.2 and the 9 cells of E05 compared (2002-2010) in the new unit
    assert capital["restated"] == 3 + 9
    assert capital["unit_change_cells"] == 9
    # compared: cells in both with a value in both (160 pairs; E10 2004 sales missing in new,
    # E11 2003 capital missing in old)
    assert sales["compared"] == 159 and capital["compared"] == 159
    assert sales["restated_share"] == pytest.approx(9 / 159)
    assert sales["became_missing"] == 1 and sales["filled_in"] == 0
    assert capital["became_missing"] == 0 and capital["filled_in"] == 1
    biggest = sales["largest_abs_change"]
    assert biggest["change"] == pytest.approx(biggest["old"] * 0.05)
    assert sales["largest_rel_change"]["change"] == pytest.approx(0.05)
    per = {p["period"]: p for p in sales["by_period"]}
    assert per["2002"]["restated"] == 2 and per["2003"]["restated"] == 2
    assert per["2008"]["restated"] == 0
    assert finding(result, "vintage-values-restated").count == 9 + 12
    assert finding(result, "vintage-values-now-missing").count == 1
    assert finding(result, "vintage-values-filled").count == 1


def test_the_unit_change_and_the_rekey_are_found(planted):
    _, _, result = planted
    doc = result.to_dict()
    assert doc["unit_changes"] == [{"variable": "capital", "scope": "entity", "where": "E05",
                                    "factor": 0.001, "cells": 9, "compared": 9}]
    # X07 holds E07's history over 2002-2010, the periods both hold
    assert doc["rekeyed"] == [{"old_entity": "E07", "new_entity": "X07", "periods_matched": 9,
                               "periods_both": 9}]
    assert finding(result, "vintage-entity-rekeyed").count == 1


def test_tolerances_decide_what_counts_as_restated():
    old, new = planted_pair()
    loose = compare_frames(old, new, "firm", "year", options=CompareOptions(atol=0.0005))
    assert loose.to_dict()["variables"]["sales"]["restated"] == 7
    exact = compare_frames(old, new, "firm", "year", options=CompareOptions(rtol=0.0))
    assert exact.to_dict()["variables"]["sales"]["restated"] == 9 + 4


def test_restated_parquet_rows_are_the_changed_cells(planted):
    _, _, result = planted
    table = result.restated_frame()
    assert list(table.columns) == ["firm", "year", "pp_variable", "pp_old", "pp_new",
                                   "pp_change"]
    counts = table.groupby(["pp_variable", "pp_change"]).size().to_dict()
    assert counts == {("capital", "filled-in"): 1, ("capital", "restated"): 3,
                      ("capital", "unit-change"): 9, ("sales", "became-missing"): 1,
                      ("sales", "restated"): 9}
    row = table[(table.firm == "E05") & (table.year == 2004)].iloc[0]
    assert row.pp_variable == "capital"
    assert row.pp_new == pytest.approx(row.pp_old / 1000, rel=1e-4)
    # in key order
    assert list(table.firm) == sorted(table.firm)


def test_shape_and_severities():
    result = compare_frames(*planted_pair(), "firm", "year")
    shape = result.to_dict()["shape"]
    assert shape["old"]["balanced"] is True and shape["new"]["balanced"] is False
    # E03 and E04 have a hole in the new vintage
    assert shape["old"]["entities_with_holes"] == 0 and shape["new"]["entities_with_holes"] == 2
    assert finding(result, "vintage-shape-changed").count >= 2
    assert result.verdict == "pass"
    strict = compare_frames(*planted_pair(), "firm", "year",
                            options=CompareOptions(fail_on="warning"))
    assert strict.verdict == "fail"


def test_max_restated_share_fails_the_gate():
    old, new = planted_pair()
    # capital is restated in 12 / 159 = 7.5 % of its cells, sales in 9 / 159 = 5.7 %
    result = compare_frames(old, new, "firm", "year",
                            options=CompareOptions(max_restated_share=0.06))
    over = finding(result, "vintage-restated-over-limit")
    assert over.severity == "error" and over.count == 1
    assert over.examples[0]["variable"] == "capital"
    assert result.verdict == "fail"
    relaxed = compare_frames(old, new, "firm", "year",
                             options=CompareOptions(max_restated_share=0.1))
    assert finding(relaxed, "vintage-restated-over-limit") is None


def test_identical_vintages_have_no_finding():
    old = old_panel()
    result = compare_frames(old, old.sample(frac=1.0, random_state=3), "firm", "year")
    assert result.findings == [] and result.verdict == "pass" and result.n_changed == 0


# ------------------------------------------------------------------ pandas cross-checks


def _pandas_counts(old, new, keys, variables, rtol, atol):
    """The same quantities by plain pandas: first row per key, an outer merge with an indicator."""
    a = old.dropna(subset=keys).drop_duplicates(keys, keep="first")
    b = new.dropna(subset=keys).drop_duplicates(keys, keep="first")
    merged = a.merge(b, on=keys, how="outer", suffixes=("_old", "_new"), indicator=True)
    out = {"removed": int((merged["_merge"] == "left_only").sum()),
           "added": int((merged["_merge"] == "right_only").sum()),
           "both": int((merged["_merge"] == "both").sum())}
    pairs = merged[merged["_merge"] == "both"]
    for v in variables:
        o, n = pairs[f"{v}_old"], pairs[f"{v}_new"]
        both = o.notna() & n.notna()
        restated = both & ((n - o).abs() > atol + rtol * o.abs())
        out[v] = {"compared": int(both.sum()), "restated": int(restated.sum()),
                  "became_missing": int((o.notna() & n.isna()).sum()),
                  "filled_in": int((o.isna() & n.notna()).sum()),
                  "by_period": pairs[restated].groupby(keys[-1]).size().to_dict()}
    gone = set(a[keys[0]]) - set(b[keys[0]])
    out["gone"] = len(gone)
    out["appeared"] = len(set(b[keys[0]]) - set(a[keys[0]]))
    out["removed_by_period"] = merged[merged["_merge"] == "left_only"].groupby(
        keys[-1]).size().to_dict()
    return out


@pytest.mark.parametrize("seed", [1, 2, 3, 4, 5])
def test_counts_agree_with_a_pandas_merge(seed):
    rng = np.random.default_rng(seed)
    n = 400
    old = pd.DataFrame({"firm": rng.choice([f"f{i}" for i in range(40)], n),
                        "year": rng.integers(1990, 2000, n),
                        "x": np.round(rng.normal(size=n), 2), "y": np.round(rng.normal(size=n), 2)})
    old.loc[rng.random(n) < 0.05, "x"] = np.nan
    new = old.sample(frac=0.9, random_state=seed).copy()
    flip = rng.random(len(new)) < 0.1
    new.loc[flip, "y"] = new.loc[flip, "y"] + rng.choice([-0.01, 0.3], flip.sum())
    new.loc[rng.random(len(new)) < 0.05, "x"] = np.nan
    extra = pd.DataFrame({"firm": rng.choice([f"g{i}" for i in range(5)], 30),
                          "year": rng.integers(1995, 2003, 30),
                          "x": rng.normal(size=30), "y": rng.normal(size=30)})
    new = pd.concat([new, extra], ignore_index=True)
    for rtol, atol in [(1e-9, 0.0), (0.0, 0.02)]:
        result = compare_frames(old, new, "firm", "year", ["x", "y"],
                                options=CompareOptions(rtol=rtol, atol=atol))
        doc = result.to_dict()
        # reference: pandas.merge on the key columns (outer, indicator)
        ref = _pandas_counts(old, new, ["firm", "year"], ["x", "y"], rtol, atol)
        assert doc["rows"]["removed"] == ref["removed"]
        assert doc["rows"]["added"] == ref["added"]
        assert doc["rows"]["both"] == ref["both"]
        assert doc["entities"]["gone"] == ref["gone"]
        assert doc["entities"]["appeared"] == ref["appeared"]
        removed = {int(p["period"]): p["removed"] for p in doc["by_period"] if p["removed"]}
        assert removed == ref["removed_by_period"]
        for v in ("x", "y"):
            got = doc["variables"][v]
            for key in ("compared", "restated", "became_missing", "filled_in"):
                assert got[key] == ref[v][key], (v, key)
            per = {int(p["period"]): p["restated"] for p in got["by_period"] if p["restated"]}
            assert per == ref[v]["by_period"]
        assert result.n_changed == sum(ref[v][k] for v in ("x", "y")
                                       for k in ("restated", "became_missing", "filled_in"))


def test_repeated_keys_are_compared_on_their_first_row():
    old = old_panel()
    new = pd.concat([old, old.iloc[[5]].assign(sales=1.0)], ignore_index=True)
    result = compare_frames(old, new, "firm", "year")
    assert finding(result, "vintage-key-repeated").count == 1
    assert result.to_dict()["variables"]["sales"]["restated"] == 0


# ------------------------------------------------------------------ columns, types, keys


def test_type_and_column_changes():
    old = old_panel()
    new = old.drop(columns=["capital"]).assign(
        sales=old["sales"].map(lambda v: f"{v} EUR"), rating=1.0)
    result = compare_frames(old, new, "firm", "year")
    assert finding(result, "vintage-type-changed").examples == [
        {"column": "sales", "old": "number", "new": "text"}]
    columns = finding(result, "vintage-columns-changed")
    assert columns.severity == "warning" and columns.count == 2
    assert result.to_dict()["not_compared"] == ["sales"]


def test_integer_and_text_ids_align():
    old = old_panel()
    old["firm"] = old["firm"].str[1:].astype(int) + 1000
    new = old.copy()
    new["firm"] = new["firm"].astype(str)
    new["year"] = new["year"].astype(str)
    result = compare_frames(old, new, "firm", "year")
    assert result.to_dict()["rows"]["both"] == 200
    assert finding(result, "vintage-entities-gone") is None


def test_bad_options_are_refused():
    old = old_panel()
    with pytest.raises(InputError, match="--rtol"):
        compare_frames(old, old, "firm", "year", options=CompareOptions(rtol=-1))
    with pytest.raises(InputError, match="max-restated-share"):
        compare_frames(old, old, "firm", "year", options=CompareOptions(max_restated_share=2))
    with pytest.raises(InputError, match="not found"):
        compare_frames(old, old.drop(columns=["year"]), "firm", "year")
    dated = old.assign(year=pd.to_datetime(old["year"].astype(str) + "-12-31"))
    with pytest.raises(InputError, match="time column 'year' holds number values"):
        compare_frames(old, dated, "firm", "year")
    with pytest.raises(InputError, match="neither vintage"):
        compare_frames(old, old, "firm", "year", ["profit"])


def test_a_period_in_a_new_unit_is_found():
    old = old_panel()
    new = old.copy()
    new.loc[new.year == 2009, "sales"] = new.loc[new.year == 2009, "sales"] * 1000
    result = compare_frames(old, new, "firm", "year")
    units = result.to_dict()["unit_changes"]
    assert units == [{"variable": "sales", "scope": "period", "where": "2009",
                      "factor": 1000.0, "cells": 20, "compared": 20}]
    assert result.to_dict()["variables"]["sales"]["unit_change_cells"] == 20


# ------------------------------------------------------------------ command line and files


def _run(*args, cwd):
    # the installed command in a real process
    beside = Path(sys.executable).with_name("panelprep")
    command = [str(beside)] if beside.exists() else [
        sys.executable, "-c", "from panelprep.cli import main; main()"]
    return subprocess.run([*command, *args], cwd=cwd, capture_output=True, text=True,
                          check=False)


@pytest.fixture
def vintage_files(tmp_path):
    old, new = planted_pair()
    old.to_csv(tmp_path / "old.csv", index=False)
    new.to_parquet(tmp_path / "new.parquet", index=False)
    return tmp_path


def test_cli_compare_writes_every_file_and_gates(vintage_files):
    done = _run("compare", "old.csv", "new.parquet", "-e", "firm", "-t", "year", "--out", "cmp",
                cwd=vintage_files)
    assert done.returncode == 0, done.stderr
    assert "vintage-entity-rekeyed" in done.stdout
    folder = vintage_files / "cmp"
    assert sorted(p.name for p in folder.iterdir()) == [
        "comparison.html", "comparison.json", "comparison.txt", "restated.parquet"]
    doc = json.loads((folder / "comparison.json").read_text())
    assert doc["rows"]["removed"] == 40 and doc["verdict"] == "pass"
    assert len(pq.read_table(folder / "restated.parquet")) == 9 + 1 + 12 + 1
    page = (folder / "comparison.html").read_text()
    assert 'id="picture-restated"' in page and "<svg" in page and "http" not in page.split(
        "<body>")[1].replace('http://www.w3.org/2000/svg', "")
    failed = _run("compare", "old.csv", "new.parquet", "-e", "firm", "-t", "year",
                  "--max-restated-share", "0.06", "-q", cwd=vintage_files)
    assert failed.returncode == 1 and "vintage-restated-over-limit" in failed.stdout


def test_cli_compare_bad_input_is_one_line_and_writes_nothing(vintage_files):
    for args in (["--rtol", "-1"], ["--vars", "nothing"], ["--severity", "vintage-nope=info"]):
        done = _run("compare", "old.csv", "new.parquet", "-e", "firm", "-t", "year",
                    "--out", "cmp", *args, cwd=vintage_files)
        assert done.returncode == 2, args
        assert done.stderr.count("\n") == 1 and "Traceback" not in done.stderr
        assert not (vintage_files / "cmp").exists()
        assert not [p for p in vintage_files.iterdir() if p.name.startswith(".panelprep")]


def test_prepare_compares_with_the_previous_vintage(vintage_files):
    run = vintage_files / "run.toml"
    run.write_text('[input]\npath = "new.parquet"\n[panel]\nentity = "firm"\ntime = "year"\n'
                   '[model]\ny = "sales"\nx = ["capital"]\n[output]\ndir = "out"\n'
                   '[compare]\nprevious = "old.csv"\n')
    done = _run("prepare", "--config", "run.toml", cwd=vintage_files)
    assert done.returncode == 0, done.stderr
    out = vintage_files / "out"
    summary = json.loads((out / "diagnostics.json").read_text())
    assert summary["comparison"]["rows"]["added"] == 24
    assert {f["id"] for f in summary["findings"]} >= {"vintage-entity-rekeyed",
                                                       "vintage-unit-changed"}
    assert "restated.parquet" in {f["name"] for f in summary["files"]}
    assert len(pq.read_table(out / "restated.parquet")) == 23
    assert "Against the previous vintage" in (out / "diagnostics.txt").read_text()
    assert 'id="comparison"' in (out / "report.html").read_text()
    # a limit on the restated share fails the gate: out is left as it was
    before = sorted(p.name for p in out.iterdir())
    run.write_text(run.read_text() + "max_restated_share = 0.06\n")
    done = _run("prepare", "--config", "run.toml", "--force", cwd=vintage_files)
    assert done.returncode == 1
    assert sorted(p.name for p in out.iterdir()) == before
    failed = json.loads((vintage_files / "out.failed" / "diagnostics.json").read_text())
    assert "vintage-restated-over-limit" in {f["id"] for f in failed["findings"]}


def test_run_file_severity_applies_to_comparison_findings(vintage_files):
    run = vintage_files / "run.toml"
    run.write_text('[input]\npath = "new.parquet"\n[panel]\nentity = "firm"\ntime = "year"\n'
                   '[model]\ny = "sales"\nx = ["capital"]\n[output]\ndir = "out"\n'
                   '[checks.severity]\nvintage-unit-changed = "error"\n'
                   '[compare]\nprevious = "old.csv"\n')
    done = _run("prepare", "--config", "run.toml", cwd=vintage_files)
    assert done.returncode == 1 and "vintage-unit-changed" in done.stderr


# ------------------------------------------------------------------ the demo pair


def test_demo_vintages_are_found_as_planted():
    from panelprep.demo import make_demo_vintages

    old, new, planted = make_demo_vintages()
    result = compare_frames(old, new, "firm_id", "year")
    doc = result.to_dict()
    assert doc["periods"] == {"gone": planted["periods_gone"], "appeared": planted["periods_new"]}
    assert doc["rows"]["removed"] == planted["rows_removed"]
    assert doc["rows"]["added"] == planted["rows_added"]
    assert doc["entities"]["gone"] == planted["entities_gone"]
    assert doc["entities"]["appeared"] == planted["entities_new"]
    for name in ("sales", "capital", "staff"):
        got = doc["variables"][name]
        assert got["restated"] == planted["restated"][name], name
        assert got["became_missing"] == planted["became_missing"][name], name
        assert got["filled_in"] == planted["filled_in"][name], name
    assert doc["variables"]["capital"]["unit_change_cells"] == planted["unit_change_cells"]
    assert [u["where"] for u in doc["unit_changes"]] == planted["unit_firms"]
    assert [[r["old_entity"], r["new_entity"]] for r in doc["rekeyed"]] == planted["rekeyed"]
    # the planted counts agree with a plain pandas merge of the two deliveries
    ref = _pandas_counts(old, new, ["firm_id", "year"], ["sales", "capital", "staff"], 1e-9, 0.0)
    assert (ref["removed"], ref["added"]) == (planted["rows_removed"], planted["rows_added"])
    assert ref["sales"]["restated"] == planted["restated"]["sales"]


def test_the_demo_writes_both_vintages(tmp_path):
    done = _run("demo", str(tmp_path / "demo"), "-q", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "panelprep compare" in done.stdout
    folder = tmp_path / "demo" / "vintages"
    compared = _run("compare", str(folder / "firms_2023.csv"), str(folder / "firms_2024.csv"),
                    "--entity", "firm_id", "--time", "year", "-q", cwd=tmp_path)
    assert compared.returncode == 0 and "F900024" in compared.stdout


def test_prepare_takes_the_previous_vintage_from_the_command_line(vintage_files):
    done = _run("prepare", "new.parquet", "-e", "firm", "-t", "year", "--y", "sales",
                "--x", "capital", "--out", "out", "--previous", "old.csv", cwd=vintage_files)
    assert done.returncode == 0, done.stderr
    assert (vintage_files / "out" / "restated.parquet").exists()
    (vintage_files / "run.toml").write_text(
        '[input]\npath = "new.parquet"\n[panel]\nentity = "firm"\ntime = "year"\n'
        '[model]\ny = "sales"\nx = ["capital"]\n[output]\ndir = "out2"\n'
        '[compare]\nprevious = "old.csv"\nvars = ["profit"]\n')
    refused = _run("prepare", "--config", "run.toml", cwd=vintage_files)
    assert refused.returncode == 2 and "compare.vars" in refused.stderr
    assert not (vintage_files / "out2").exists()


def test_two_column_keys_align():
    old, new = planted_pair()
    old = old.assign(country="AA")
    new = new.assign(country="AA")
    result = compare_frames(old, new, ["country", "firm"], "year")
    assert result.to_dict()["rows"]["removed"] == 40
    assert result.to_dict()["rekeyed"][0]["old_entity"] == "AA/E07"
    assert list(result.restated_frame().columns[:3]) == ["country", "firm", "year"]


def test_a_long_grid_is_drawn_in_runs_of_periods():
    days = pd.date_range("2000-01-01", periods=1000, freq="D").strftime("%Y-%m-%d")
    old = pd.DataFrame({"id": "a", "day": days, "v": np.arange(1000.0)})
    new = old.assign(v=np.where(np.arange(1000) % 4 == 0, old["v"] + 1, old["v"]))
    picture = compare_frames(old, new, "id", "day").to_dict()["picture"]
    assert len(picture["periods"]) == len(picture["share"][0]) == 120
    assert picture["periods"][0] == "2000-01-01 to 2000-01-09"
    # 1000 days in 120 runs of 8 or 9; every fourth day restated
    assert sum(picture["share"][0]) / 120 == pytest.approx(0.25, abs=0.02)


def test_a_whole_variable_in_a_new_unit_is_one_change():
    old = old_panel()
    new = old.assign(sales=old["sales"] / 1000)
    result = compare_frames(old, new, "firm", "year")
    assert result.to_dict()["unit_changes"] == [
        {"variable": "sales", "scope": "variable", "where": "every period", "factor": 0.001,
         "cells": 200, "compared": 200}]
    assert finding(result, "vintage-unit-changed").count == 1
    assert result.to_dict()["variables"]["sales"]["unit_change_cells"] == 200


# ------------------------------------------------------------------ property: any pair


@st.composite
def vintage_pairs(draw):
    """Two small vintages over a few firms and years: repeats, missing values, any overlap."""
    rows = st.tuples(st.sampled_from(["a", "b", "c", "d"]), st.integers(1, 6),
                     st.one_of(st.none(), st.sampled_from([0.0, 1.0, 2.5, 10.0, -3.0, 1000.0])))
    old = pd.DataFrame(draw(st.lists(rows, min_size=1, max_size=30)), columns=["f", "t", "v"])
    new = pd.DataFrame(draw(st.lists(rows, min_size=1, max_size=30)), columns=["f", "t", "v"])
    return old.astype({"v": float}), new.astype({"v": float})


@settings(max_examples=examples(60), deadline=None)
@given(vintage_pairs(), st.sampled_from([(1e-9, 0.0), (0.0, 1.5)]))
def test_any_pair_counts_as_a_pandas_merge_does(pair, tolerance):
    old, new = pair
    rtol, atol = tolerance
    result = compare_frames(old, new, "f", "t", ["v"], options=CompareOptions(rtol=rtol, atol=atol))
    doc = result.to_dict()
    # reference: pandas.merge of the first row per key, as in _pandas_counts
    ref = _pandas_counts(old, new, ["f", "t"], ["v"], rtol, atol)
    assert (doc["rows"]["removed"], doc["rows"]["added"], doc["rows"]["both"]) == (
        ref["removed"], ref["added"], ref["both"])
    for key in ("compared", "restated", "became_missing", "filled_in"):
        assert doc["variables"]["v"][key] == ref["v"][key], key
    assert (doc["entities"]["gone"], doc["entities"]["appeared"]) == (ref["gone"],
                                                                      ref["appeared"])
    assert result.n_changed == len(result.restated_frame())


def test_every_comparison_finding_has_a_hint_and_a_run_file_severity():
    from panelprep.config import FINDING_IDS
    from panelprep.findings import COMPARE_FINDING_IDS
    from panelprep.report import HINTS

    for fid in COMPARE_FINDING_IDS:
        assert fid in FINDING_IDS, fid
        assert "--" in HINTS[fid] or "[" in HINTS[fid], fid


def test_the_text_reads_like_the_audit_log(planted):
    from panelprep.report.comparison import comparison_lines
    from panelprep.report.text import verdict_line

    _, _, result = planted
    text = "\n".join([*comparison_lines(result.to_dict()), verdict_line(result.to_dict())])
    for bad in ("(ies)", "(s)", "True", "False"):
        assert bad not in text, bad
    assert "balanced yes -> no" in text
    # warnings: periods gone, entities gone, rows removed, re-key, restated, unit, now missing;
    # notes: periods new, entities new, rows added, filled in, shape
    assert text.splitlines()[-1] == "PASS: 0 errors, 7 warnings, 5 notes; exit 0"


def test_cli_compare_never_touches_its_inputs(vintage_files):
    import hashlib

    def digest(path):
        return hashlib.sha256(path.read_bytes()).hexdigest()

    before = {p.name: digest(p) for p in vintage_files.iterdir() if p.is_file()}
    # the output folder may not be, or hold, an input, even with --force
    for out in (".", "old.csv"):
        done = _run("compare", "old.csv", "new.parquet", "-e", "firm", "-t", "year",
                    "--out", out, "--force", cwd=vintage_files)
        assert done.returncode == 2 and done.stderr.startswith("panelprep: error: "), out
    done = _run("compare", "old.csv", "new.parquet", "-e", "firm", "-t", "year", "--out", "cmp",
                cwd=vintage_files)
    assert done.returncode == 0
    again = _run("compare", "old.csv", "new.parquet", "-e", "firm", "-t", "year", "--out", "cmp",
                 cwd=vintage_files)
    assert again.returncode == 2 and "cmp" in again.stderr
    assert {p.name: digest(p) for p in vintage_files.iterdir() if p.is_file()} == before


def test_cli_compare_json_is_the_comparison_file_and_meets_its_schema(vintage_files):
    from conftest import schema_validator

    done = _run("compare", "old.csv", "new.parquet", "-e", "firm", "-t", "year", "--out", "cmp",
                "--json", cwd=vintage_files)
    assert done.returncode == 0, done.stderr
    folder = vintage_files / "cmp"
    # stdout holds the document and nothing else; the summary went to stderr
    assert done.stdout == (folder / "comparison.json").read_text(encoding="utf-8")
    assert "vintage-entity-rekeyed" in done.stderr
    document = json.loads(done.stdout)
    assert document["gate"]["verdict"] == "pass" and document["gate"]["counts"]["error"] == 0
    assert not list(schema_validator("comparison").iter_errors(document))
    meta = json.loads(pq.read_schema(folder / "restated.parquet").metadata[b"panelprep"])
    assert not list(schema_validator("provenance").iter_errors(meta))
    assert meta["file"] == "restated" and meta["new_sha256"] == document["new"]["sha256"]
    # the schema can refuse: a restated count below zero
    document["variables"]["sales"]["restated"] = -1
    assert list(schema_validator("comparison").iter_errors(document))


def test_cli_compare_logs_json_lines_and_names_the_failing_ids(vintage_files):
    from conftest import schema_validator

    validator = schema_validator("log-line")
    env = {k: v for k, v in os.environ.items() if k != "PANELPREP_PROGRESS"}
    done = subprocess.run(
        [str(Path(sys.executable).with_name("panelprep")), "compare", "old.csv", "new.parquet",
         "-e", "firm", "-t", "year", "--max-restated-share", "0.06", "--log-json"],
        cwd=vintage_files, env=env, capture_output=True, text=True, check=False)
    assert done.returncode == 1
    records = [json.loads(line) for line in done.stderr.strip().splitlines()]
    for record in records:
        assert not list(validator.iter_errors(record)), record
    steps = [r["id"] for r in records if r["event"] == "step"]
    assert steps[:3] == ["read.old", "read.new", "compare.index"]
    assert records[-1]["event"] == "end" and records[-1]["exit_code"] == 1
    assert records[-1]["failed_by"] == ["vintage-restated-over-limit"]
    bad = _run("compare", "old.csv", "new.parquet", "-e", "firm", "-t", "year",
               "--progress", "loud", cwd=vintage_files)
    assert bad.returncode == 2 and "--progress" in bad.stderr
    text = " ".join(_run("compare", "--help", cwd=vintage_files).stdout.split())
    assert "Exit codes: 0" in text and "3 internal error" in text and "--log-json" in text


def test_cli_compare_internal_error_is_exit_3(vintage_files):
    code = ("import panelprep.compare as c\n"
            "def broken(*a, **k):\n"
            "    raise RuntimeError('planted for the test')\n"
            "c.compare_files = broken\n"
            "from panelprep.cli import main\n"
            "main()\n")
    done = subprocess.run(
        [sys.executable, "-c", code, "compare", "old.csv", "new.parquet", "-e", "firm", "-t",
         "year", "--out", "cmp"], cwd=vintage_files, capture_output=True, text=True,
        env={**os.environ, "TMPDIR": str(vintage_files)}, check=False)
    assert done.returncode == 3, done.stderr
    assert "Traceback" not in done.stderr and "internal error" in done.stderr
    assert not (vintage_files / "cmp").exists()


def test_entities_alike_in_every_value_are_not_taken_for_a_rekey():
    # two new firms with the same constant history as the gone one: nothing tells them apart
    old = pd.DataFrame({"firm": ["g"] * 4, "year": [1, 2, 3, 4], "code": 7.0})
    new = pd.DataFrame({"firm": ["n1"] * 4 + ["n2"] * 4, "year": [1, 2, 3, 4] * 2, "code": 7.0})
    result = compare_frames(old, new, "firm", "year")
    assert result.to_dict()["rekeyed"] == []
    assert finding(result, "vintage-entities-gone").count == 1


def test_the_planted_pair_agrees_with_pandas_merges(planted):
    old, new, result = planted
    doc = result.to_dict()
    # reference: pandas.merge on the key columns (outer, indicator), as in _pandas_counts
    ref = _pandas_counts(old, new, ["firm", "year"], ["sales", "capital"], 1e-9, 0.0)
    assert (doc["rows"]["removed"], doc["rows"]["added"], doc["rows"]["both"]) == (
        ref["removed"], ref["added"], ref["both"])
    removed = {int(p["period"]): p["removed"] for p in doc["by_period"] if p["removed"]}
    assert removed == ref["removed_by_period"]
    for v in ("sales", "capital"):
        for key in ("compared", "restated", "became_missing", "filled_in"):
            assert doc["variables"][v][key] == ref[v][key], (v, key)
    # the re-key: E07's old rows and X07's new rows, merged on the year, agree in every value
    pair = old[old.firm == "E07"].merge(new[new.firm == "X07"], on="year",
                                        suffixes=("_old", "_new"))
    assert len(pair) == doc["rekeyed"][0]["periods_both"]
    assert (pair.sales_old == pair.sales_new).all() and (pair.capital_old == pair.capital_new).all()
    # the unit change: new / old capital of E05, merged on the key, is 1/1000 within rounding
    e05 = old[old.firm == "E05"].merge(new[new.firm == "E05"], on=["firm", "year"],
                                       suffixes=("_old", "_new"))
    ratio = e05.capital_new / e05.capital_old
    assert np.allclose(ratio, 1e-3, rtol=1e-3)
    assert len(e05) == doc["unit_changes"][0]["cells"]
