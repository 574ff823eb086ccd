"""Period grids: frequency inference, ordinals, labels, off-grid values, parse errors."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest
from statsmodels.datasets import grunfeld

from panelprep.errors import TimeParseError
from panelprep.timeaxis import build_time_axis


def axis_of(values, freq=None):
    return build_time_axis(pd.Series(values), freq=freq, column="when")


def steps(axis) -> list[int]:
    """Differences between the ordinals of the distinct values, in order of value."""
    return np.diff(np.unique(axis.ordinal[~axis.missing])).tolist()


def test_integer_years():
    axis = axis_of([2001, 2002, 2003, 2001])
    assert axis.name == "year" and axis.inferred
    assert axis.label(axis.ordinal) == ["2001", "2002", "2003", "2001"]
    assert not axis.off_grid.any()


def test_float_years_from_statsmodels_grunfeld():
    # statsmodels ships the Grunfeld years as floats (1935.0 ... 1954.0)
    years = grunfeld.load_pandas().data["year"]
    assert years.dtype == np.float64
    axis = build_time_axis(years, column="year")
    assert axis.name == "year"
    assert sorted(set(axis.label(axis.ordinal))) == [str(y) for y in range(1935, 1955)]
    assert steps(axis) == [1] * 19


def test_non_whole_float_period_names_row_and_value():
    with pytest.raises(TimeParseError, match=r"'when'.*2001\.5.*row 3"):
        axis_of([2000.0, 2001.0, 2001.5])


def test_integer_step_two():
    axis = axis_of([1990, 1992, 1994, 1996] * 2)
    assert axis.name == "int:2"
    assert steps(axis) == [1, 1, 1]
    assert axis.label([0, 3]) == ["1990", "1996"]


def test_small_integer_waves():
    axis = axis_of([1, 2, 3, 5])
    assert axis.name == "int:1"
    assert axis.label(axis.ordinal) == ["1", "2", "3", "5"]


def test_odd_year_in_a_two_yearly_panel_is_off_grid():
    # 10 units observed every other year, one row dated in between
    values = [2000, 2002, 2004, 2006] * 10 + [2003]
    axis = axis_of(values)
    assert axis.name == "int:2"
    assert np.flatnonzero(axis.off_grid).tolist() == [40]
    # placed in the period that contains it: the one starting 2002
    assert axis.label(axis.ordinal[[40]]) == ["2002"]


def test_given_freq_year_keeps_every_year():
    axis = axis_of([2000, 2002, 2004], freq="year")
    assert axis.name == "year" and not axis.inferred
    assert steps(axis) == [2, 2]


@pytest.mark.parametrize("labels", [
    ["2021Q3", "2021Q4", "2022Q1"],
    ["2021-Q3", "2021-Q4", "2022-Q1"],
    ["2021 q3", "2021 q4", "2022 q1"],
])
def test_quarter_strings_run_across_the_year_end(labels):
    axis = axis_of(labels)
    assert axis.name == "quarter"
    assert steps(axis) == [1, 1]
    assert axis.label(axis.ordinal) == ["2021Q3", "2021Q4", "2022Q1"]


@pytest.mark.parametrize("labels", [
    ["2021-11", "2021-12", "2022-01"],
    ["2021M11", "2021M12", "2022M01"],
    ["2021/11", "2021/12", "2022/1"],
])
def test_month_strings_run_across_the_year_end(labels):
    axis = axis_of(labels)
    assert axis.name == "month"
    assert steps(axis) == [1, 1]
    assert axis.label(axis.ordinal) == ["2021-11", "2021-12", "2022-01"]


def test_no_such_month_names_row_and_value():
    with pytest.raises(TimeParseError, match=r"'when'.*2021-13.*row 2"):
        axis_of(["2021-12", "2021-13"])


def test_week_strings_follow_iso_weeks():
    axis = axis_of(["2020-W52", "2020-W53", "2021-W01", "2021W02"])
    assert axis.name == "week"
    # ISO 2020 has 53 weeks, so W53 is followed directly by 2021-W01 (Python's calendar)
    assert steps(axis) == [1, 1, 1]
    # week labels are shown as week labels (written one way), not as their Mondays
    assert axis.label(axis.ordinal) == ["2020-W52", "2020-W53", "2021-W01", "2021-W02"]
    # the same weeks written as their Mondays (Python's calendar) are shown as dates
    mondays = [dt.date.fromisocalendar(y, w, 1).isoformat()
               for y, w in ((2020, 52), (2020, 53), (2021, 1), (2021, 2))]
    as_dates = axis_of(mondays)
    assert as_dates.name == "week" and as_dates.ordinal.tolist() == axis.ordinal.tolist()
    assert as_dates.label(as_dates.ordinal) == mondays


def test_mixed_kinds_of_label_are_an_error():
    with pytest.raises(TimeParseError, match=r"'when'.*2021-03.*row 2"):
        axis_of(["2021Q1", "2021-03"])


def test_unreadable_text_names_column_row_and_value():
    with pytest.raises(TimeParseError, match=r"'when'.*'soon'.*row 3"):
        axis_of(["2021-01-31", "2021-02-28", "soon"])


def test_month_end_dates_with_mid_month_dates_off_grid():
    dates = list(pd.date_range("2021-01-31", periods=6, freq="ME").strftime("%Y-%m-%d"))
    values = dates * 3
    values[8] = "2021-03-15"   # instead of 2021-03-31
    values[16] = "2021-05-14"  # instead of 2021-05-31
    axis = axis_of(values)
    assert axis.name == "month"
    assert np.flatnonzero(axis.off_grid).tolist() == [8, 16]
    assert axis.label(axis.ordinal[[8, 16]]) == ["2021-03", "2021-05"]
    assert len(np.unique(axis.ordinal)) == 6


@pytest.mark.parametrize(("start", "freq", "name"), [
    ("2021-01-01", "MS", "month"),
    ("2021-03-31", "QE", "quarter"),
    ("2021-01-01", "QS", "quarter"),
    ("2015-12-31", "YE", "year"),
    ("2021-01-04", "W-MON", "week"),
    ("2021-01-03", "W-SUN", "week"),
    ("2021-01-30", "D", "day"),
])
def test_date_frequencies(start, freq, name):
    stamps = pd.date_range(start, periods=8, freq=freq)
    axis = build_time_axis(pd.Series(stamps), column="when")
    assert axis.name == name
    assert steps(axis) == [1] * 7
    assert not axis.off_grid.any()


@pytest.mark.parametrize("weekday", ["W-MON", "W-WED", "W-SUN"])
def test_week_labels_lie_inside_their_week(weekday):
    stamps = pd.date_range("2021-01-01", periods=5, freq=weekday)
    axis = build_time_axis(pd.Series(stamps), column="when")
    labels = pd.to_datetime(axis.label(axis.ordinal))
    # the label is the Monday of the ISO week that holds the date (Python's calendar)
    assert all(label.date() == dt.date.fromisocalendar(*s.isocalendar()[:2], 1)
               for label, s in zip(labels, stamps))
    assert all(0 <= (s - label).days < 7 for label, s in zip(labels, stamps))


def test_off_grid_weekday_goes_in_the_week_that_holds_it():
    # a Sunday panel with one Wednesday: its period's label (a Monday) must lie in the
    # 7 days up to and including that Wednesday, like every other row's
    stamps = list(pd.date_range("2021-01-03", periods=6, freq="W-SUN")) * 3
    stamps.append(pd.Timestamp("2021-01-13"))
    axis = build_time_axis(pd.Series(stamps), column="when")
    assert axis.name == "week"
    assert np.flatnonzero(axis.off_grid).tolist() == [18]
    labels = pd.to_datetime(axis.label(axis.ordinal))
    assert all(0 <= (s - label).days < 7 for label, s in zip(labels, stamps))


def test_business_days_are_daily():
    axis = build_time_axis(pd.Series(pd.bdate_range("2021-01-01", periods=30)), column="when")
    assert axis.name == "day"
    assert set(steps(axis)) == {1, 3}  # weekends are holes, not a different grid


def test_time_of_day_off_the_common_one_is_off_grid():
    stamps = pd.Series(pd.to_datetime(["2021-01-01", "2021-01-02", "2021-01-03 12:00"],
                                      format="ISO8601"))
    axis = build_time_axis(stamps, column="when")
    assert axis.off_grid.tolist() == [False, False, True]


def test_time_zone_aware_dates_keep_their_local_calendar_date():
    stamps = pd.Series(pd.date_range("2021-01-31", periods=4, freq="ME", tz="Europe/Berlin"))
    axis = build_time_axis(stamps, column="when")
    assert axis.name == "month"
    assert axis.label(axis.ordinal) == ["2021-01", "2021-02", "2021-03", "2021-04"]
    # midnight on New Year's Day in Berlin is still that year (in UTC it is the year before)
    stamps = pd.Series(pd.date_range("2015-01-01", periods=3, freq="YS", tz="Europe/Berlin"))
    axis = build_time_axis(stamps, column="when")
    assert axis.label(axis.ordinal) == ["2015", "2016", "2017"]


def test_date_texts_across_a_daylight_saving_change():
    texts = ["2021-01-31T00:00+01:00", "2021-02-28T00:00+01:00", "2021-03-31T00:00+02:00",
             "2021-04-30T00:00+02:00"]
    axis = axis_of(texts)
    assert axis.name == "month"
    assert axis.label(axis.ordinal) == ["2021-01", "2021-02", "2021-03", "2021-04"]


def test_given_freq_overrides_inference():
    axis = axis_of(pd.date_range("2021-01-01", periods=60, freq="D"), freq="month")
    assert axis.name == "month"
    assert axis.label(np.unique(axis.ordinal)) == ["2021-01", "2021-02", "2021-03"]


@pytest.mark.parametrize(("values", "freq"), [
    ([2001, 2002], "quarter"),
    (pd.date_range("2021-01-01", periods=3), "int"),
    (["2021Q1", "2021Q2"], "month"),
    ([2001, 2002], "fortnight"),
])
def test_impossible_freq_is_an_error(values, freq):
    with pytest.raises(TimeParseError):
        axis_of(values, freq=freq)


def test_missing_and_blank_values_are_missing_not_errors():
    axis = axis_of(["2021Q1", None, " ", "2021Q2"])
    assert axis.missing.tolist() == [False, True, True, False]
    assert axis.name == "quarter"
    axis = axis_of([2001.0, np.nan, 2003.0])
    assert axis.missing.tolist() == [False, True, False]


def test_true_false_is_not_a_period():
    with pytest.raises(TimeParseError, match="true/false"):
        axis_of([True, False])


@pytest.mark.parametrize("values", [
    ["2000.5", "2001.5", "2002.5", "2003.5"],        # pandas reads these as dates in May
    ["2021.1", "2021.2", "2021.3", "2021.4", "2022.1"],  # and these as months
    ["2001.0", "2002.0", "2002.25"],
])
@pytest.mark.parametrize("freq", [None, "month", "quarter", "day"])
def test_decimal_fractions_are_never_dates_or_months(values, freq):
    with pytest.raises(TimeParseError, match=r"'20\d\d\.\d+' at row \d is not a whole-number"):
        axis_of(values, freq)


def test_whole_number_texts_with_point_zero_stay_whole_numbers():
    axis = axis_of(["2001.0", "2002.", "2003"])
    assert axis.name == "year" and axis.label(axis.ordinal) == ["2001", "2002", "2003"]


@pytest.mark.parametrize("label, row", [("2021Q5", 2), ("2021Q0", 2), ("2021 Q9", 2)])
def test_no_such_quarter_names_row_and_value(label, row):
    with pytest.raises(TimeParseError, match=rf"'{label}' at row {row} has no such quarter"):
        axis_of(["2021Q4", label, "2022Q1"])


def test_two_spellings_of_one_date_are_one_moment():
    axis = axis_of(["2021-01-31", "2021-01-31T00:00:00", "2021-02-28", "2021-03-31"])
    # counted once, the three month ends make a monthly grid with nothing off it
    assert axis.name == "month" and not axis.off_grid.any()
    assert axis.instant[0] == axis.instant[1] != axis.instant[2]


def test_two_dates_in_one_period_are_two_moments():
    axis = axis_of(["2021-01-31", "2021-01-15", "2021-02-28", "2021-03-31"])
    assert axis.ordinal[0] == axis.ordinal[1] and axis.instant[0] != axis.instant[1]


def test_nan_text_is_a_missing_time_value_as_a_stored_nan_is():
    text = axis_of(["2001", "nan", "2002", "NaN"])
    stored = axis_of([2001.0, np.nan, 2002.0, np.nan])
    assert text.missing.tolist() == stored.missing.tolist() == [False, True, False, True]
    assert text.name == stored.name == "year"
