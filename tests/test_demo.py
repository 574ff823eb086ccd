"""The invented demo panel: determinism, CSV round trip, and planted defects recounted.

Every planted count is recovered here by an independent plain-pandas
computation (``duplicated``, ``groupby``, ``diff``) that shares no code with
panelprep; the estimation-sample convention is the one in fixtures/EXPECTED.md.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from panelprep.demo import DEFAULT_SEED, make_demo_panel, write_demo_csv

VARIABLES = ["sales", "capital", "staff"]


def _canonical(ids: pd.Series) -> pd.Series:
    return ids.str.strip().str.upper()


def _spans(frame: pd.DataFrame, by: pd.Series) -> pd.DataFrame:
    """Per entity: distinct years, interior gap runs and missing interior years."""
    cells = pd.DataFrame({"e": by.to_numpy(), "year": frame["year"].to_numpy()})
    cells = cells.drop_duplicates().sort_values(["e", "year"])
    hole = cells.groupby("e")["year"].diff().fillna(1) - 1
    cells = cells.assign(hole=hole)
    return cells.groupby("e").agg(
        n=("year", "size"),
        runs=("hole", lambda s: int((s > 0).sum())),
        holes=("hole", "sum"),
        first=("year", "min"),
        last=("year", "max"),
    )


def recount(df: pd.DataFrame, first: int, last: int) -> dict:
    """The planted dictionary's counts, recomputed from the frame alone."""
    ids = df["firm_id"]
    canon = _canonical(ids)
    collapsed = df.drop_duplicates()
    complete = collapsed[VARIABLES].notna().all(axis=1)
    est = collapsed[complete]
    on_keys = _spans(collapsed, collapsed["firm_id"])
    on_est = _spans(est, est["firm_id"])
    by_firm = _spans(df, canon)
    keyed = collapsed.duplicated(["firm_id", "year"], keep=False)
    variants = ids.groupby(canon).nunique()
    singles_before = set(on_keys.index[on_keys["n"] == 1])
    singles_after = set(on_est.index[on_est["n"] == 1])
    return {
        "rows": len(df),
        "firms": canon.nunique(),
        "entities_as_written": ids.nunique(),
        "balanced": bool((by_firm["n"] == last - first + 1).all()),
        "entered_late": int((by_firm["first"] > first).sum()),
        "exited_early": int((by_firm["last"] < last).sum()),
        "exact_duplicate_rows": int(df.duplicated().sum()),
        "conflicting_duplicate_keys": len(collapsed.loc[keyed, ["firm_id", "year"]].drop_duplicates()),
        "lookalike_groups": int((variants > 1).sum()),
        "lookalike_rows": int((~ids.str.fullmatch(r"F\d{5}")).sum()),
        "gap_firms": int((on_keys["runs"] > 0).sum()),
        "gap_periods": int(on_keys["holes"].sum()),
        "singleton_firms": len(singles_before),
        "missing_cells": {v: int(n) for v, n in df[VARIABLES].isna().sum().items()},
        "listwise_rows_removed": int((~complete).sum()),
        "listwise_new_singletons": len(singles_after - singles_before),
        "entities_with_gaps": int((on_est["runs"] > 0).sum()),
        "singleton_entities": len(singles_after),
    }


@pytest.fixture(scope="module")
def demo():
    return make_demo_panel()


def test_docstring_says_invented():
    assert "Demo data: invented, no real firms" in make_demo_panel.__doc__


def test_same_seed_gives_identical_bytes(tmp_path):
    a, b, c = tmp_path / "a.csv", tmp_path / "b.csv", tmp_path / "c.csv"
    write_demo_csv(a)
    write_demo_csv(b, seed=DEFAULT_SEED)
    write_demo_csv(c, seed=DEFAULT_SEED + 1)
    assert a.read_bytes() == b.read_bytes()
    assert a.read_bytes() != c.read_bytes()


@pytest.mark.parametrize(
    "seed, n_firms, years",
    [(DEFAULT_SEED, 300, (2005, 2024)), (7, 60, (2011, 2018)), (123, 1500, (1995, 2024))],
)
def test_planted_counts_recovered_by_plain_pandas(seed, n_firms, years):
    # independent recount with plain pandas, not the generator's own bookkeeping
    df, planted = make_demo_panel(seed=seed, n_firms=n_firms, years=years)
    got = recount(df, *years)
    assert got == {k: planted[k] for k in got}
    assert planted["years"] == list(years)
    assert planted["firms"] == n_firms


def test_every_defect_kind_is_present(demo):
    _, planted = demo
    for key in ("exact_duplicate_rows", "conflicting_duplicate_keys", "lookalike_groups",
                "gap_firms", "singleton_firms", "listwise_new_singletons"):
        assert planted[key] > 0, key
    assert all(n > 0 for n in planted["missing_cells"].values())


def test_planted_firms_are_the_ones_found(demo):
    df, planted = demo
    by_kind = planted["firms_by_defect"]
    canon = _canonical(df["firm_id"])
    collapsed = df.drop_duplicates()
    spans = _spans(collapsed, _canonical(collapsed["firm_id"]))
    assert set(spans.index[spans["runs"] > 0]) == set(by_kind["gap"])
    assert set(spans.index[spans["n"] == 1]) == set(by_kind["singleton"])
    assert set(canon[df.duplicated()]) == set(by_kind["duplicate"])
    clash = collapsed.duplicated(["firm_id", "year"], keep=False)
    assert set(_canonical(collapsed.loc[clash, "firm_id"])) == set(by_kind["conflict"])
    assert set(canon[~df["firm_id"].str.fullmatch(r"F\d{5}")]) == set(by_kind["lookalike"])
    with_missing = set(canon[df[VARIABLES].isna().any(axis=1)])
    assert with_missing == set(by_kind["missing"]) | set(by_kind["short_missing"])
    kinds = list(by_kind.values())
    assert sum(len(k) for k in kinds) == len(set().union(*map(set, kinds))), "kinds disjoint"


def test_conflicting_copies_differ_in_sales_only(demo):
    df, _ = demo
    collapsed = df.drop_duplicates()
    clash = collapsed[collapsed.duplicated(["firm_id", "year"], keep=False)]
    spread = clash.groupby(["firm_id", "year"]).nunique()
    assert (spread["sales"] == 2).all()
    assert (spread.drop(columns="sales") == 1).all().all()


def test_founded_and_industry_fixed_per_firm(demo):
    df, _ = demo
    for by in (df["firm_id"], _canonical(df["firm_id"])):
        assert df.groupby(by)["founded"].nunique().max() == 1
        assert df.groupby(by)["industry"].nunique().max() == 1
    first_year = df.groupby(_canonical(df["firm_id"]))["year"].min()
    founded = df.groupby(_canonical(df["firm_id"]))["founded"].first()
    assert (founded <= first_year).all()


def test_csv_round_trip_keeps_ids_and_values(tmp_path, demo):
    df, planted = demo
    path = tmp_path / "demo.csv"
    assert write_demo_csv(path) == planted
    back = pd.read_csv(path, dtype={"firm_id": str})
    assert back["firm_id"].tolist() == df["firm_id"].tolist()
    assert back["firm_id"].str.strip().str.fullmatch(r"[Ff]0\d{4}").all()
    # repr precision: every float reads back to the identical number
    pd.testing.assert_frame_equal(back, df, check_dtype=False, check_exact=True)
    assert back[["year", "industry", "founded"]].dtypes.eq("int64").all()


def test_magnitudes_are_plausible(demo):
    df, _ = demo
    med = df[VARIABLES].median()
    # common practice: small manufacturers, sales and capital in millions, staff in FTE
    assert 2 < med["sales"] < 100
    assert 1 < med["capital"] < 100
    assert 20 < med["staff"] < 500
    assert (df[VARIABLES].dropna() > 0).all().all()
    within = df["capital"] - df.groupby("firm_id")["capital"].transform("mean")
    assert (within.abs() > 0).mean() > 0.9, "capital moves within firms"


def test_firm_effect_makes_pooled_and_within_disagree(demo):
    # Outside check: numpy least squares on pandas-demeaned logs, no panelprep code.
    # The within (fixed-effects) slopes should land near the generating elasticities,
    # while pooled OLS is pulled away by the firm effect loading on capital and staff.
    df, planted = demo
    d = df.drop_duplicates().dropna()
    firm = _canonical(d["firm_id"])
    d = d[~pd.DataFrame({"f": firm, "y": d["year"]}).duplicated(keep=False)]
    firm = _canonical(d["firm_id"])
    y = np.log(d["sales"])
    x = np.log(d[["capital", "staff"]])
    pooled = np.linalg.lstsq(np.column_stack([np.ones(len(d)), x]), y, rcond=None)[0][1:]
    yw = y - y.groupby(firm).transform("mean")
    xw = x - x.groupby(firm).transform("mean")
    within = np.linalg.lstsq(xw.to_numpy(), yw.to_numpy(), rcond=None)[0]
    assert within[0] == pytest.approx(planted["model"]["elasticity_capital"], abs=0.1)
    assert within[1] == pytest.approx(planted["model"]["elasticity_staff"], abs=0.1)
    assert abs(pooled[0] - within[0]) > 0.2


def test_too_small_scenarios_are_refused():
    with pytest.raises(ValueError, match="firms"):
        make_demo_panel(n_firms=10)
    with pytest.raises(ValueError, match="years"):
        make_demo_panel(years=(2020, 2024))
