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
    assert f"invest_lag1 ({frame['firm'].nunique():,} rows without a value)" in lost


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
