"""Checks on the panel's shape over time: holes, off-grid periods, balance, singletons.

All counts are taken on the estimation sample's distinct (entity, period)
pairs, sorted by entity then period, so every rule is a diff or a segment
reduction over that one sorted array.
"""

from __future__ import annotations

import numpy as np

from panelprep._groups import occurring
from panelprep.checks.base import Check, check, examples_of, row_ordered, tallied
from panelprep.checks.context import AuditContext, plain_value
from panelprep.findings import MAX_EXAMPLES, Finding
from panelprep.index import PanelIndex
from panelprep.limits import grid_is_large
from panelprep.words import plural, plural_word


def time_gaps_tally(ctx: AuditContext) -> dict:
    """Entities with holes: counts, the longest hole, the worst examples (longest first)."""
    holes, longest, missing = ctx.gaps
    with_gaps = np.flatnonzero(holes > 0)
    worst = with_gaps[np.lexsort((with_gaps, -longest[with_gaps]))][:MAX_EXAMPLES]
    ranks = entity_ranks(ctx.sample_index, worst)
    examples = [
        ((-int(longest[e]), rank), {"entity": key, "gaps": int(holes[e]),
                                    "longest_gap": int(longest[e]),
                                    "periods_missing": int(missing[e])})
        for key, rank, e in zip(ctx.sample_index.entity_key(worst), ranks, worst)
    ]
    return {"entities": len(with_gaps), "periods_missing": int(missing.sum()),
            "longest_max": int(longest.max()) if len(longest) else 0,
            "gap_episodes": int(holes.sum()), "examples": examples}


def time_gaps_finding(self: Check, tally: dict):
    entities, missing, longest = tally["entities"], tally["periods_missing"], tally["longest_max"]
    if entities == 0:
        return None
    return self.finding(
        entities,
        f"{plural(entities, 'entity')} {plural_word(entities, 'has')} holes in "
        f"{'its' if entities == 1 else 'their'} time series "
        f"({plural(missing, 'period')} missing inside spans, longest {longest})",
        examples_of(tally),
        {"periods_missing": missing, "longest_gap": longest,
         "gap_episodes": tally["gap_episodes"]},
    )


time_gaps = tallied("period-holes", "warning",
                    "periods missing between an entity's first and last observation",
                    time_gaps_tally, time_gaps_finding)


def entity_ranks(index: PanelIndex, codes: np.ndarray) -> list[tuple]:
    """Each entity's key values as a tuple: entity codes follow their order, so examples
    from different parts of a panel rank the way one index would rank them."""
    labels = index.entity_labels.iloc[np.asarray(codes, dtype=np.int64)]
    return [tuple(plain_value(v) for v in row) for row in labels.itertuples(index=False)]


def off_grid_tally(ctx: AuditContext) -> dict:
    """Rows whose time value is off the grid: the count and the first examples."""
    rows = np.flatnonzero(ctx.index.axis.off_grid & ctx.keyed)
    return {"rows": len(rows), "grid": ctx.index.axis.name,
            "examples": row_ordered(ctx.row_key(rows[:MAX_EXAMPLES]))}


def off_grid_finding(self: Check, tally: dict):
    rows = tally["rows"]
    if rows == 0:
        return None
    return self.finding(
        rows,
        f"{plural(rows, 'row')} {plural_word(rows, 'has')} time values off the "
        f"{tally['grid']} grid; each is counted in the period that contains it",
        examples_of(tally),
    )


off_grid = tallied("period-off-grid", "warning", "time values not on the inferred period grid",
                   off_grid_tally, off_grid_finding)


# the coverage summary's size, whatever the grid's length
MAX_SPELL_GROUPS = 8
MAX_BANDS = 12


def counted(values: np.ndarray) -> dict[int, int]:
    """``{value: how many times}`` of an int array, for a tally."""
    distinct, counts = np.unique(np.asarray(values, dtype=np.int64), return_counts=True)
    return dict(zip(distinct.tolist(), counts.tolist()))


def spread_of(counts: dict[int, int]) -> tuple[np.ndarray, np.ndarray]:
    """A per-value count dict as (values ascending, counts)."""
    values = np.array(sorted(counts), dtype=np.int64)
    return values, np.array([counts[v] for v in values.tolist()], dtype=np.int64)


def shape_tally(ctx: AuditContext) -> dict:
    """What the shape and coverage of the sample are built from, in grid ordinals.

    Per-value counts of the periods each entity is observed in (``obs``), of
    each spell (entry, exit, holes), of the entities present, entering and
    last seen in each period that occurs, and of the runs; the first and last
    period of the sample; the keyed, base and usable counts that say why an
    empty sample is empty.  Sums over entities and periods only, so the
    tallies of disjoint sets of entities add up (``base.merge_tallies``).
    """
    ix = ctx.sample_index
    entity, period, starts = ctx.sample_cells
    base = ctx.base
    usable = ({name: int((~np.isnan(ctx.values[base, j])).sum())
               for j, name in enumerate(ctx.variables)} if ix.n_entities == 0 else {})
    tally = {"entities": int(ix.n_entities), "obs": counted(ctx.periods_per_entity),
             "keyed": int(ctx.keyed.sum()), "base": int(base.sum()), "usable": usable,
             "first_min": None, "last_max": None, "spells": {}, "present": {},
             "entering": {}, "leaving": {}, "runs": {}}
    if ix.n_entities == 0 or ix.n_periods <= 0 or len(entity) == 0:
        return tally
    first = ix.first_period
    entry = period[starts]
    stops = np.append(starts[1:], len(period)) - 1
    leave = period[stops]
    holes = ctx.gaps[0][entity[starts]]
    # groups of equal (entry, exit, holes) from one lexsort: no code mixing the three can
    # overflow, whatever the grid's length
    order = np.lexsort((holes, leave, entry))
    spell = np.column_stack([entry[order] + first, leave[order] + first, holes[order]])
    new = np.ones(len(spell), dtype=bool)
    new[1:] = (spell[1:] != spell[:-1]).any(axis=1)
    starts_of = np.flatnonzero(new)
    sizes = np.diff(np.append(starts_of, len(spell)))
    occurs, _, present = occurring(period, ix.n_periods)
    tally.update({
        "first_min": int(first), "last_max": int(first + ix.n_periods - 1),
        "spells": {tuple(row): int(c) for row, c in zip(spell[starts_of].tolist(),
                                                        sizes.tolist())},
        "present": dict(zip((occurs + first).tolist(), present.tolist())),
        "entering": counted(entry + first), "leaving": counted(leave + first),
        "runs": counted(holes + 1),
    })
    return tally


def coverage(tally: dict, axis) -> dict:
    """How the sample's entities cover the period grid, in a size bounded by the grid.

    Each entity has a spell: its first period (entry), its last period
    (exit) and the holes inside (runs of absent periods).  Entities are
    grouped by (entry, exit, holes) and the ``MAX_SPELL_GROUPS`` largest
    groups are listed (``spells``, periods as labels; ties by entry, then
    exit, then holes).  ``bands`` cuts the grid into at most ``MAX_BANDS``
    runs of consecutive periods: per band the fewest and most entities
    present in one of its periods, how many entities enter (first period in
    the band) and how many are last seen there.  ``runs`` counts entities by
    their number of observed runs (holes + 1).  Built from a
    :func:`shape_tally` (``axis`` labels its grid ordinals): no loop over
    entities or periods.
    """
    n_entities = tally["entities"]
    if n_entities == 0 or not tally["spells"]:
        return {"spells": [], "spell_groups": 0, "bands": [], "runs": {},
                "entities_full": 0, "from_first": 0, "to_last": 0}
    first_period = tally["first_min"]
    n_periods = tally["last_max"] - first_period + 1
    keys = sorted(tally["spells"])
    groups = np.array(keys, dtype=np.int64).reshape(-1, 3)
    groups[:, :2] -= first_period
    counts = np.array([tally["spells"][k] for k in keys], dtype=np.int64)
    ranking = np.lexsort((groups[:, 2], groups[:, 1], groups[:, 0], -counts))[:MAX_SPELL_GROUPS]
    top_entry, top_leave, top_holes = groups[ranking].T
    entry_labels = axis.label(top_entry + first_period) if len(ranking) else []
    leave_labels = axis.label(top_leave + first_period) if len(ranking) else []
    spells = [
        {"entry": a, "exit": b, "holes": int(h), "entities": int(c),
         "share": float(c / n_entities), "from_first": bool(e == 0),
         "to_last": bool(x == n_periods - 1)}
        for a, b, h, c, e, x in zip(entry_labels, leave_labels, top_holes.tolist(),
                                    counts[ranking].tolist(), top_entry.tolist(),
                                    top_leave.tolist())
    ]
    width = -(-n_periods // MAX_BANDS)
    first = np.arange(0, n_periods, width, dtype=np.int64)
    last = np.minimum(first + width - 1, n_periods - 1)
    n_bands = len(first)
    # per period that occurs (never per period of the grid): entities present, by band
    occurring, present = spread_of(tally["present"])
    band = (occurring - first_period) // width
    most = np.zeros(n_bands, dtype=np.int64)
    np.maximum.at(most, band, present)
    fewest = np.full(n_bands, np.iinfo(np.int64).max)
    np.minimum.at(fewest, band, present)
    # a band with a period nobody is present in has 0 at its fewest
    fewest[np.bincount(band, minlength=n_bands) < last - first + 1] = 0
    entering = _by_band(tally["entering"], first_period, width, n_bands)
    leaving = _by_band(tally["leaving"], first_period, width, n_bands)
    first_labels = axis.label(first + first_period)
    last_labels = axis.label(last + first_period)
    bands = [
        {"first": a, "last": b, "periods": int(z - f + 1), "present_fewest": int(lo),
         "present_most": int(hi), "entering": int(i), "last_seen": int(o)}
        for a, b, f, z, lo, hi, i, o in zip(
            first_labels, last_labels, first.tolist(), last.tolist(), fewest.tolist(),
            most.tolist(), entering.tolist(), leaving.tolist())
    ]
    run_values, run_counts = spread_of(tally["runs"])
    return {
        "spells": spells,
        "spell_groups": len(groups),
        "entities_full": int(tally["obs"].get(n_periods, 0)),
        "from_first": int(tally["entering"].get(first_period, 0)),
        "to_last": int(tally["leaving"].get(first_period + n_periods - 1, 0)),
        "runs": {str(v): int(c) for v, c in zip(run_values.tolist(), run_counts.tolist())},
        "bands": bands,
    }


def _by_band(counts: dict[int, int], first_period: int, width: int, n_bands: int) -> np.ndarray:
    periods, sizes = spread_of(counts)
    return np.bincount((periods - first_period) // width, weights=sizes,
                       minlength=n_bands).astype(np.int64)


def obs_summary(obs: dict[int, int]) -> dict:
    """Min, median and max periods per entity from their per-value counts."""
    values, counts = spread_of(obs)
    return {"min": int(values[0]), "median": float(np.median(np.repeat(values, counts))),
            "max": int(values[-1])}


def shape_finding(self: Check, tally: dict, axis, thresholds) -> Finding:
    """The panel-shape finding from a :func:`shape_tally` (``axis`` labels the grid)."""
    n_entities = tally["entities"]
    if n_entities == 0:
        # nothing is left to estimate on: a gate must not pass this as a clean panel
        return self.finding(0, f"the estimation sample is empty: {_why_empty(tally)}",
                            severity="error")
    n_periods = tally["last_max"] - tally["first_min"] + 1
    values, counts = spread_of(tally["obs"])
    is_balanced = bool((values == n_periods).all())
    first, last = axis.label([tally["first_min"], tally["last_max"]])
    missing_one = int(counts[values < n_periods].sum())
    details = {
        "balanced": is_balanced,
        "entities": n_entities,
        "periods": n_periods,
        "first_period": first,
        "last_period": last,
        "obs_per_entity": obs_summary(tally["obs"]),
        "obs_per_entity_counts": {str(int(v)): int(c) for v, c in zip(values, counts)},
        "coverage": coverage(tally, axis),
    }
    shape = "balanced" if is_balanced else "unbalanced"
    message = (f"{shape}: {plural(n_entities, 'entity')} over "
               f"{plural(n_periods, 'period')} ({first} to {last}); "
               f"{plural(missing_one, 'entity')} {'misses' if missing_one == 1 else 'miss'} at "
               "least one period")
    # shapes no panel method can use are warnings, so a gate on warnings stops them
    degenerate = _degenerate(tally, n_periods, axis, thresholds)
    if degenerate:
        message += "; " + degenerate
    return self.finding(missing_one, message, details=details,
                        severity="warning" if degenerate else None)


@check("panel-shape", "info", "balance, observations per entity and coverage of the grid",
       tally=shape_tally, finish=shape_finding)
def balance(ctx: AuditContext, self: Check):
    return shape_finding(self, shape_tally(ctx), ctx.sample_index.axis, ctx.thresholds)


def _degenerate(tally: dict, n_periods: int, axis, thresholds) -> str:
    """Why the sample's shape defeats panel methods, or '' when it does not."""
    if grid_is_large(n_periods, thresholds.max_grid_periods):
        occurring = len(tally["present"])
        return (f"the grid spans {n_periods:,} {axis.name} periods for {occurring:,} "
                "that occur: look for mistyped time values")
    if tally["entities"] == 1:
        return "only one entity: there is no variation between entities"
    if n_periods == 1:
        return "only one period: there is no variation within entities"
    return ""


def _why_empty(tally: dict) -> str:
    """Which rule removed the last rows, for the empty-sample message."""
    if tally["keyed"] == 0:
        return "no row has both an entity and a time value"
    usable = tally["usable"]
    if usable and tally["base"] > 0:
        absent = [name for name, count in usable.items() if count == 0]
        if absent:
            return (f"{', '.join(absent)} ha{'s' if len(absent) == 1 else 've'} no usable "
                    "value in any keyed row")
    return "no keyed row has every selected variable present"


def singletons_tally(ctx: AuditContext) -> dict:
    """Entities observed once: the count and the first (in key order) as examples."""
    single = np.flatnonzero(ctx.periods_per_entity == 1)[:MAX_EXAMPLES]
    keys = ctx.sample_index.entity_key(single)
    return {"entities": int((ctx.periods_per_entity == 1).sum()),
            "examples": [(rank, {"entity": key})
                         for rank, key in zip(entity_ranks(ctx.sample_index, single), keys)]}


def singletons_finding(self: Check, tally: dict):
    single = tally["entities"]
    if single == 0:
        return None
    return self.finding(
        single,
        f"{plural(single, 'entity')} {plural_word(single, 'has')} a single "
        f"observation; a within transform removes {'it' if single == 1 else 'them'}",
        examples_of(tally),
    )


singletons = tallied("entity-single-obs", "warning", "entities observed once",
                     singletons_tally, singletons_finding)


CHECKS = [time_gaps, off_grid, balance, singletons]
# the checks whose findings depend on which rows the estimation sample holds
SAMPLE_CHECKS = [time_gaps, balance, singletons]
