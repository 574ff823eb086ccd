"""Cautions an econometrician expects, with the numbers of the run.

Data: statsmodels' Grunfeld investment panel (``statsmodels.datasets.grunfeld``,
11 firms, 1935-1954), with invented time-invariant columns added where a test
needs them; counts checked by pandas by hand.
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
import pytest
from statsmodels.datasets import grunfeld

from panelprep.clean import Policies
from panelprep.lags import parse_shifts
from panelprep.names import DEFAULT_NAMES
from panelprep.prepare import PrepareOptions, prepare_frame
from panelprep.report.text import preparation_lines


def _grunfeld() -> pd.DataFrame:
    data = grunfeld.load_pandas().data.copy()
    # an invented firm-level trait (constant within firm) with a strong effect on investment
    trait = {firm: float(i % 4) for i, firm in enumerate(sorted(data["firm"].unique()))}
    data["trait"] = data["firm"].map(trait)
    data["invest"] = data["invest"] + 60.0 * data["trait"]
    return data


def _run(frame, method="swamy-arora", x=("value", "capital", "trait"), shifts=(),
         transforms=("within", "between", "quasi")):
    options = PrepareOptions(entity=["firm"], time="year", y="invest", x=list(x), method=method,
                             transforms=list(transforms), shifts=list(shifts), evidence=False)
    return prepare_frame(frame, options)


def _caution(prep, pattern: str) -> str:
    found = [c for c in prep.summary["cautions"] if re.search(pattern, c)]
    assert found, prep.summary["cautions"]
    return found[0]


@pytest.mark.parametrize("method", ["amemiya", "nerlove"])
def test_within_based_methods_with_a_time_invariant_regressor(method):
    frame = _grunfeld()
    prep, reference = _run(frame, method), _run(frame, "swamy-arora")
    text = _caution(prep, rf"^{method} with regressors left out of the within regression \(trait\)")
    s2u = prep.summary["components"]["sigma2_entity"]
    s2u_sa = reference.summary["components"]["sigma2_entity"]
    assert f"s2_u = {s2u:.6g}" in text and f"Swamy-Arora's s2_u = {s2u_sa:.6g}" in text
    # the trait's effect went into s2_u: well above Swamy-Arora's, whose between regression
    # fits the trait
    assert s2u > 1.5 * s2u_sa
    # shown in the text log too
    assert any(text in line for line in preparation_lines(prep.summary))
    assert not any(c.startswith("swamy-arora with") for c in reference.summary["cautions"])


def test_nerlove_s2u_depends_on_which_collinear_column_is_left_out():
    frame = _grunfeld()
    # value_plus differs from value by a firm constant: collinear with it after demeaning
    frame["value_plus"] = frame["value"] + 500.0 * frame["trait"]
    both = _run(frame, "nerlove", x=("value", "value_plus", "capital"))
    assert both.summary["components"]["dropped_within"] in (["value"], ["value_plus"])
    _caution(both, r"^nerlove's s2_u is the variance of the estimated entity effects")
    # keeping one or the other gives different s2_u: the caution is not idle
    s2u = [_run(frame, "nerlove", x=(kept, "capital")).summary["components"]["sigma2_entity"]
           for kept in ("value", "value_plus")]
    assert abs(s2u[0] - s2u[1]) > 0.01 * max(s2u)
    assert both.summary["components"]["sigma2_entity"] == pytest.approx(
        s2u[0] if both.summary["components"]["dropped_within"] == ["value_plus"] else s2u[1],
        rel=1e-9)


def test_lagged_response_in_within_and_quasi_files():
    frame = _grunfeld()
    shifts = parse_shifts("lag", ["invest:1"], DEFAULT_NAMES)
    prep = _run(frame, x=("value", "capital", "invest_lag1"), shifts=shifts)
    text = _caution(prep, r"invest_lag1 \(a lag of the response invest\)")
    assert "within, quasi file(s)" in text
    # 20 years, the first lost to the lag: 19 rows per firm (pandas by hand)
    per_firm = frame.groupby("firm").size() - 1
    assert f"median T is {np.median(per_firm):g}" in text
    # the lag lost each firm's first year, and the log says so with the count
    lost = _caution(prep, r"^Lags and differences have no value")
    assert f"invest_lag1 (k = 1: {frame['firm'].nunique():,} rows without a value)" in lost
    # every firm starts in 1935 (pandas by hand), so that year has no row left
    assert frame.groupby("firm")["year"].min().eq(1935).all()
    assert lost.endswith("so 1 period (1935) has no row left: the sample starts at 1936, the "
                         "data at 1935.")


def test_periods_lost_to_a_second_lag_with_a_hole():
    frame = _grunfeld()
    # one firm's 1940 row is missing: its lag of 2 has no value in 1942 either
    firm = min(frame["firm"].unique())
    frame = frame[~((frame["firm"] == firm) & (frame["year"] == 1940))].reset_index(drop=True)
    shifts = parse_shifts("lag", ["capital:2"], DEFAULT_NAMES)
    prep = _run(frame, x=("value", "capital_lag2"), shifts=shifts)
    lost = _caution(prep, r"^Lags and differences have no value")
    # by hand: 2 rows per firm at the start, 1 more after the hole (1942 -> 1940)
    missing = 2 * frame["firm"].nunique() + 1
    assert f"capital_lag2 (k = 2: {missing:,} rows without a value)" in lost
    assert "2 periods (1935, 1936) have no row left: the sample starts at 1937" in lost


def test_a_window_after_the_first_period_keeps_every_period():
    frame = _grunfeld()
    shifts = parse_shifts("lag", ["invest:1"], DEFAULT_NAMES)
    # the lag is taken before the window, so 1940 has its 1939 value: nothing is lost
    options = {"entity": ["firm"], "time": "year", "y": "invest",
               "x": ["value", "capital", "invest_lag1"], "shifts": list(shifts),
               "policies": Policies(window=("1940", "")), "evidence": False}
    prep = prepare_frame(frame, PrepareOptions(**options))
    assert not any(c.startswith("Lags and differences") for c in prep.summary["cautions"])
    # with a hole inside the window, the rows after it are said, and no period is emptied
    firm = min(frame["firm"].unique())
    holed = frame[~((frame["firm"] == firm) & (frame["year"] == 1945))].reset_index(drop=True)
    prep = prepare_frame(holed, PrepareOptions(**options))
    lost = _caution(prep, r"^Lags and differences have no value")
    assert "invest_lag1 (k = 1: 1 row without a value)" in lost
    assert lost.endswith("no period lost all its rows.")


def test_no_lag_caution_for_a_lag_of_a_regressor_or_a_between_file():
    frame = _grunfeld()
    shifts = parse_shifts("lag", ["invest:1"], DEFAULT_NAMES)
    between = _run(frame, x=("value", "capital", "invest_lag1"), shifts=shifts,
                   transforms=("between",))
    assert not any("a lag of the response" in c for c in between.summary["cautions"])


def test_listwise_caution_names_the_columns_that_cause_most_of_it():
    frame = _grunfeld()
    rng = np.random.default_rng(7)
    frame.loc[rng.choice(len(frame), 40, replace=False), "capital"] = np.nan
    frame.loc[rng.choice(len(frame), 5, replace=False), "value"] = np.nan
    prep = _run(frame, x=("value", "capital"))
    text = _caution(prep, r"^Listwise deletion removed")
    # by hand with pandas
    capital, value = frame["capital"].isna(), frame["value"].isna()
    rows = int((capital | value).sum())
    assert text.startswith(f"Listwise deletion removed {rows:,} row(s); most of them miss "
                           f"capital (40 rows, {int((capital & ~value).sum()):,} missing nothing "
                           f"else), value (5 rows, {int((value & ~capital).sum()):,}")
    finding = next(f for f in prep.summary["findings"] if f["id"] == "values-missing")
    assert "most often missing: capital (40," in finding["message"]


def test_cautions_with_the_run_numbers_in_json_text_log_html_and_summary(tmp_path):
    import html
    import json

    from typer.testing import CliRunner

    from panelprep.cli import app

    frame = _grunfeld()
    rng = np.random.default_rng(11)
    frame.loc[rng.choice(len(frame), 12, replace=False), "capital"] = np.nan
    data = tmp_path / "grunfeld.csv"
    frame.to_csv(data, index=False)
    out = tmp_path / "out"
    result = CliRunner().invoke(app, [
        "prepare", str(data), "-e", "firm", "-t", "year", "--y", "invest",
        "--x", "value,capital,trait,invest_lag1", "--lag", "invest:1", "--method", "amemiya",
        "--transform", "within,quasi,diff", "--no-evidence", "--out", str(out), "-q"])
    assert result.exit_code == 0, result.output
    cautions = json.loads((out / "diagnostics.json").read_text())["cautions"]
    starts = ["amemiya with regressors left out of the within regression (trait)",
              "invest_lag1 (a lag of the response invest)", "Lags and differences have no value",
              "Listwise deletion removed", "The diff file holds"]
    for start in starts:
        assert any(c.startswith(start) for c in cautions), start
    log = (out / "diagnostics.txt").read_text()
    page = " ".join(html.unescape((out / "report.html").read_text()).split())
    summary = " ".join(result.output.split())
    for caution in cautions:
        assert f"  - {caution}\n" in log, caution
        assert " ".join(caution.split()) in page, caution
        assert " ".join(caution.split()) in summary, caution
