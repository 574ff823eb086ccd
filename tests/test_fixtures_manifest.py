"""The defect fixtures against their manifest, fixtures/expected.json.

Every number in the manifest is a hand count, cross-checked with plain pandas:
the recount below uses only pandas/numpy (read as text, ``duplicated``,
``groupby``, ``diff``) and none of panelprep, so a wrong hand count or a
fixture edited without its manifest makes these tests fail.  Conventions are
spelled out in the manifest's "conventions" block and in fixtures/EXPECTED.md.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
MANIFEST = json.loads((FIXTURES / "expected.json").read_text())["fixtures"]
LOW_WITHIN_SHARE = 1e-3
# What a fixture is read with, rather than something counted in it.
INPUTS = {"defect", "entity", "time", "freq", "delimiter", "decimal"}


def _read(name: str, spec: dict) -> pd.DataFrame:
    """Every cell as text, empty cells as '' (no NA markers), spaces kept."""
    return pd.read_csv(
        FIXTURES / name, sep=spec["delimiter"], dtype=str, keep_default_na=False
    )


def _periods(values: pd.Series, freq: str) -> tuple[pd.Series, pd.Series, pd.Series]:
    """(ordinal, label, off_grid) per row, by plain pandas date arithmetic."""
    if freq == "year":
        years = values.astype(int)
        return years, years.astype(str), pd.Series(False, index=values.index)
    if freq == "quarter":
        per = pd.PeriodIndex(values, freq="Q")
        ordinal = per.year * 4 + per.quarter - 1
        off = np.zeros(len(values), dtype=bool)
    elif re.fullmatch(r"\d{4}-\d{2}", values.iloc[0]):
        per = pd.PeriodIndex(values, freq="M")
        ordinal = per.year * 12 + per.month - 1
        off = np.zeros(len(values), dtype=bool)
    else:
        stamps = pd.DatetimeIndex(pd.to_datetime(values, format="%Y-%m-%d"))
        per = stamps.to_period("M")
        ordinal = stamps.year * 12 + stamps.month - 1
        off = ~stamps.is_month_end
    idx = values.index
    return (
        pd.Series(np.asarray(ordinal), index=idx),
        pd.Series(per.astype(str), index=idx),
        pd.Series(np.asarray(off), index=idx),
    )


def _numbers(text: pd.Series, decimal: str) -> pd.Series:
    if decimal != ".":
        text = text.str.replace(decimal, ".", regex=False)
    return pd.to_numeric(text, errors="coerce")


def _runs(frame: pd.DataFrame, ent: str) -> pd.DataFrame:
    """Per entity: number of distinct periods, gap count and longest gap."""
    cells = frame[[ent, "_p"]].drop_duplicates().sort_values([ent, "_p"])
    step = cells.groupby(ent)["_p"].diff().fillna(1) - 1
    cells = cells.assign(_hole=step)
    return cells.groupby(ent).agg(
        n=("_p", "size"),
        gaps=("_hole", lambda s: int((s > 0).sum())),
        longest=("_hole", "max"),
    )


def recount(name: str, spec: dict) -> dict:
    """Every manifest fact for one fixture, recomputed with plain pandas."""
    ent, tim, variables = spec["entity"], spec["time"], spec["variables"]
    raw = _read(name, spec)
    out: dict = {"rows": len(raw)}
    out["variables"] = [c for c in raw.columns if c not in (ent, tim)]

    no_ent = raw[ent].str.strip() == ""
    no_tim = raw[tim].str.strip() == ""
    out["missing_entity_rows"] = int(no_ent.sum())
    out["missing_time_rows"] = int(no_tim.sum())
    out["missing_key_rows"] = int((no_ent | no_tim).sum())
    out["entities"] = raw.loc[~no_ent, ent].nunique()
    out["exact_duplicate_rows"] = int(raw.duplicated().sum())

    blank_cells = {v: int((raw[v].str.strip() == "").sum()) for v in variables}
    out["missing_cells"] = {v: n for v, n in blank_cells.items() if n}
    nums = pd.DataFrame({v: _numbers(raw[v], spec["decimal"]) for v in variables})
    bad = {v: (raw[v].str.strip() != "") & nums[v].isna() for v in variables}
    out["non_numeric"] = {v: int(m.sum()) for v, m in bad.items() if m.any()}
    out["non_numeric_values"] = {v: raw.loc[m, v].tolist() for v, m in bad.items() if m.any()}

    keyed = raw[~no_ent & ~no_tim].drop_duplicates()
    ordinal, label, off = _periods(keyed[tim], spec["freq"])
    out["off_grid_rows"] = int(off.sum())
    if "off_grid_values" in spec:
        out["off_grid_values"] = keyed.loc[off, tim].tolist()
    keyed = pd.concat([keyed[[ent]], nums.loc[keyed.index], ordinal.rename("_p")], axis=1)
    keyed_all = raw[~no_ent & ~no_tim]
    span = ordinal.max() - ordinal.min() + 1
    out["periods"] = int(span)
    out["first_period"] = label[ordinal.idxmin()]
    out["last_period"] = label[ordinal.idxmax()]

    per_key = keyed.groupby([ent, "_p"]).size()
    conflicts = per_key[per_key > 1].index
    out["conflicting_duplicate_keys"] = len(conflicts)
    first_label = dict(zip(ordinal, label))
    out["conflicting_keys"] = [[e, first_label[p]] for e, p in conflicts]
    all_ord, _, _ = _periods(keyed_all[tim], spec["freq"])
    all_keys = pd.MultiIndex.from_arrays([keyed_all[ent], all_ord])
    out["conflicting_duplicate_rows"] = int(all_keys.isin(conflicts).sum())

    complete = keyed[variables].notna().all(axis=1)
    est = keyed[complete]
    out["estimation_rows"] = len(est)
    out["estimation_entities"] = est[ent].nunique()
    out["listwise_rows_removed"] = int((~complete).sum())
    assert est["_p"].max() - est["_p"].min() + 1 == span, "manifest convention: same time range"

    runs = _runs(est, ent)
    out["balanced"] = bool((runs["n"] == span).all())
    singles = runs.index[runs["n"] == 1]
    out["singleton_entities"] = len(singles)
    out["singleton_ids"] = sorted(singles)
    before = _runs(keyed, ent)
    out["listwise_new_singletons"] = sorted(set(singles) - set(before.index[before["n"] == 1]))
    holes = runs[runs["gaps"] > 0]
    out["entities_with_gaps"] = len(holes)
    out["gaps"] = {
        e: {"gaps": int(r.gaps), "longest": int(r.longest)} for e, r in holes.iterrows()
    }

    ids = pd.Series(raw.loc[~no_ent, ent].unique())
    norm = ids.str.strip().str.casefold()
    groups = ids.groupby(norm).agg(lambda s: sorted(s))
    out["lookalike_groups"] = sorted(g for g in groups if len(g) > 1)
    if "entities_if_ids_normalised" in spec:
        est_norm = est.assign(**{ent: est[ent].str.strip().str.casefold()})
        norm_runs = _runs(est_norm, ent)
        out["entities_if_ids_normalised"] = len(norm_runs)
        out["balanced_if_ids_normalised"] = bool((norm_runs["n"] == span).all())

    out["time_invariant"], out["period_invariant"], out["low_within"] = [], [], {}
    for v in variables:
        by_ent = est.groupby(ent)[v].agg(["size", "nunique"])
        by_ent = by_ent[by_ent["size"] >= 2]
        by_per = est.groupby("_p")[v].agg(["size", "nunique"])
        by_per = by_per[by_per["size"] >= 2]
        invariant = len(by_ent) > 0 and bool((by_ent["nunique"] == 1).all())
        if invariant:
            out["time_invariant"].append(v)
        if len(by_per) and (by_per["nunique"] == 1).all():
            out["period_invariant"].append(v)
        x = est[v]
        within = ((x - est.groupby(ent)[v].transform("mean")) ** 2).sum()
        share = within / ((x - x.mean()) ** 2).sum()
        if not invariant and share < LOW_WITHIN_SHARE:
            out["low_within"][v] = float(share)
    return out


@pytest.mark.parametrize("name", sorted(MANIFEST))
def test_manifest_matches_plain_pandas_recount(name):
    # hand count, cross-checked with plain pandas
    spec = MANIFEST[name]
    got = recount(name, spec)
    assert set(spec) - INPUTS <= set(got), "every counted field is recounted"
    for field, value in got.items():
        if field == "low_within":
            assert sorted(value) == sorted(spec[field]), name
            for v, share in value.items():
                assert share == pytest.approx(spec[field][v], rel=1e-3), (name, v)
        else:
            assert value == spec[field], (name, field, value)


def test_every_fixture_has_a_manifest_entry_and_vice_versa():
    on_disk = {p.name for p in FIXTURES.glob("*.csv")}
    assert on_disk == set(MANIFEST)


def test_every_manifest_entry_has_the_same_fields():
    fields = [set(spec) - {"entities_if_ids_normalised", "balanced_if_ids_normalised",
                           "off_grid_values"} for spec in MANIFEST.values()]
    assert all(f == fields[0] for f in fields)


def test_numeric_ids_keep_leading_zeros():
    for name, spec in MANIFEST.items():
        ids = _read(name, spec)[spec["entity"]].str.strip()
        ids = ids[ids != ""]
        if ids.str.fullmatch(r"\d+").all():
            assert ids.str.fullmatch(r"00\d{3}").all(), name


def test_variables_not_flagged_have_clear_within_variation():
    # A variable not meant to look time-invariant keeps a within share at least ten times the 0.001 mark,
    # so a checker with a somewhat different cut-off still agrees with the manifest.
    for name, spec in MANIFEST.items():
        raw = _read(name, spec)
        keep = (raw[spec["entity"]].str.strip() != "") & (raw[spec["time"]].str.strip() != "")
        for v in spec["variables"]:
            if v in spec["time_invariant"] or v in spec["low_within"]:
                continue
            x = _numbers(raw.loc[keep, v], spec["decimal"])
            ents = raw.loc[keep, spec["entity"]]
            ok = x.notna()
            x, ents = x[ok], ents[ok]
            share = ((x - x.groupby(ents).transform("mean")) ** 2).sum() / ((x - x.mean()) ** 2).sum()
            assert share > 10 * LOW_WITHIN_SHARE, (name, v, share)
