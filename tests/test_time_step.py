"""The step of whole-number periods: inferred from the distinct values, or stated as int:K.

Outside checks: statsmodels' Grunfeld investment data (``statsmodels.datasets.grunfeld``)
cut to waves ten years apart, with the within transform recomputed by pandas groupby.
"""

from __future__ import annotations

import json
import re

import numpy as np
import pandas as pd
import pytest
from statsmodels.datasets import grunfeld
from typer.testing import CliRunner

from panelprep.cli import app
from panelprep.config import load_run_file
from panelprep.pipeline import audit
from panelprep.prepare import PrepareOptions, prepare_frame
from panelprep.report.text import audit_lines
from panelprep.timeaxis import build_time_axis

RUNNER = CliRunner()


def waves(periods, entities=6, seed=0) -> pd.DataFrame:
    """An invented panel: each entity observed at every one of ``periods``."""
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({"person": np.repeat([f"p{i:02d}" for i in range(entities)], len(periods)),
                          "wave": np.tile(periods, entities)})
    frame["hours"] = rng.normal(40, 5, len(frame)).round(2)
    frame["wage"] = (10 + 0.1 * frame["hours"] + rng.normal(0, 1, len(frame))).round(2)
    return frame


@pytest.mark.parametrize("periods, name", [
    ([80, 90], "int:10"),          # two waves: their difference is the step
    ([1, 3], "int:2"),
    ([87, 90, 93], "int:3"),       # three waves, equal spacing
    ([80, 85, 95], "int:5"),       # unequal spacing: the gcd of the gaps
])
def test_inferred_step_is_the_gcd_of_the_gaps(periods, name):
    axis = build_time_axis(pd.Series(periods * 3), column="wave")
    assert axis.name == name
    assert not axis.off_grid.any()


def test_two_waves_are_balanced_without_holes():
    report = audit(waves([80, 90]), "person", "wave")
    assert report.keys["freq"] == "int:10"
    assert report.panel["periods"] == 2
    assert report.panel["balanced"] is True
    assert "period-holes" not in {f.id for f in report.findings}


def test_unequal_spacing_shows_the_hole():
    # 80, 85, 95: on a step of 5 the period 90 is missing for every entity
    report = audit(waves([80, 85, 95]), "person", "wave")
    assert report.keys["freq"] == "int:5"
    holes = report.finding("period-holes")
    assert holes.count == 6 and holes.details["periods_missing"] == 6


def test_stated_step_is_used_and_not_a_finding_when_it_agrees():
    report = audit(waves([80, 90]), "person", "wave", freq="int:10")
    assert report.keys == {**report.keys, "freq": "int:10", "freq_inferred": False}
    assert "period-step-stated" not in {f.id for f in report.findings}


def test_stated_step_finer_than_the_data_is_a_finding_and_makes_holes():
    report = audit(waves([80, 90]), "person", "wave", freq="int:5")
    stated = report.finding("period-step-stated")
    assert stated.severity == "warning"
    assert stated.details == {"stated_step": 5, "data_step": 10}
    assert "holes" in stated.message
    assert report.panel["periods"] == 3
    assert report.finding("period-holes").count == 6
    # the summary says what addresses it
    lines = "\n".join(audit_lines(report.to_dict()))
    assert re.search(r"period-step-stated +does not fail +--freq int:K \[panel.freq\]", lines)


def test_stated_step_coarser_than_the_data_puts_values_off_grid():
    report = audit(waves([80, 85, 90]), "person", "wave", freq="int:10")
    assert report.finding("period-step-stated").details == {"stated_step": 10, "data_step": 5}
    assert report.finding("period-off-grid").count == 6


def test_stated_step_of_one_reads_two_years_as_years_with_a_hole():
    axis = build_time_axis(pd.Series([2003, 2005]), freq="int:1")
    assert axis.name == "int:1" and axis.ordinal.tolist() == [0, 2]


@pytest.mark.parametrize("bad", ["int:0", "int:x", "int:", "step:2", "int:-2"])
def test_a_bad_stated_step_is_exit_2(tmp_path, bad):
    path = tmp_path / "w.csv"
    waves([80, 90]).to_csv(path, index=False)
    result = RUNNER.invoke(app, ["audit", str(path), "-e", "person", "-t", "wave", "--freq", bad])
    assert result.exit_code == 2
    assert "int:K" in result.output and "Traceback" not in result.output


def test_run_file_states_the_step(tmp_path):
    path = tmp_path / "w.csv"
    waves([80, 90]).to_csv(path, index=False)
    run_file = tmp_path / "run.toml"
    run_file.write_text(f'[input]\npath = "{path}"\n[panel]\nentity = "person"\ntime = "wave"\n'
                        'freq = "int:10"\n[model]\ny = "wage"\nx = ["hours"]\n'
                        f'[output]\ndir = "{tmp_path / "out"}"\n')
    assert load_run_file(run_file).panel.freq == "int:10"
    run_file.write_text(run_file.read_text().replace('"int:10"', '"int:ten"'))
    with pytest.raises(Exception, match="panel.freq.*int:K"):
        load_run_file(run_file)


def test_two_waves_end_to_end_with_a_difference(tmp_path):
    path = tmp_path / "w.csv"
    frame = waves([80, 90], entities=40)
    frame.to_csv(path, index=False)
    out = tmp_path / "out"
    # the classic two-period first-difference regression: the differences of the second wave,
    # one row per entity, in the between file
    result = RUNNER.invoke(app, ["prepare", str(path), "-e", "person", "-t", "wave",
                                 "--y", "wage_diff1", "--x", "hours_diff1", "--diff", "wage,hours",
                                 "--transform", "between", "--out", str(out), "-q"])
    assert result.exit_code == 0, result.output
    assert "int:10" in result.output
    # the difference across the two waves is the later value less the earlier (pandas by hand)
    by_hand = frame.assign(wage_diff1=frame.groupby("person")["wage"].diff(),
                           hours_diff1=frame.groupby("person")["hours"].diff()).dropna()
    between = pd.read_parquet(out / "between.parquet").sort_values("person")
    assert len(between) == 40 and between["pp_rows"].eq(1).all()
    np.testing.assert_allclose(between[["wage_diff1", "hours_diff1"]].to_numpy(),
                               by_hand.sort_values("person")[["wage_diff1", "hours_diff1"]]
                               .to_numpy(), rtol=0, atol=1e-12)
    summary = json.loads((out / "diagnostics.json").read_text())
    assert summary["sample"]["rows"] == 40 and summary["panel"]["periods"] == 1
    # no file uses the components, so their lack of within variation is said, not judged
    unidentified = next(f for f in summary["findings"] if f["id"] == "components-underidentified")
    assert unidentified["severity"] == "warning" and "no quasi file" in unidentified["message"]
    assert unidentified in summary["components"]["findings"]
    assert "these numbers are not estimates to use" in result.output
    # the quasi file needs theta from those components: asked for, the gate fails
    result = RUNNER.invoke(app, ["prepare", str(path), "-e", "person", "-t", "wave",
                                 "--y", "wage_diff1", "--x", "hours_diff1", "--diff", "wage,hours",
                                 "--out", str(tmp_path / "quasi"), "-q"])
    assert result.exit_code == 1 and "components-underidentified" in result.output
    failed = json.loads((tmp_path / "quasi.failed" / "diagnostics.json").read_text())
    assert failed["gate"]["failed_by"] == ["components-underidentified"]
    assert failed["samples"]["definition"].endswith("the gate failed, so none was written")
    log = (tmp_path / "quasi.failed" / "diagnostics.txt").read_text()
    assert "Files built (none written: the gate failed)" in log
    assert failed["cautions"] == [("the gate failed (components-underidentified); no data "
                                   "files were written. Fix the input, or state a cleaning "
                                   "policy, and run again.")]


def test_grunfeld_every_tenth_year_is_a_ten_year_grid():
    # statsmodels' Grunfeld data cut to 1935 and 1945 (two waves ten years apart)
    data = grunfeld.load_pandas().data
    two = data[data["year"].isin([1935.0, 1945.0])].reset_index(drop=True)
    prep = prepare_frame(two, PrepareOptions(entity=["firm"], time="year", y="invest",
                                             x=["value", "capital"], transforms=["within"],
                                             evidence=False))
    assert prep.summary["keys"]["freq"] == "int:10"
    assert prep.summary["panel"]["balanced"] is True
    within = prep.tables["within"].set_index(["firm", "year"]).sort_index()
    # within transform by hand: deviation from each firm's mean (pandas groupby)
    by_hand = (two.set_index(["firm", "year"])[["invest", "value", "capital"]]
               .groupby(level="firm").transform(lambda c: c - c.mean()).sort_index())
    np.testing.assert_allclose(within[["invest", "value", "capital"]].to_numpy(),
                               by_hand.to_numpy(), atol=1e-9)
