"""Property tests: random unbalanced panels with a known number of each defect.

The generator decides the truth first (which entity gets which holes, how many
rows are repeated, which keys conflict, which rows lose a value) and builds the
frame from that plan; the expected counts are read off the plan, never computed
by panelprep.  The frequency is passed explicitly: inferring it is tested in
test_timeaxis.py, and a random subset of periods can honestly look like another
grid (only even years, say).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from conftest import examples
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from panelprep.pipeline import audit

SETTINGS = settings(max_examples=examples(60), deadline=None,
                    suppress_health_check=[HealthCheck.too_slow])

ROLES = ("full", "gap", "single", "new-single", "hole-by-missing", "tail-missing", "lost")


@dataclass
class Entity:
    """What the plan says about one entity."""

    key: str
    role: str
    periods: list[int]            # periods with a row, before any deletion
    dropped: set[int]             # periods whose row misses a variable
    gap_runs: int = 0             # holes in the estimation sample, by construction
    longest: int = 0

    @property
    def sample(self) -> list[int]:
        return [p for p in self.periods if p not in self.dropped]


@dataclass
class Plan:
    entities: list[Entity]
    repeats: int = 0
    conflicts: int = 0
    no_entity: int = 0
    no_time: int = 0
    no_both: int = 0
    extra: list[dict] = field(default_factory=list)


@st.composite
def entity_plans(draw, index: int, role: str) -> Entity:
    start = draw(st.integers(0, 5))
    key = f"{index:04d}"  # leading zeros, as firm ids often have
    if role == "single":
        return Entity(key, role, [start], set())
    if role == "gap":
        # observed block, hole, observed block, ...: runs and longest are known by construction
        holes = draw(st.lists(st.integers(1, 3), min_size=1, max_size=3))
        blocks = draw(st.lists(st.integers(1, 3), min_size=len(holes) + 1,
                               max_size=len(holes) + 1))
        periods, at = [], start
        for j, block in enumerate(blocks):
            periods += list(range(at, at + block))
            at += block + (holes[j] if j < len(holes) else 0)
        return Entity(key, role, periods, set(), len(holes), max(holes))
    length = draw(st.integers({"full": 2, "new-single": 2, "lost": 1}.get(role, 3), 6))
    periods = list(range(start, start + length))
    if role == "full":
        return Entity(key, role, periods, set())
    if role == "new-single":
        kept = draw(st.sampled_from(periods))
        return Entity(key, role, periods, set(periods) - {kept})
    if role == "hole-by-missing":
        hole = draw(st.sampled_from(periods[1:-1]))
        return Entity(key, role, periods, {hole}, 1, 1)
    if role == "tail-missing":
        return Entity(key, role, periods, {periods[-1]})
    return Entity(key, role, periods, set(periods))  # lost: every row misses a value


def time_value(kind: str, period: int):
    if kind == "year":
        return 2000 + period
    if kind == "quarter":
        return f"{2000 + period // 4}Q{period % 4 + 1}"
    stamp = pd.Timestamp(year=2000 + period // 12, month=period % 12 + 1, day=1)
    return stamp + pd.offsets.MonthEnd(0)


FREQ = {"year": "year", "quarter": "quarter", "month-end": "month"}


@st.composite
def planted_panels(draw):
    roles = draw(st.lists(st.sampled_from(ROLES), min_size=1, max_size=8))
    roles[0] = draw(st.sampled_from([r for r in ROLES if r != "lost"]))  # never an empty sample
    entities = [draw(entity_plans(i, role)) for i, role in enumerate(roles)]
    kind = draw(st.sampled_from(sorted(FREQ)))
    counter = iter(range(1, 10**6))

    rows = []
    for ent in entities:
        for p in ent.periods:
            x, y = float(next(counter)) + 0.25, float(next(counter)) * 2.0
            if p in ent.dropped:
                which = draw(st.sampled_from(["x", "y", "both"]))
                x = np.nan if which in ("x", "both") else x
                y = np.nan if which in ("y", "both") else y
            rows.append({"firm": ent.key, "t": time_value(kind, p), "x": x, "y": y,
                         "_period": p, "_ent": ent})
    plan = Plan(entities)

    # conflicting keys: a second, different row on distinct complete cells of entities
    # that keep at least two periods, so singletons and gaps are untouched
    eligible = [i for i, r in enumerate(rows)
                if r["_ent"].role in ("full", "gap") and r["_period"] not in r["_ent"].dropped]
    chosen = draw(st.lists(st.sampled_from(eligible), unique=True, max_size=3)) if eligible else []
    for i in chosen:
        rows.append({**rows[i], "x": float(next(counter)) + 0.5})
    plan.conflicts = len(chosen)

    # exact repeats of any row already written (a row written three times counts two)
    originals = list(range(len(rows)))
    copies = draw(st.lists(st.sampled_from(originals), max_size=4))
    rows += [dict(rows[i]) for i in copies]
    plan.repeats = len(copies)

    # rows without a key; their other parts may point anywhere, even outside the panel
    for kind_missing in draw(st.lists(st.sampled_from(["entity", "time", "both"]), max_size=4)):
        ent = draw(st.sampled_from(entities))
        period = draw(st.integers(0, 40))
        rows.append({"firm": None if kind_missing in ("entity", "both") else ent.key,
                     "t": None if kind_missing in ("time", "both") else time_value(kind, period),
                     "x": float(next(counter)), "y": 1.0})
        plan.no_entity += kind_missing == "entity"
        plan.no_time += kind_missing == "time"
        plan.no_both += kind_missing == "both"

    seed = draw(st.integers(0, 2**32 - 1))
    frame = pd.DataFrame([{k: r[k] for k in ("firm", "t", "x", "y")} for r in rows])
    if kind == "month-end":
        frame["t"] = pd.to_datetime(frame["t"])
    frame = frame.iloc[np.random.default_rng(seed).permutation(len(frame))].reset_index(drop=True)
    return frame, plan, FREQ[kind]


@SETTINGS
@given(planted_panels())
def test_planted_defects_are_counted_exactly(case):
    frame, plan, freq = case
    report = audit(frame, entity="firm", time="t", vars=["x", "y"], freq=freq)
    panel = report.panel
    kept = [e for e in plan.entities if e.role != "lost"]
    samples = [e.sample for e in kept]
    low = min(min(s) for s in samples)
    high = max(max(s) for s in samples)

    assert panel["exact_duplicate_rows"] == plan.repeats
    assert panel["conflicting_duplicate_keys"] == plan.conflicts
    missing_keys = plan.no_entity + plan.no_time + plan.no_both
    assert panel["rows_without_key"] == missing_keys
    if missing_keys:
        assert report.finding("key-missing").details == {
            "rows_without_entity": plan.no_entity + plan.no_both,
            "rows_without_time": plan.no_time + plan.no_both,
        }
    assert panel["entities"] == len(kept)
    assert panel["periods"] == high - low + 1
    assert panel["rows"] == sum(len(s) for s in samples) + plan.conflicts
    assert panel["balanced"] is all(sorted(s) == list(range(low, high + 1)) for s in samples)

    gapped = {e.key: (e.gap_runs, e.longest) for e in kept if e.gap_runs}
    assert panel["entities_with_gaps"] == len(gapped)
    holes = report.finding("period-holes")
    if gapped:
        assert holes.count == len(gapped)
        for example in holes.examples:
            assert (example["gaps"], example["longest_gap"]) == gapped[example["entity"]]
        assert holes.details["longest_gap"] == max(longest for _, longest in gapped.values())
    else:
        assert holes is None

    singles = sorted(e.key for e in kept if len(e.sample) == 1)
    assert panel["singleton_entities"] == len(singles)
    new_single = sorted(e.key for e in plan.entities if e.role == "new-single")
    finding = report.finding("sample-new-singletons")
    assert (finding.count if finding else 0) == len(new_single)
    if finding:
        assert sorted(x["entity"] for x in finding.examples) == new_single[:10]

    dropped_rows = sum(len(e.dropped) for e in plan.entities)
    missing = report.finding("values-missing")
    assert (missing.details["rows_removed"] if missing else 0) == dropped_rows
    if missing:
        assert missing.details["entities_lost"] == sum(e.role == "lost" for e in plan.entities)
        assert missing.details["new_singletons"] == len(new_single)

    shape = report.finding("panel-shape").details
    per_entity = sorted(len(s) for s in samples)
    assert shape["obs_per_entity"] == {"min": per_entity[0], "median": float(np.median(per_entity)),
                                       "max": per_entity[-1]}
    assert report.variables["x"]["n"] == panel["rows"]


@st.composite
def holed_balanced_panels(draw):
    """A balanced N x T panel, then holes and late entries planted in chosen entities."""
    n_entities = draw(st.integers(2, 12))
    n_periods = draw(st.integers(3, 10))
    holes = {}   # entity -> interior periods removed
    late = set()  # entities whose first period is removed (unbalanced, but no hole)
    for e in range(n_entities):
        action = draw(st.sampled_from(["none", "none", "holes", "late"]))
        if action == "holes":
            holes[e] = set(draw(st.lists(st.integers(1, n_periods - 2), min_size=1, max_size=3)))
        elif action == "late":
            late.add(e)
    # keep entity 0 complete, so the panel's range stays the full N x T grid
    holes.pop(0, None)
    late.discard(0)
    rows = [{"unit": f"u{e:03d}", "wave": 1990 + p, "v": e * 100.0 + p}
            for e in range(n_entities) for p in range(n_periods)
            if p not in holes.get(e, set()) and not (e in late and p == 0)]
    return pd.DataFrame(rows), holes, late, n_periods


def _runs(periods: set[int]) -> tuple[int, int]:
    """Number of runs of consecutive integers in a set, and the longest run."""
    ordered = sorted(periods)
    runs, longest, current = 0, 0, 0
    for i, p in enumerate(ordered):
        current = current + 1 if i and p == ordered[i - 1] + 1 else 1
        runs += current == 1
        longest = max(longest, current)
    return runs, longest


@SETTINGS
@given(holed_balanced_panels())
def test_holes_in_a_balanced_panel(case):
    frame, holes, late, n_periods = case
    report = audit(frame, entity="unit", time="wave", freq="year")
    panel = report.panel
    assert panel["periods"] == n_periods
    assert panel["entities_with_gaps"] == len(holes)
    assert panel["balanced"] is (not holes and not late)
    assert panel["singleton_entities"] == 0
    finding = report.finding("period-holes")
    if holes:
        expected = {f"u{e:03d}": _runs(periods) for e, periods in holes.items()}
        shown = {x["entity"]: (x["gaps"], x["longest_gap"]) for x in finding.examples}
        assert shown == {k: expected[k] for k in shown}
        assert finding.details["periods_missing"] == sum(len(p) for p in holes.values())
    else:
        assert finding is None
    missing_somewhere = len(holes) + len(late)
    assert report.finding("panel-shape").count == missing_somewhere
