"""Properties of the drop ledger on random panels with random defects and policies.

Whatever the defects and the cleaning policies, every input row is either in
the clean file or in the ledger, exactly once: rows read = clean rows + ledger
rows, ledger row numbers are distinct input positions, and each ledger row
carries the key of the input row it names.  The expected side of every check
is the generated input frame itself, never something panelprep computed.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from conftest import examples
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from panelprep.choices import BALANCE, DUPLICATES, NORMALISE, SINGLETONS, TRANSFORMS
from panelprep.clean import Policies
from panelprep.errors import InputError
from panelprep.names import DEFAULT_NAMES as N
from panelprep.prepare import PrepareOptions, prepare_frame


def _panel(seed: int, defects: set[str], two_part: bool) -> pd.DataFrame:
    """A shuffled unbalanced panel (firms f00.., years 2001..) with the requested defects.

    With ``two_part`` the entity is (region, firm_id) and each firm code is used in two
    regions, so a key part that got lost would merge two entities.
    """
    rng = np.random.default_rng(seed)
    n_firms, n_years = int(rng.integers(5, 10)), int(rng.integers(3, 7))
    rows = []
    for firm in range(n_firms):
        present = rng.random(n_years) < 0.75
        present[rng.integers(n_years)] = True
        region = "north" if firm % 2 else "south"
        code = f"f{firm // 2:02d}" if two_part else f"f{firm:02d}"
        rows += [(region, code, 2001 + t) for t in np.flatnonzero(present)]
    frame = pd.DataFrame(rows, columns=["region", "firm_id", "year"])
    if not two_part:
        frame = frame.drop(columns="region")
    n = len(frame)
    frame["sales"] = rng.normal(100.0, 15.0, n).round(2)
    frame["capital"] = rng.normal(50.0, 8.0, n).round(2)
    if "exact" in defects:
        frame = pd.concat([frame, frame.sample(int(rng.integers(1, 4)), random_state=seed % 991)])
    if "conflict" in defects:
        extra = frame.sample(int(rng.integers(1, 4)), random_state=seed % 977).copy()
        extra["sales"] += rng.normal(5.0, 1.0, len(extra)).round(2)
        frame = pd.concat([frame, extra])
    frame = frame.reset_index(drop=True)
    frame["firm_id"] = frame["firm_id"].astype(object)
    frame["year"] = frame["year"].astype("Int64")
    n = len(frame)
    if "lookalike" in defects:
        # outer spaces and case: the same firm written differently on some rows
        pick = rng.random(n) < 0.15
        frame.loc[pick, "firm_id"] = [f" {v.upper()} " for v in frame.loc[pick, "firm_id"]]
    if "missing-key" in defects:
        frame.loc[rng.random(n) < 0.06, "firm_id"] = rng.choice(["", " ", None])
        if two_part:
            frame.loc[rng.random(n) < 0.04, "region"] = None
        frame.loc[rng.random(n) < 0.06, "year"] = pd.NA
    if "missing-value" in defects:
        frame.loc[rng.random(n) < 0.08, "sales"] = np.nan
        frame.loc[rng.random(n) < 0.08, "capital"] = np.nan
    frame["firm_id"] = frame["firm_id"].astype("str")
    return frame.iloc[rng.permutation(n)].reset_index(drop=True)


def _key_text(table: pd.DataFrame, key: list[str]) -> pd.Series:
    """Keys as comparable text; a missing part reads '<NA>' on both sides."""
    text = pd.Series("", index=table.index, dtype=object)
    for column in key:
        part = table[column].astype(object).where(table[column].notna(), "<NA>")
        text = text + "|" + part.map(str)
    return text.astype(str)


policies = st.builds(
    Policies,
    duplicates=st.sampled_from(DUPLICATES),
    normalise_ids=st.sampled_from(NORMALISE),
    singletons=st.sampled_from(SINGLETONS),
    balance=st.sampled_from(BALANCE),
    window=st.sampled_from([(None, None), ("2002", None), (None, "2004"), ("2002", "2005")]),
)


@settings(max_examples=examples(40), deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    seed=st.integers(0, 2**31 - 1),
    defects=st.sets(st.sampled_from(["exact", "conflict", "lookalike", "missing-key",
                                     "missing-value"])),
    policy=policies,
    transforms=st.sets(st.sampled_from(TRANSFORMS), min_size=1).map(sorted),
    two_part=st.booleans(),
)
def test_every_input_row_is_kept_or_in_the_ledger_once(seed, defects, policy, transforms,
                                                       two_part):
    frame = _panel(seed, defects, two_part)
    entity = ["region", "firm_id"] if two_part else ["firm_id"]
    key = [*entity, "year"]
    options = PrepareOptions(entity=entity, time="year", y="sales", x=["capital"],
                             transforms=transforms, policies=policy,
                             # rows without a key are a cleaning step here, not a gate failure
                             severities={"key-missing": "warning"})
    try:
        prep = prepare_frame(frame, options)
    except InputError as err:
        # a policy may remove every row; that is refused, never written
        assert "no rows left" in str(err)
        event("no rows left")
        return
    if prep.tables:
        event("written")
        clean, dropped = prep.tables["clean"], prep.tables["dropped"]
        assert len(frame) == len(clean) + len(dropped)
        if policy.duplicates != "fail":
            assert not clean.duplicated(key).any()
        if policy.normalise_ids == "none":
            # the very same keys, as a multiset: kept rows and ledger rows make up the input
            both = pd.concat([_key_text(clean, key), _key_text(dropped, key)]).sort_values()
            assert both.tolist() == _key_text(frame, key).sort_values().tolist()
    else:
        event("gate failed")
        dropped = prep.ledger.to_frame(frame, key)
    rows = dropped[N.row].to_numpy() - 1  # the file counts data rows from 1
    assert len(np.unique(rows)) == len(rows)
    assert ((rows >= 0) & (rows < len(frame))).all()
    source = frame[key].iloc[rows].reset_index(drop=True)
    pd.testing.assert_frame_equal(dropped[key], source)
    assert dropped[N.reason].notna().all() and dropped[N.step].notna().all()
    if prep.tables:
        # each input row is in clean or in the ledger, once, under the same numbering
        kept = prep.tables["clean"][N.row].to_numpy() - 1
        assert sorted([*kept, *rows]) == list(range(len(frame)))
        if policy.normalise_ids == "none" and policy.duplicates != "mean":
            kept_keys = frame[key].iloc[kept].reset_index(drop=True)
            pd.testing.assert_frame_equal(prep.tables["clean"][key], kept_keys,
                                          check_dtype=False)
