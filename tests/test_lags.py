"""Gap-aware lags, leads and differences against a direct pandas computation.

The reference (outside the project, plain pandas) puts every entity on the
full period grid with ``MultiIndex.from_product`` + ``reindex``, shifts within
each entity with ``groupby(...).shift(k)`` and reads the result back at each
row's own (entity, period).  On the full grid "k rows back" is "k periods
back", so a gap gives a missing value and a shift never crosses entities.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from conftest import examples
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from panelprep.errors import InputError
from panelprep.index import build_index
from panelprep.lags import Shift, add_shifts, parse_shifts, shifted_values

SETTINGS = settings(max_examples=examples(30), deadline=None,
                    suppress_health_check=[HealthCheck.too_slow])


def _random_panel(seed: int, quarterly: bool, two_part_key: bool) -> tuple[pd.DataFrame, list]:
    """Unbalanced panel with gaps, shuffled rows; returns the frame and the full grid.

    Each entity keeps a random subset of the grid (at least one period), so
    interior gaps, different spans and singletons all occur.  With
    ``two_part_key`` the entity is (region, firm) and the same firm code
    appears in two regions, so a shift that ignored a key part would be caught.
    """
    rng = np.random.default_rng(seed)
    n_periods = int(rng.integers(3, 10))
    if quarterly:
        grid = [str(p) for p in pd.period_range("2019Q3", periods=n_periods, freq="Q")]
    else:
        grid = list(range(2001, 2001 + n_periods))
    if two_part_key:
        entities = [(r, f) for r in ("north", "south") for f in ("07", "11", "23")]
    else:
        entities = [(f"{i:03d}",) for i in range(int(rng.integers(2, 8)))]
    rows = []
    for key in entities:
        present = rng.random(n_periods) < 0.6
        present[rng.integers(n_periods)] = True
        rows += [(*key, grid[t]) for t in np.flatnonzero(present)]
    names = ["region", "firm"] if two_part_key else ["firm"]
    time = "quarter" if quarterly else "year"
    frame = pd.DataFrame(rows, columns=[*names, time])
    frame["sales"] = rng.normal(100.0, 20.0, len(frame)).round(3)
    # a missing value must stay a missing lag, not be skipped over
    frame.loc[rng.random(len(frame)) < 0.1, "sales"] = np.nan
    frame = frame.iloc[rng.permutation(len(frame))].reset_index(drop=True)
    return frame, grid


def _reference_shift(frame: pd.DataFrame, entity: list[str], time: str, grid: list,
                     column: str, k: int) -> np.ndarray:
    """Value of ``column`` k periods earlier (k < 0: later) for the same entity, by pandas."""
    ent = frame[entity].astype(str).agg("|".join, axis=1)
    series = pd.Series(frame[column].to_numpy(), index=pd.MultiIndex.from_arrays(
        [ent, frame[time]], names=["entity", "period"]))
    full = pd.MultiIndex.from_product([sorted(ent.unique()), grid], names=["entity", "period"])
    on_grid = series.reindex(full)
    shifted = on_grid.groupby(level="entity").shift(k)
    return shifted.reindex(series.index).to_numpy(dtype=np.float64)


@SETTINGS
@given(seed=st.integers(0, 2**32 - 1), quarterly=st.booleans(), two_part_key=st.booleans(),
       k=st.integers(1, 4))
def test_lag_lead_diff_match_full_grid_reindex(seed, quarterly, two_part_key, k):
    frame, grid = _random_panel(seed, quarterly, two_part_key)
    entity = ["region", "firm"] if two_part_key else ["firm"]
    time = "quarter" if quarterly else "year"
    index = build_index(frame, entity, time)
    assert index.n_periods <= len(grid)
    shifts = [Shift("sales", k, "lag"), Shift("sales", k, "lead"), Shift("sales", k, "diff")]
    lag = _reference_shift(frame, entity, time, grid, "sales", k)
    lead = _reference_shift(frame, entity, time, grid, "sales", -k)
    if np.isnan(lag).all() or np.isnan(lead).all():
        # a shift that finds no value anywhere is refused, not an all-missing column
        with pytest.raises(InputError, match="would be missing on every row"):
            add_shifts(frame, index, shifts)
        return
    out = add_shifts(frame, index, shifts)
    np.testing.assert_array_equal(out[f"sales_lag{k}"].to_numpy(), lag)
    np.testing.assert_array_equal(out[f"sales_lead{k}"].to_numpy(), lead)
    np.testing.assert_allclose(out[f"sales_diff{k}"].to_numpy(), frame["sales"] - lag,
                               rtol=0, atol=1e-12)
    # the input columns are untouched and the row order is the input's
    pd.testing.assert_frame_equal(out[frame.columns], frame)


def test_gap_gives_missing_not_the_previous_row():
    # Hand example: firm a at 2001, 2002, 2004 (2003 absent); firm b at 2003, 2004.
    # Sorted by (firm, year), the row before b/2003 is a/2004 and the row before
    # a/2004 is a/2002: neither may be used as a one-period lag.
    frame = pd.DataFrame({
        "firm": ["b", "a", "a", "b", "a"],
        "year": [2004, 2002, 2004, 2003, 2001],
        "x": [40.0, 2.0, 4.0, 30.0, 1.0],
    })
    index = build_index(frame, ["firm"], "year")
    out = add_shifts(frame, index, [*parse_shifts("lag", "x:1,x:2"), *parse_shifts("lead", "x"),
                                    *parse_shifts("diff", "x")])
    # rows:            b/2004  a/2002  a/2004  b/2003  a/2001
    expected_lag1 = [30.0, 1.0, np.nan, np.nan, np.nan]
    expected_lag2 = [np.nan, np.nan, 2.0, np.nan, np.nan]
    expected_lead1 = [np.nan, np.nan, np.nan, 40.0, 2.0]
    expected_diff1 = [10.0, 1.0, np.nan, np.nan, np.nan]
    np.testing.assert_array_equal(out["x_lag1"], expected_lag1)
    np.testing.assert_array_equal(out["x_lag2"], expected_lag2)
    np.testing.assert_array_equal(out["x_lead1"], expected_lead1)
    np.testing.assert_array_equal(out["x_diff1"], expected_diff1)


def test_quarterly_lag_crosses_the_year_end_but_not_a_missing_quarter():
    # 2021Q4 -> 2022Q1 is one quarter; for firm b, 2021Q4 is absent, so its
    # 2022Q1 lag is missing and its 2022Q2 lag2 is 2021Q4's absence too.
    frame = pd.DataFrame({
        "firm": ["a", "a", "a", "b", "b", "b"],
        "quarter": ["2021Q3", "2021Q4", "2022Q1", "2021Q3", "2022Q1", "2022Q2"],
        "x": [1.0, 2.0, 3.0, 10.0, 30.0, 40.0],
    })
    index = build_index(frame, ["firm"], "quarter")
    assert index.axis.freq == "quarter"
    lag1 = shifted_values(index, frame["x"].to_numpy(), 1)
    lag2 = shifted_values(index, frame["x"].to_numpy(), 2)
    np.testing.assert_array_equal(lag1, [np.nan, 1.0, 2.0, np.nan, np.nan, 30.0])
    np.testing.assert_array_equal(lag2, [np.nan, np.nan, 1.0, np.nan, 10.0, np.nan])


def test_rows_without_a_key_get_no_shift_and_are_no_target():
    # the row with a missing year sits between a/2001 and a/2002 in file order
    frame = pd.DataFrame({"firm": ["a", "a", "a"], "year": pd.array([2001, None, 2002],
                                                                   dtype="Int64"),
                          "x": [1.0, 99.0, 2.0]})
    index = build_index(frame, ["firm"], "year")
    lag = shifted_values(index, frame["x"].to_numpy(), 1)
    np.testing.assert_array_equal(lag, [np.nan, np.nan, 1.0])


def test_distance_beyond_the_grid_is_all_missing():
    frame = pd.DataFrame({"firm": ["a", "a", "b"], "year": [2001, 2002, 2001],
                          "x": [1.0, 2.0, 3.0]})
    index = build_index(frame, ["firm"], "year")
    assert np.isnan(shifted_values(index, frame["x"].to_numpy(), 5)).all()
    assert np.isnan(shifted_values(index, frame["x"].to_numpy(), -5)).all()


def test_parse_shifts():
    assert parse_shifts("lag", "sales:2, capital") == [Shift("sales", 2, "lag"),
                                                       Shift("capital", 1, "lag")]
    assert parse_shifts("diff", None) == []
    assert [s.name for s in parse_shifts("lead", ["sales:3"])] == ["sales_lead3"]
    for bad in ("sales:0", "sales:-1", "sales:x"):
        with pytest.raises(InputError):
            parse_shifts("lag", bad)


def test_add_shifts_refuses_bad_columns():
    frame = pd.DataFrame({"firm": ["a", "a"], "year": [2001, 2002], "x": [1.0, 2.0],
                          "label": ["p", "q"], "x_lag1": [0.0, 0.0]})
    index = build_index(frame, ["firm"], "year")
    with pytest.raises(InputError, match="no such column"):
        add_shifts(frame, index, [Shift("missing", 1, "lag")])
    with pytest.raises(InputError, match="already exists"):
        add_shifts(frame, index, [Shift("x", 1, "lag")])
    with pytest.raises(InputError, match="are not numbers"):
        add_shifts(frame, index, [Shift("label", 1, "lag")])
