"""How entities cover the period grid: ``panel-shape.details.coverage``, its text and its pictures.

Outside checks: every count is recomputed with plain pandas (``groupby``,
``value_counts``, ``diff``) on the frame that was audited, never with
panelprep's own arrays.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

import panelprep
from panelprep.checks.shape import MAX_BANDS, MAX_SPELL_GROUPS
from panelprep.figures import missing_picture, picture_data
from panelprep.report.text import audit_lines, coverage_lines


def _panel(seed: int, entities: int, first: int, last: int) -> pd.DataFrame:
    """Invented entities, each observed over a random span with a few random holes."""
    rng = np.random.default_rng(seed)
    rows = []
    for e in range(entities):
        start = int(rng.integers(first, last + 1))
        stop = int(rng.integers(start, last + 1))
        for t in range(start, stop + 1):
            if t in (start, stop) or rng.random() > 0.08:
                rows.append((f"f{e:03d}", t, float(rng.normal()), None))
    frame = pd.DataFrame(rows, columns=["firm", "year", "x", "y"])
    frame["y"] = np.where(rng.random(len(frame)) < 0.1, np.nan, rng.normal(size=len(frame)))
    return frame


def _spells_by_pandas(frame: pd.DataFrame) -> pd.DataFrame:
    years = frame.sort_values(["firm", "year"]).groupby("firm")["year"]
    holes = years.apply(lambda s: int((s.diff() > 1).sum()))
    return pd.DataFrame({"entry": years.min(), "exit": years.max(), "holes": holes})


@pytest.fixture(scope="module")
def yearly():
    frame = _panel(7, 300, 1990, 2019)
    report = panelprep.audit(frame, entity="firm", time="year", vars=["x"])
    return frame, report


def test_spell_groups_match_pandas(yearly):
    frame, report = yearly
    cover = report.finding("panel-shape").details["coverage"]
    spells = _spells_by_pandas(frame)
    groups = spells.groupby(["entry", "exit", "holes"]).size().rename("n").reset_index()
    groups = groups.sort_values(["n", "entry", "exit", "holes"],
                                ascending=[False, True, True, True]).head(MAX_SPELL_GROUPS)
    assert [(s["entry"], s["exit"], s["holes"], s["entities"]) for s in cover["spells"]] == [
        (str(a), str(b), int(h), int(n)) for a, b, h, n in groups.itertuples(index=False)]
    assert cover["spell_groups"] == len(spells.groupby(["entry", "exit", "holes"]))
    assert sum(s["share"] for s in cover["spells"]) == pytest.approx(
        groups["n"].sum() / len(spells))
    grid = range(frame["year"].min(), frame["year"].max() + 1)
    assert cover["from_first"] == int((spells["entry"] == grid[0]).sum())
    assert cover["to_last"] == int((spells["exit"] == grid[-1]).sum())
    assert cover["entities_full"] == int((frame.groupby("firm").size() == len(grid)).sum())
    runs = (spells["holes"] + 1).value_counts().sort_index()
    assert cover["runs"] == {str(k): int(v) for k, v in runs.items()}


def test_bands_match_pandas(yearly):
    frame, report = yearly
    cover = report.finding("panel-shape").details["coverage"]
    spells = _spells_by_pandas(frame)
    grid = np.arange(frame["year"].min(), frame["year"].max() + 1)
    width = math.ceil(len(grid) / MAX_BANDS)
    present = frame.groupby("year")["firm"].nunique().reindex(grid, fill_value=0)
    entering = spells["entry"].value_counts().reindex(grid, fill_value=0)
    leaving = spells["exit"].value_counts().reindex(grid, fill_value=0)
    band = (grid - grid[0]) // width
    expected = [
        {"first": str(grid[band == b][0]), "last": str(grid[band == b][-1]),
         "periods": int((band == b).sum()),
         "present_fewest": int(present[band == b].min()),
         "present_most": int(present[band == b].max()),
         "entering": int(entering[band == b].sum()), "last_seen": int(leaving[band == b].sum())}
        for b in np.unique(band)]
    assert cover["bands"] == expected
    assert len(cover["bands"]) <= MAX_BANDS


def test_a_long_monthly_grid_stays_bounded_in_json_and_text():
    # 600 months: one glyph per period would make a line 600 characters wide
    rng = np.random.default_rng(3)
    months = pd.period_range("1975-01", periods=600, freq="M").astype(str)
    rows = []
    for e in range(40):
        start = int(rng.integers(0, 550))
        stop = int(rng.integers(start, 600))
        keep = np.arange(start, stop + 1)
        keep = keep[(keep == start) | (keep == stop) | (rng.random(len(keep)) > 0.05)]
        rows += [(f"e{e}", months[t], float(t)) for t in keep]
    rows += [("edge", months[0], 0.0), ("edge", months[599], 1.0)]  # the grid spans all 600
    frame = pd.DataFrame(rows, columns=["id", "month", "v"])
    report = panelprep.audit(frame, entity="id", time="month", vars=["v"])
    document = report.to_dict()
    details = next(f for f in document["findings"] if f["id"] == "panel-shape")["details"]
    cover = details["coverage"]
    assert details["periods"] == 600
    assert len(cover["bands"]) <= MAX_BANDS and len(cover["spells"]) <= MAX_SPELL_GROUPS
    labels = set(months)
    for spell in cover["spells"]:
        assert spell["entry"] in labels and spell["exit"] in labels
    for band in cover["bands"]:
        assert band["first"] in labels and band["last"] in labels
    assert sum(b["periods"] for b in cover["bands"]) == 600
    lines = coverage_lines(details, details["periods"], details["entities"])
    assert lines and max(len(x) for x in lines) <= 100
    assert all(x.isascii() for x in lines)
    assert "patterns" not in details


def test_the_text_log_shows_coverage_in_words(yearly):
    _, report = yearly
    text = "\n".join(audit_lines(report.to_dict()))
    assert "Coverage of the grid (1990 to 2019, 30 periods)" in text
    assert "  entities by band of 3 periods" in text
    first = report.finding("panel-shape").details["coverage"]["spells"][0]
    words = ("present from the start (1990)" if first["from_first"]
             else f"enters {first['entry']}")
    assert words in text
    assert "■" not in text and "·" not in text


def test_missing_cells_per_period_match_pandas(yearly):
    frame, report = yearly
    picture = missing_picture(report.context)
    by_year = frame.groupby("year")["x"].apply(lambda s: int(s.isna().sum()))
    assert picture["variables"] == ["x"]
    assert picture["missing"] == [by_year.tolist()] and sum(picture["missing"][0]) == 0
    # a second variable with planted NaN
    report_y = panelprep.audit(frame, entity="firm", time="year", vars=["x", "y"])
    picture = missing_picture(report_y.context)
    counts = frame.groupby("year")["y"].apply(lambda s: int(s.isna().sum()))
    rows = frame.groupby("year").size()
    assert picture["missing"][1] == counts.tolist()
    assert picture["rows"] == rows.tolist()
    assert picture["share"][1] == pytest.approx((counts / rows).tolist())


def test_flow_picture_counts_match_pandas(yearly):
    frame, report = yearly
    flow = picture_data(report.context)["flow"]
    spells = _spells_by_pandas(frame)
    grid = np.arange(frame["year"].min(), frame["year"].max() + 1)
    assert flow["present_most"] == frame.groupby("year")["firm"].nunique().reindex(
        grid, fill_value=0).tolist()
    assert flow["entering"] == spells["entry"].value_counts().reindex(grid, fill_value=0).tolist()
    assert flow["last_seen"] == spells["exit"].value_counts().reindex(grid, fill_value=0).tolist()


_LONG_GRID = """
import resource, sys
import pandas as pd
import panelprep
from panelprep.figures import picture_data
# 2 GiB of address space: a per-period array over the grid below would need about 24 GiB
resource.setrlimit(resource.RLIMIT_AS, (2 << 30, 2 << 30))
frame = pd.DataFrame({"id": ["a", "a", "a", "b"], "t": [0, 1, 3_000_000_000, 1],
                      "y": [1.0, 2.0, 4.0, 3.0]})
report = panelprep.audit(frame, entity="id", time="t", vars=["y"])
picture_data(report.context)
coverage = next(f for f in report.findings if f.id == "panel-shape").details["coverage"]
print(len(coverage["bands"]), coverage["bands"][0]["present_fewest"], coverage["entities_full"])
# the whole preparation too: components, evidence (Pesaran's CD groups rows by period), files
from panelprep.prepare import PrepareOptions, prepare_frame
frame = pd.DataFrame({"id": list("aaabbcc"), "t": [0, 1, 3_000_000_000, 1, 2, 0, 2],
                      "y": [1.0, 2.0, 4.0, 3.0, 5.0, 2.5, 0.5],
                      "x": [0.5, 1.5, 1.0, 2.0, 0.3, 4.0, 2.2]})
prep = prepare_frame(frame, PrepareOptions(entity=["id"], time="t", y="y", x=["x"]))
print(prep.verdict, "pesaran_cd" in prep.summary["evidence"], len(prep.tables["quasi"]))
"""


def test_a_grid_of_billions_of_periods_costs_what_its_rows_cost():
    # found by the fuzz test: every per-period count is taken over the periods that occur
    import subprocess
    import sys

    done = subprocess.run([sys.executable, "-c", _LONG_GRID], capture_output=True, text=True,
                          check=False,
                          timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]
    # 12 bands of 250,000,001 periods; the first holds periods 0 and 1 and absent ones
    assert done.stdout.split() == [str(MAX_BANDS), "0", "0", "pass", "True", "7"]
