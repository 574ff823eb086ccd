"""The first-difference file (--transform diff): gap-aware, counted, checked by hand.

Data: statsmodels' Grunfeld investment panel (``statsmodels.datasets.grunfeld``) with
invented holes; the differences recomputed with pandas groupby().diff() where the
previous year is present.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from statsmodels.datasets import grunfeld
from typer.testing import CliRunner

from panelprep.cli import app
from panelprep.prepare import PrepareOptions, prepare_frame
from panelprep.transforms import first_difference

VARS = ["invest", "value", "capital"]


def _with_holes() -> pd.DataFrame:
    data = grunfeld.load_pandas().data
    rng = np.random.default_rng(11)
    holes = rng.choice(np.flatnonzero(~data["year"].isin([1935.0, 1954.0])), 12, replace=False)
    return data.drop(index=holes).sample(frac=1.0, random_state=3).reset_index(drop=True)


def _by_hand(frame: pd.DataFrame) -> pd.DataFrame:
    ordered = frame.sort_values(["firm", "year"])
    step = ordered.groupby("firm")["year"].diff()
    diffs = ordered.groupby("firm")[VARS].diff()
    return diffs[step == 1].join(ordered[["firm", "year"]]).set_index(["firm", "year"]).sort_index()


def test_diff_file_against_pandas_with_holes():
    frame = _with_holes()
    prep = prepare_frame(frame, PrepareOptions(
        entity=["firm"], time="year", y="invest", x=["value", "capital"],
        transforms=["within", "diff"], evidence=False, severities={"period-holes": "info"}))
    assert prep.verdict == "pass"
    table = prep.tables["diff"].set_index(["firm", "year"]).sort_index()
    expected = _by_hand(frame)
    assert table.index.equals(expected.index)
    np.testing.assert_allclose(table[VARS].to_numpy(), expected.to_numpy(), rtol=1e-12)
    info = prep.summary["transforms"]["diff"]
    ordered = frame.sort_values(["firm", "year"])
    step = ordered.groupby("firm")["year"].diff()
    assert info == {"rows": len(expected), "first_rows": frame["firm"].nunique(),
                    "across_holes": int((step > 1).sum()), "regressors_left_out": []}
    assert info["across_holes"] > 0
    # every row of the file carries its input row number
    rows = prep.tables["diff"]["pp_row"].to_numpy() - 1
    np.testing.assert_array_equal(frame.loc[rows, "year"].to_numpy(),
                                  prep.tables["diff"]["year"].to_numpy())
    assert any(c.startswith(f"The diff file holds {len(expected):,} first differences")
               for c in prep.summary["cautions"])


def test_time_invariant_and_trend_regressors_are_left_out_of_the_diff_file():
    frame = grunfeld.load_pandas().data.copy()
    frame["founded"] = frame["firm"].map({f: i for i, f in enumerate(frame["firm"].unique())})
    frame["trend"] = frame["year"] - 1935.0
    prep = prepare_frame(frame, PrepareOptions(
        entity=["firm"], time="year", y="invest", x=["value", "founded", "trend"],
        transforms=["diff"], evidence=False))
    columns = list(prep.tables["diff"].columns)  # building the file decides what it leaves out
    left = {r["name"]: r["reason"] for r in prep.summary["transforms"]["diff"]["regressors_left_out"]}
    # founded differences to zeros; the trend differences to ones, the constant
    assert left == {"founded": "no-diff-variation", "trend": "collinear"}
    assert columns == ["pp_row", "firm", "year", "invest", "value"]


def test_first_difference_refuses_repeated_cells():
    import pytest

    with pytest.raises(ValueError, match="unique"):
        first_difference(np.arange(3.0), np.array([0, 0, 1]), np.array([1, 1, 1]))


def test_two_waves_end_to_end_with_the_diff_file(tmp_path):
    rng = np.random.default_rng(2)
    frame = pd.DataFrame({"person": np.repeat([f"p{i:02d}" for i in range(30)], 2),
                          "wave": np.tile([80, 90], 30)})
    frame["hours"] = rng.normal(40, 5, 60).round(2)
    frame["wage"] = (10 + 0.1 * frame["hours"] + rng.normal(0, 1, 60)).round(2)
    path = tmp_path / "waves.csv"
    frame.to_csv(path, index=False)
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["prepare", str(path), "-e", "person", "-t", "wave",
                                      "--y", "wage", "--x", "hours", "--diff", "hours",
                                      "--transform", "within,diff", "--out", str(out), "-q"])
    assert result.exit_code == 0, result.output
    diff = pd.read_parquet(out / "diff.parquet")
    assert len(diff) == 30 and (diff["wave"] == 90).all()
    wide = frame.pivot(index="person", columns="wave", values="wage")
    np.testing.assert_allclose(diff.set_index("person")["wage"].sort_index(),
                               (wide[90] - wide[80]).sort_index())
