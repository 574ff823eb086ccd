"""Cleaning policies on the small fixtures, with outcomes counted by hand.

Every expected row number below was counted from the fixture file itself
(0-based data rows, header excluded), and the reasoning is written beside it.
Each test also checks that every removed row is in the ledger with its
reason and step, and that the story lists the steps in order with rows and
entities before and after that add up.
"""

from __future__ import annotations

import itertools
from pathlib import Path

import numpy as np
import pandas as pd
from conftest import examples
from hypothesis import given, settings
from hypothesis import strategies as st

from panelprep.clean import Policies, balance_removal, singleton_removal, window_removal
from panelprep.index import build_index
from panelprep.io import ReadOptions
from panelprep.names import DEFAULT_NAMES as N
from panelprep.pipeline import load
from panelprep.prepare import PrepareOptions, prepare_frame

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
KEY = ["firm_id", "year"]


def _prepare(name, x=("capital",), transforms=("within",), time="year", **policies):
    frame, info = load(FIXTURES / name, ["firm_id"], time, ["sales", *x])
    options = PrepareOptions(entity=["firm_id"], time=time, y="sales", x=list(x),
                             transforms=list(transforms), policies=Policies(**policies))
    return frame, prepare_frame(frame, options, info)


def _dropped(frame: pd.DataFrame, prep, time: str = "year") -> pd.DataFrame:
    """The ledger as a table (also when the gate failed and no tables were built)."""
    table = prep.tables.get("dropped")
    if table is None:
        table = prep.ledger.to_frame(frame, ["firm_id", time])
    # the file numbers rows from 1; the hand counts below are 0-based positions
    table = table.rename(columns={N.reason: "reason", N.step: "step"})
    table.insert(0, "input_row", table.pop(N.row) - 1)
    return table.sort_values("input_row").reset_index(drop=True)


def _check_story(frame: pd.DataFrame, prep, kept_rows: int, time: str = "year") -> None:
    """Steps chain (each starts where the last ended), and each step's loss is in the ledger."""
    steps = prep.summary["steps"]
    assert steps, "the story lists no step"
    assert steps[0]["rows_before"] == len(frame)
    for previous, step in itertools.pairwise(steps):
        assert step["rows_before"] == previous["rows_after"], (previous, step)
    for step in steps:
        assert step["rows_after"] <= step["rows_before"]
        assert step["entities_after"] <= step["entities_before"] or step["note"], step
    assert steps[-1]["rows_after"] == kept_rows
    dropped = _dropped(frame, prep, time)
    assert (dropped["reason"].str.len() > 0).all() and (dropped["step"].str.len() > 0).all()
    per_step = dropped.groupby("step").size().to_dict()
    lost = {}
    for step in steps:
        lost[step["id"]] = lost.get(step["id"], 0) + step["rows_before"] - step["rows_after"]
    assert {k: v for k, v in lost.items() if v} == per_step
    assert len(frame) == kept_rows + len(dropped)
    # every ledger row carries the keys of the input row it names
    source = frame[["firm_id", time]].iloc[dropped["input_row"]].reset_index(drop=True)
    pd.testing.assert_frame_equal(dropped[["firm_id", time]], source)


def _cell(table: pd.DataFrame, firm: str, year) -> pd.DataFrame:
    return table[(table["firm_id"] == firm) & (table["year"] == year)]


# --- duplicates ---------------------------------------------------------------------------


def test_drop_exact_on_exact_duplicates():
    # exact_duplicates.csv, data rows 0-based:
    #   1 = 00101,2021,128.5,66.4,24 ; 2 repeats it (next line) ; 13 repeats it (near the end)
    #   12 = 00103,2023,108.1,61.4,21 ; 14 repeats it
    # The first copy stays, so rows 2, 13 and 14 go: 15 - 3 = 12 rows, 3 firms x 4 years.
    # Row 7 (00102/2022) has the numbers of 00101/2022 (row 3) but another key: it stays.
    frame, prep = _prepare("exact_duplicates.csv", duplicates="drop-exact")
    assert prep.verdict == "pass"
    dropped = _dropped(frame, prep)
    assert dropped["input_row"].tolist() == [2, 13, 14]
    assert set(dropped["reason"]) == {"exact-repeat"}
    assert list(zip(dropped["firm_id"], dropped["year"])) == [
        ("00101", 2021), ("00101", 2021), ("00103", 2023)]
    clean = prep.tables["clean"]
    assert len(clean) == 12 and not clean.duplicated(KEY).any()
    assert _cell(clean, "00102", 2022)["sales"].tolist() == [101.6]
    _check_story(frame, prep, 12)


def test_default_duplicates_policy_fails_the_gate_on_repeated_rows():
    # without a policy a preparation never drops the 3 repeated rows silently
    _, prep = _prepare("exact_duplicates.csv")
    assert prep.verdict == "fail"
    assert prep.tables == {}
    _, prep = _prepare("conflicting_duplicates.csv")
    assert prep.verdict == "fail"
    assert prep.tables == {}


# conflicting_duplicates.csv, data rows 0-based:
#   00102/2020 on rows 5 (152.6, 143.1, 34), 6 (189.9, 107.6, 44) and 13 (259.4, 101.3, 41)
#   00104/2022 on rows 17 (260.2, 170.1, 78) and 18 (291.1, 147.4, 70)
# Either policy leaves one row per key: 19 - 3 = 16 = 4 firms x 4 years.


def test_keep_first_on_conflicting_duplicates():
    frame, prep = _prepare("conflicting_duplicates.csv", x=("capital", "staff"),
                           duplicates="keep-first")
    dropped = _dropped(frame, prep)
    assert dropped["input_row"].tolist() == [6, 13, 18]
    assert set(dropped["reason"]) == {"duplicate-key-not-first"}
    clean = prep.tables["clean"]
    assert len(clean) == 16 and not clean.duplicated(KEY).any()
    assert _cell(clean, "00102", 2020)[["sales", "capital", "staff"]].values.tolist() == [
        [152.6, 143.1, 34.0]]
    assert _cell(clean, "00104", 2022)[["sales", "capital", "staff"]].values.tolist() == [
        [260.2, 170.1, 78.0]]
    _check_story(frame, prep, 16)


def test_keep_last_on_conflicting_duplicates():
    frame, prep = _prepare("conflicting_duplicates.csv", x=("capital", "staff"),
                           duplicates="keep-last")
    dropped = _dropped(frame, prep)
    assert dropped["input_row"].tolist() == [5, 6, 17]
    assert set(dropped["reason"]) == {"duplicate-key-not-last"}
    clean = prep.tables["clean"]
    assert len(clean) == 16 and not clean.duplicated(KEY).any()
    assert _cell(clean, "00102", 2020)[["sales", "capital", "staff"]].values.tolist() == [
        [259.4, 101.3, 41.0]]
    assert _cell(clean, "00104", 2022)[["sales", "capital", "staff"]].values.tolist() == [
        [291.1, 147.4, 70.0]]
    _check_story(frame, prep, 16)


def test_mean_on_conflicting_duplicates():
    # 00102/2020: sales (152.6 + 189.9 + 259.4) / 3 = 601.9 / 3, capital 352.0 / 3,
    #             staff (34 + 44 + 41) / 3 = 119 / 3; kept on its first row (5).
    # 00104/2022: sales (260.2 + 291.1) / 2 = 275.65, capital 317.5 / 2 = 158.75,
    #             staff (78 + 70) / 2 = 74; kept on row 17.
    frame, prep = _prepare("conflicting_duplicates.csv", x=("capital", "staff"),
                           duplicates="mean")
    dropped = _dropped(frame, prep)
    assert dropped["input_row"].tolist() == [6, 13, 18]
    assert set(dropped["reason"]) == {"duplicate-key-merged"}
    clean = prep.tables["clean"]
    assert len(clean) == 16 and not clean.duplicated(KEY).any()
    np.testing.assert_allclose(
        _cell(clean, "00102", 2020)[["sales", "capital", "staff"]].to_numpy(),
        [[601.9 / 3, 352.0 / 3, 119.0 / 3]], rtol=1e-12)
    np.testing.assert_allclose(
        _cell(clean, "00104", 2022)[["sales", "capital", "staff"]].to_numpy(),
        [[275.65, 158.75, 74.0]], rtol=1e-12)
    # rows without a conflict keep their values exactly
    assert _cell(clean, "00102", 2019)["sales"].tolist() == [155.6]
    _check_story(frame, prep, 16)


# --- ids ----------------------------------------------------------------------------------


def test_trim_fold_merges_lookalike_ids_into_three_balanced_firms():
    # lookalike_ids.csv: A12 (2019, 2020), a12 (2021), " A12 " (2022) -> one firm over
    # 2019-2022; B07 (2019, 2020), "B07 " (2021, 2022) -> one firm; C33 (2019-2022).
    # 3 firms x 4 years, nothing removed.  Each merged id is written in its most frequent
    # trimmed spelling: A12 (3 rows once " A12 " is trimmed) beats a12 (1 row), B07 has 4.
    # Rows whose id text changed: " A12 ", a12, and the two "B07 " rows = 4.
    frame, prep = _prepare("lookalike_ids.csv", normalise_ids="trim-fold")
    clean = prep.tables["clean"]
    assert sorted(clean["firm_id"].unique()) == ["A12", "B07", "C33"]
    assert prep.summary["steps"][0]["note"].startswith("4 ")
    assert clean.groupby("firm_id")["year"].apply(sorted).tolist() == [[2019, 2020, 2021, 2022]] * 3
    assert prep.summary["panel"]["balanced"] is True
    assert prep.summary["panel"]["entities"] == 3
    assert len(prep.tables["dropped"]) == 0
    _check_story(frame, prep, 12)


def test_trim_alone_keeps_case_apart():
    # trimming only: " A12 " -> A12 and "B07 " -> B07, but a12 stays its own firm, with one
    # row (2021): A12 (2019, 2020, 2022), a12, B07, C33 = 4 firms, a12 a singleton.
    frame, prep = _prepare("lookalike_ids.csv", normalise_ids="trim")
    clean = prep.tables["clean"]
    assert clean.groupby("firm_id").size().to_dict() == {"A12": 3, "B07": 4, "C33": 4, "a12": 1}
    assert prep.summary["panel"]["balanced"] is False
    assert prep.summary["panel"]["singleton_entities"] == 1
    _check_story(frame, prep, 12)


def test_id_normalisation_step_reports_entities_before_and_after():
    # 6 ids as written (A12, a12, " A12 ", B07, "B07 ", C33) become 3 after trim-fold
    _, prep = _prepare("lookalike_ids.csv", normalise_ids="trim-fold")
    step = prep.summary["steps"][0]
    assert step["step"].startswith("normalise entity ids")
    assert (step["rows_before"], step["rows_after"]) == (12, 12)
    assert (step["entities_before"], step["entities_after"]) == (6, 3)


# --- singletons ---------------------------------------------------------------------------


def test_drop_singletons():
    # singletons.csv: 00103 (row 8, 2019), 00104 (row 9, 2021) and 00106 (row 12, 2020)
    # have one row each; 00101, 00102 (4 rows each) and 00105 (2 rows) stay: 10 rows.
    frame, prep = _prepare("singletons.csv", singletons="drop")
    dropped = _dropped(frame, prep)
    assert dropped["input_row"].tolist() == [8, 9, 12]
    assert dropped["firm_id"].tolist() == ["00103", "00104", "00106"]
    assert set(dropped["reason"]) == {"singleton"}
    clean = prep.tables["clean"]
    assert sorted(clean["firm_id"].unique()) == ["00101", "00102", "00105"]
    step = prep.summary["steps"][-1]
    assert (step["rows_before"], step["rows_after"]) == (13, 10)
    assert (step["entities_before"], step["entities_after"]) == (6, 3)
    _check_story(frame, prep, 10)


def test_kept_singletons_stay_in_clean_and_leave_only_the_within_file():
    frame, prep = _prepare("singletons.csv", transforms=("within", "quasi"))
    assert len(prep.tables["clean"]) == 13 and len(prep.tables["quasi"]) == 13
    assert len(prep.tables["within"]) == 10
    assert prep.summary["transforms"]["within"]["singletons_dropped"] == 3
    assert prep.summary["transforms"]["within"]["entities_absorbed"] == 3
    _check_story(frame, prep, 13)


def _chain_panel() -> pd.DataFrame:
    """Four firms over years 1-3, plus a chain that unravels only when periods count too.

    Built by hand: A, B, F, G observe 1, 2, 3; C observes 3 and 4; E observes 4 and 5.
    No firm has one row, so dropping entity singletons alone removes nothing.  With
    period singletons as well: year 5 has one row (E/5) -> drop it; now E has one row
    (E/4) -> drop it; now year 4 has one row (C/4) -> drop it; now C has one row (C/3)
    -> drop it; year 3 still has A, B, F, G.  A single pass would stop after E/5.
    """
    rows = [(f, t) for f in "ABFG" for t in (1, 2, 3)] + [("C", 3), ("C", 4), ("E", 4), ("E", 5)]
    rng = np.random.default_rng(7)
    frame = pd.DataFrame(rows, columns=["firm_id", "year"])
    frame["sales"] = rng.normal(100.0, 10.0, len(frame))
    frame["capital"] = rng.normal(50.0, 5.0, len(frame))
    return frame.iloc[rng.permutation(len(frame))].reset_index(drop=True)


def test_singleton_fixed_point_when_periods_are_absorbed():
    frame = _chain_panel()
    chain = {("C", 3), ("C", 4), ("E", 4), ("E", 5)}
    options = PrepareOptions(entity=["firm_id"], time="year", y="sales", x=["capital"],
                             transforms=["within", "twoway"],
                             policies=Policies(singletons="drop"))
    prep = prepare_frame(frame, options)
    dropped = _dropped(frame, prep)
    assert set(zip(dropped["firm_id"], dropped["year"])) == chain
    assert set(dropped["reason"]) == {"singleton"}
    clean = prep.tables["clean"]
    assert len(clean) == 12 and sorted(clean["firm_id"].unique()) == list("ABFG")
    assert len(prep.tables["twoway"]) == 12
    step = prep.summary["steps"][-1]
    assert (step["rows_before"], step["rows_after"]) == (16, 12)
    assert (step["entities_before"], step["entities_after"]) == (6, 4)
    _check_story(frame, prep, 12)


def test_singletons_without_periods_leave_the_chain():
    frame = _chain_panel()
    options = PrepareOptions(entity=["firm_id"], time="year", y="sales", x=["capital"],
                             transforms=["within"], policies=Policies(singletons="drop"))
    prep = prepare_frame(frame, options)
    assert len(prep.tables["dropped"]) == 0
    assert len(prep.tables["clean"]) == 16


def test_singleton_removal_iterates_directly():
    frame = _chain_panel()
    index = build_index(frame, ["firm_id"], "year")
    alive = np.ones(len(frame), dtype=bool)
    removal = singleton_removal(index, alive, with_periods=True)
    gone = set(zip(frame["firm_id"][removal.mask], frame["year"][removal.mask]))
    assert gone == {("C", 3), ("C", 4), ("E", 4), ("E", 5)}
    assert singleton_removal(index, alive, with_periods=False) is None
    # rows already dead are neither counted nor removed again
    not_e5 = ~((frame["firm_id"] == "E") & (frame["year"] == 5)).to_numpy()
    again = singleton_removal(index, alive & not_e5, with_periods=True)
    assert not (again.mask & ~not_e5).any()
    assert again.mask.sum() == 3


# --- balance and window -------------------------------------------------------------------

# unbalanced.csv, data rows 0-based: 00101 rows 0-5 (2015-2020), 00102 rows 6-9 (2017-2020),
# 00103 rows 10-13 (2015-2018), 00104 rows 14-17 (2016-2019).


def test_complete_entities_on_unbalanced():
    # only 00101 covers the whole span 2015-2020; rows 6-17 go, 6 rows of 1 firm remain
    frame, prep = _prepare("unbalanced.csv", balance="complete-entities")
    dropped = _dropped(frame, prep)
    assert dropped["input_row"].tolist() == list(range(6, 18))
    assert set(dropped["reason"]) == {"unbalanced"}
    step = prep.summary["steps"][-1]
    assert (step["rows_before"], step["rows_after"]) == (18, 6)
    assert (step["entities_before"], step["entities_after"]) == (4, 1)
    assert prep.summary["sample"]["rows"] == 6
    _check_story(frame, prep, 6)
    index = build_index(frame, ["firm_id"], "year")
    mask = balance_removal(index, np.ones(len(frame), dtype=bool), "complete-entities").mask
    assert np.flatnonzero(mask).tolist() == list(range(6, 18))


def test_largest_block_on_unbalanced():
    # Rows kept = firms covering a block x its length, over every block [a, b]:
    #   2015-2020: 00101 -> 6      2017-2018: all four -> 8     2018-2019: 01, 02, 04 -> 6
    #   2016-2018: 01, 03, 04 -> 9  2017-2019: 01, 02, 04 -> 9   any 4-year block: 2 firms -> 8
    # The best is 9 rows, reached by two blocks (a tie):
    #   2016-2018 with 00101, 00103, 00104 keeps rows 1-3, 11-13, 14-16;
    #   2017-2019 with 00101, 00102, 00104 keeps rows 2-4, 6-8, 15-17.
    blocks = {
        (2016, 2018): ({"00101", "00103", "00104"}, [1, 2, 3, 11, 12, 13, 14, 15, 16]),
        (2017, 2019): ({"00101", "00102", "00104"}, [2, 3, 4, 6, 7, 8, 15, 16, 17]),
    }
    frame, prep = _prepare("unbalanced.csv", balance="largest-block")
    clean = prep.tables["clean"]
    span = (int(clean["year"].min()), int(clean["year"].max()))
    assert span in blocks
    firms, kept = blocks[span]
    assert set(clean["firm_id"]) == firms and len(clean) == 9
    # balanced: every kept firm in every year of the block
    assert clean.groupby("firm_id")["year"].apply(sorted).tolist() == [
        list(range(span[0], span[1] + 1))] * 3
    dropped = _dropped(frame, prep)
    assert dropped["input_row"].tolist() == sorted(set(range(18)) - set(kept))
    assert set(dropped["reason"]) == {"unbalanced"}
    assert f"{span[0]} to {span[1]}" in prep.summary["steps"][-1]["step"]
    _check_story(frame, prep, 9)


def test_window_filter():
    # keep 2017-2018: outside are 00101 rows 0, 1 (2015, 2016) and 4, 5 (2019, 2020),
    # 00102 rows 8, 9 (2019, 2020), 00103 rows 10, 11 (2015, 2016), 00104 rows 14 (2016)
    # and 17 (2019); 8 rows remain, every firm in both years.
    frame, prep = _prepare("unbalanced.csv", window=("2017", "2018"))
    dropped = _dropped(frame, prep)
    assert dropped["input_row"].tolist() == [0, 1, 4, 5, 8, 9, 10, 11, 14, 17]
    assert set(dropped["reason"]) == {"outside-window"}
    assert prep.summary["steps"][0]["rows_after"] == 8
    assert prep.summary["panel"]["balanced"] is True
    _check_story(frame, prep, 8)


def test_window_with_an_open_end():
    # from 2019 on: 00101 2019, 2020; 00102 2019, 2020; 00104 2019 = 5 rows, 00103 gone
    frame, prep = _prepare("unbalanced.csv", window=("2019", None))
    clean = prep.tables["clean"]
    assert len(clean) == 5 and set(clean["firm_id"]) == {"00101", "00102", "00104"}
    step = prep.summary["steps"][0]
    assert (step["entities_before"], step["entities_after"]) == (4, 3)
    _check_story(frame, prep, 5)


def test_window_on_quarter_labels():
    # quarters.csv: 00101 rows 0-5 (2021Q1-2022Q2), 00102 rows 6-10 (2021Q1-Q3, 2022Q1-Q2),
    # 00103 rows 11-16. Keeping 2021Q2-2022Q1 drops each firm's 2021Q1 and 2022Q2:
    # rows 0, 5, 6, 10, 11, 16; 11 rows remain.
    frame, prep = _prepare("quarters.csv", time="quarter", window=("2021Q2", "2022Q1"))
    dropped = _dropped(frame, prep, "quarter")
    assert dropped["input_row"].tolist() == [0, 5, 6, 10, 11, 16]
    assert set(dropped["quarter"]) == {"2021Q1", "2022Q2"}
    _check_story(frame, prep, 11, "quarter")


def test_window_then_complete_entities_uses_the_window():
    # window 2016-2019 drops rows 0 (00101 2015), 5 (00101 2020), 9 (00102 2020) and
    # 10 (00103 2015); complete over 2016-2019 are 00101 and 00104 only, so 00102 (rows 6-8)
    # and 00103 (rows 11-13) go as unbalanced: 8 rows of 2 firms remain.
    frame, prep = _prepare("unbalanced.csv", window=("2016", "2019"), balance="complete-entities")
    dropped = _dropped(frame, prep)
    by_reason = dropped.groupby("reason")["input_row"].apply(sorted).to_dict()
    assert by_reason == {"outside-window": [0, 5, 9, 10], "unbalanced": [6, 7, 8, 11, 12, 13]}
    assert prep.summary["steps"][0]["step"] == "keep periods 2016 to 2019"
    assert prep.summary["steps"][-1]["entities_after"] == 2
    _check_story(frame, prep, 8)


def test_window_between_grid_points_of_a_stepped_integer_axis():
    # waves every two years (1990, 1992, 1994, 1996): a window 1991-1995 holds 1992 and
    # 1994 only; 1990 lies before its first label and 1996 after its last
    frame = pd.DataFrame({"firm_id": ["a"] * 4 + ["b"] * 4, "year": [1990, 1992, 1994, 1996] * 2,
                          "sales": np.arange(8.0)})
    index = build_index(frame, ["firm_id"], "year")
    assert (index.axis.freq, index.axis.step) == ("int", 2)
    removal = window_removal(index, ("1991", "1995"))
    assert sorted(set(frame["year"][~removal.mask])) == [1992, 1994]
    assert window_removal(index, ("1992", "1994")).mask.sum() == 4


def _text_panel(stray: str | None) -> pd.DataFrame:
    """Three firms over 2001-2003, sales held as text (as read with a declared token).

    a/2001 is written twice with different sales (1.5, 2.5) and capital (2, 3); a/2002 holds
    the token ``n/a``; ``stray``, when given, replaces b/2002's sales.
    """
    sales = ["1.5", "2.5", "n/a", "3", "1", stray or "2", "4", "1", "5", "4"]
    return pd.DataFrame({
        "firm_id": ["a", "a", "a", "a", "b", "b", "b", "c", "c", "c"],
        "year": [2001, 2001, 2002, 2003, 2001, 2002, 2003, 2001, 2002, 2003],
        "sales": pd.array(sales, dtype="str"),
        "capital": [2.0, 3.0, 4.0, 5.0, 1.0, 2.0, 3.0, 1.0, 2.0, 7.0],
    })


def test_mean_on_a_text_column_with_declared_missing_tokens():
    # the a/2001 pair merges to sales (1.5 + 2.5) / 2 = 2.0 and capital 2.5 on row 0; row 1 goes
    # as merged, row 2 (a/2002, "n/a") goes by listwise deletion: 10 - 2 = 8 rows
    frame = _text_panel(None)
    options = PrepareOptions(entity=["firm_id"], time="year", y="sales", x=["capital"],
                             transforms=["within"], policies=Policies(duplicates="mean"))
    prep = prepare_frame(frame, options, read_options=ReadOptions(missing_tokens=("n/a",)))
    assert prep.verdict == "pass"
    clean = prep.tables["clean"]
    assert _cell(clean, "a", 2001)[["sales", "capital"]].values.tolist() == [[2.0, 2.5]]
    dropped = _dropped(frame, prep)
    assert dropped[["input_row", "reason"]].values.tolist() == [
        [1, "duplicate-key-merged"], [2, "listwise-missing"]]
    _check_story(frame, prep, 8)


def test_mean_leaves_stray_text_to_the_audit():
    # "12%" in b/2002 is not a number: the merge must not turn it into a silent gap
    frame = _text_panel("12%")
    options = PrepareOptions(entity=["firm_id"], time="year", y="sales", x=["capital"],
                             transforms=["within"], policies=Policies(duplicates="mean"))
    prep = prepare_frame(frame, options, read_options=ReadOptions(missing_tokens=("n/a",)))
    assert prep.verdict == "fail"
    assert "values-not-numeric" in {f.id for f in prep.audit.findings}


@settings(max_examples=examples(40), deadline=None)
@given(seed=st.integers(0, 2**31 - 1))
def test_largest_block_is_the_best_block_by_brute_force(seed):
    # Brute force over every block [a, b] of years: the firms observed in every year of it,
    # times its length; the policy must keep exactly a best block's rows.
    rng = np.random.default_rng(seed)
    n_firms, n_years = int(rng.integers(1, 7)), int(rng.integers(1, 8))
    present = rng.random((n_firms, n_years)) < 0.7
    firms, years = np.nonzero(present)
    if len(firms) == 0:
        return
    frame = pd.DataFrame({"firm_id": [f"f{i}" for i in firms], "year": 2000 + years})
    frame = frame.iloc[rng.permutation(len(frame))].reset_index(drop=True)
    observed = frame.groupby("firm_id")["year"].apply(set).to_dict()
    first, last = int(frame["year"].min()), int(frame["year"].max())
    best = 0
    for a in range(first, last + 1):
        for b in range(a, last + 1):
            block = set(range(a, b + 1))
            best = max(best, sum(block <= seen for seen in observed.values()) * len(block))
    # the frequency is given: two years three apart could also be read as a grid of step 3
    index = build_index(frame, ["firm_id"], "year", freq="year")
    removal = balance_removal(index, np.ones(len(frame), dtype=bool), "largest-block")
    kept = frame if removal is None else frame[~removal.mask]
    assert len(kept) == best
    # what is kept is balanced: each kept firm has every year of the kept span
    span = set(range(int(kept["year"].min()), int(kept["year"].max()) + 1))
    assert all(set(g) == span for _, g in kept.groupby("firm_id")["year"])
