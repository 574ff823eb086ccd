"""Checks on the panel's shape over time: holes, off-grid periods, balance, singletons.

All counts are taken on the estimation sample's distinct (entity, period)
pairs, sorted by entity then period, so every rule is a diff or a segment
reduction over that one sorted array.
"""

from __future__ import annotations

import numpy as np

from panelprep._groups import occurring
from panelprep.checks.base import Check, check
from panelprep.checks.context import AuditContext
from panelprep.findings import MAX_EXAMPLES
from panelprep.limits import grid_is_large
from panelprep.words import plural, plural_word


@check("period-holes", "warning", "periods missing between an entity's first and last observation")
def time_gaps(ctx: AuditContext, self: Check):
    holes, longest, missing = ctx.gaps
    with_gaps = np.flatnonzero(holes > 0)
    if len(with_gaps) == 0:
        return None
    worst = with_gaps[np.lexsort((with_gaps, -longest[with_gaps]))][:MAX_EXAMPLES]
    keys = ctx.sample_index.entity_key(worst)
    examples = [
        {"entity": key, "gaps": int(holes[e]), "longest_gap": int(longest[e]),
         "periods_missing": int(missing[e])}
        for key, e in zip(keys, worst)
    ]
    return self.finding(
        len(with_gaps),
        f"{plural(len(with_gaps), 'entity')} {plural_word(len(with_gaps), 'has')} holes in "
        f"{'its' if len(with_gaps) == 1 else 'their'} time series "
        f"({plural(int(missing.sum()), 'period')} missing inside spans, longest "
        f"{int(longest.max())})",
        examples,
        {"periods_missing": int(missing.sum()), "longest_gap": int(longest.max()),
         "gap_episodes": int(holes.sum())},
    )


@check("period-off-grid", "warning", "time values not on the inferred period grid")
def off_grid(ctx: AuditContext, self: Check):
    rows = np.flatnonzero(ctx.index.axis.off_grid & ctx.keyed)
    if len(rows) == 0:
        return None
    return self.finding(
        len(rows),
        f"{plural(len(rows), 'row')} {plural_word(len(rows), 'has')} time values off the "
        f"{ctx.index.axis.name} grid; each is counted in the period that contains it",
        ctx.row_key(rows[:MAX_EXAMPLES]),
    )


# the coverage summary's size, whatever the grid's length
MAX_SPELL_GROUPS = 8
MAX_BANDS = 12


def coverage(ctx: AuditContext) -> dict:
    """How the sample's entities cover the period grid, in a size bounded by the grid.

    Each entity has a spell: its first period (entry), its last period
    (exit) and the holes inside (runs of absent periods).  Entities are
    grouped by (entry, exit, holes) and the ``MAX_SPELL_GROUPS`` largest
    groups are listed (``spells``, periods as labels; ties by entry, then
    exit, then holes).  ``bands`` cuts the grid into at most ``MAX_BANDS``
    runs of consecutive periods: per band the fewest and most entities
    present in one of its periods, how many entities enter (first period in
    the band) and how many are last seen there.  ``runs`` counts entities by
    their number of observed runs (holes + 1).  One lexsort of the
    spells and a few bincounts: no loop over entities or periods.
    """
    ix = ctx.sample_index
    n_entities, n_periods = int(ix.n_entities), int(ix.n_periods)
    entity, period, starts = ctx.sample_cells
    if n_entities == 0 or n_periods <= 0 or len(entity) == 0:
        return {"spells": [], "spell_groups": 0, "bands": [], "runs": {},
                "entities_full": 0, "from_first": 0, "to_last": 0}
    entry = period[starts]
    stops = np.append(starts[1:], len(period)) - 1
    leave = period[stops]
    holes = ctx.gaps[0][entity[starts]]
    # groups of equal (entry, exit, holes) from one lexsort: no code mixing the three can
    # overflow, whatever the grid's length
    order = np.lexsort((holes, leave, entry))
    spell = np.column_stack([entry[order], leave[order], holes[order]])
    new = np.ones(len(spell), dtype=bool)
    new[1:] = (spell[1:] != spell[:-1]).any(axis=1)
    firsts = np.flatnonzero(new)
    groups = spell[firsts]
    counts = np.diff(np.append(firsts, len(spell)))
    ranking = np.lexsort((groups[:, 2], groups[:, 1], groups[:, 0], -counts))[:MAX_SPELL_GROUPS]
    top_entry, top_leave, top_holes = groups[ranking].T
    entry_labels = ix.period_labels(top_entry) if len(ranking) else []
    leave_labels = ix.period_labels(top_leave) if len(ranking) else []
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
    occurs, _, present = occurring(period, n_periods)
    band = occurs // width
    most = np.zeros(n_bands, dtype=np.int64)
    np.maximum.at(most, band, present)
    fewest = np.full(n_bands, np.iinfo(np.int64).max)
    np.minimum.at(fewest, band, present)
    # a band with a period nobody is present in has 0 at its fewest
    fewest[np.bincount(band, minlength=n_bands) < last - first + 1] = 0
    entering = np.bincount(entry // width, minlength=n_bands)
    leaving = np.bincount(leave // width, minlength=n_bands)
    first_labels, last_labels = ix.period_labels(first), ix.period_labels(last)
    bands = [
        {"first": a, "last": b, "periods": int(z - f + 1), "present_fewest": int(lo),
         "present_most": int(hi), "entering": int(i), "last_seen": int(o)}
        for a, b, f, z, lo, hi, i, o in zip(
            first_labels, last_labels, first.tolist(), last.tolist(), fewest.tolist(),
            most.tolist(), entering.tolist(), leaving.tolist())
    ]
    run_values, run_counts = np.unique(holes + 1, return_counts=True)
    full = int((ctx.periods_per_entity == n_periods).sum())
    return {
        "spells": spells,
        "spell_groups": len(groups),
        "entities_full": full,
        "from_first": int((entry == 0).sum()),
        "to_last": int((leave == n_periods - 1).sum()),
        "runs": {str(v): int(c) for v, c in zip(run_values.tolist(), run_counts.tolist())},
        "bands": bands,
    }


@check("panel-shape", "info", "balance, observations per entity and coverage of the grid")
def balance(ctx: AuditContext, self: Check):
    ix = ctx.sample_index
    per_entity = ctx.periods_per_entity
    if ix.n_entities == 0:
        # nothing is left to estimate on: a gate must not pass this as a clean panel
        return self.finding(0, f"the estimation sample is empty: {_why_empty(ctx)}",
                            severity="error")
    is_balanced = bool((per_entity == ix.n_periods).all())
    values, counts = np.unique(per_entity, return_counts=True)
    first, last = ix.period_labels([0, ix.n_periods - 1])
    details = {
        "balanced": is_balanced,
        "entities": int(ix.n_entities),
        "periods": int(ix.n_periods),
        "first_period": first,
        "last_period": last,
        "obs_per_entity": {"min": int(per_entity.min()), "median": float(np.median(per_entity)),
                           "max": int(per_entity.max())},
        "obs_per_entity_counts": {str(int(v)): int(c) for v, c in zip(values, counts)},
        "coverage": coverage(ctx),
    }
    shape = "balanced" if is_balanced else "unbalanced"
    missing_one = int((per_entity < ix.n_periods).sum())
    message = (f"{shape}: {plural(int(ix.n_entities), 'entity')} over "
               f"{plural(int(ix.n_periods), 'period')} ({first} to {last}); "
               f"{plural(missing_one, 'entity')} {'misses' if missing_one == 1 else 'miss'} at "
               "least one period")
    # shapes no panel method can use are warnings, so a gate on warnings stops them
    degenerate = _degenerate(ctx)
    if degenerate:
        message += "; " + degenerate
    return self.finding(int((per_entity < ix.n_periods).sum()), message, details=details,
                        severity="warning" if degenerate else None)


def _degenerate(ctx: AuditContext) -> str:
    """Why the sample's shape defeats panel methods, or '' when it does not."""
    ix = ctx.sample_index
    if grid_is_large(ix.n_periods, ctx.thresholds.max_grid_periods):
        occurring = len(np.unique(ctx.sample_cells[1]))
        return (f"the grid spans {ix.n_periods:,} {ix.axis.name} periods for {occurring:,} "
                "that occur: look for mistyped time values")
    if ix.n_entities == 1:
        return "only one entity: there is no variation between entities"
    if ix.n_periods == 1:
        return "only one period: there is no variation within entities"
    return ""


def _why_empty(ctx: AuditContext) -> str:
    """Which rule removed the last rows, for the empty-sample message."""
    if not ctx.keyed.any():
        return "no row has both an entity and a time value"
    base = ctx.base
    if ctx.variables and base.any():
        absent = np.isnan(ctx.values[base]).all(axis=0)
        if absent.any():
            names = ", ".join(v for v, a in zip(ctx.variables, absent) if a)
            return f"{names} ha{'s' if absent.sum() == 1 else 've'} no usable value in any keyed row"
    return "no keyed row has every selected variable present"


@check("entity-single-obs", "warning", "entities observed once")
def singletons(ctx: AuditContext, self: Check):
    counts = ctx.periods_per_entity
    single = np.flatnonzero(counts == 1)
    if len(single) == 0:
        return None
    return self.finding(
        len(single),
        f"{plural(len(single), 'entity')} {plural_word(len(single), 'has')} a single "
        f"observation; a within transform removes {'it' if len(single) == 1 else 'them'}",
        [{"entity": key} for key in ctx.sample_index.entity_key(single[:MAX_EXAMPLES])],
    )


CHECKS = [time_gaps, off_grid, balance, singletons]
# the checks whose findings depend on which rows the estimation sample holds
SAMPLE_CHECKS = [time_gaps, balance, singletons]
