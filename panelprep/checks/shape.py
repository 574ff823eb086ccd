"""Checks on the panel's shape over time: holes, off-grid periods, balance, singletons.

All counts are taken on the estimation sample's distinct (entity, period)
pairs, sorted by entity then period, so every rule is a diff or a segment
reduction over that one sorted array.
"""

from __future__ import annotations

import numpy as np

from panelprep.checks.base import Check, check
from panelprep.checks.context import AuditContext
from panelprep.findings import MAX_EXAMPLES
from panelprep.limits import grid_is_large

PRESENT, ABSENT = "■", "·"


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
        f"{len(with_gaps)} entit(ies) have holes in their time series "
        f"({int(missing.sum())} periods missing inside spans, longest {int(longest.max())})",
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
        f"{len(rows)} row(s) have time values off the {ctx.index.axis.name} grid; "
        "each is counted in the period that contains it",
        ctx.row_key(rows[:MAX_EXAMPLES]),
    )


def presence_patterns(ctx: AuditContext, top: int = 5) -> list[dict] | None:
    """Most common presence patterns over the grid (None when the grid is too long)."""
    n_periods = ctx.sample_index.n_periods
    if n_periods <= 0 or n_periods > ctx.thresholds.max_pattern_periods:
        return None
    entity, period, starts = ctx.sample_cells
    if len(entity) == 0:
        return []
    words = (n_periods + 63) // 64
    masks = np.empty((len(starts), words), dtype=np.uint64)
    bit = np.left_shift(np.uint64(1), (period % 64).astype(np.uint64))
    for w in range(words):
        in_word = np.where(period // 64 == w, bit, np.uint64(0))
        masks[:, w] = np.bitwise_or.reduceat(in_word, starts)
    uniq, inverse, counts = np.unique(masks, axis=0, return_inverse=True, return_counts=True)
    inverse = inverse.reshape(-1)
    ranking = np.lexsort((np.arange(len(counts)), -counts))[:top]
    out = []
    for rank in ranking:
        bits = np.unpackbits(uniq[rank].view(np.uint8), bitorder="little")[:n_periods]
        out.append({
            "pattern": "".join(PRESENT if b else ABSENT for b in bits),
            "entities": int(counts[rank]),
            "share": float(counts[rank] / len(starts)),
        })
    return out


@check("panel-shape", "info", "balance, observations per entity and presence patterns")
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
        "patterns": presence_patterns(ctx),
    }
    shape = "balanced" if is_balanced else "unbalanced"
    message = (f"{shape}: {ix.n_entities} entities over {ix.n_periods} periods ({first} to "
               f"{last}); {int((per_entity < ix.n_periods).sum())} entit(ies) miss at least one "
               "period")
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
        f"{len(single)} entit(ies) have a single observation; a within transform removes them",
        [{"entity": key} for key in ctx.sample_index.entity_key(single[:MAX_EXAMPLES])],
    )


CHECKS = [time_gaps, off_grid, balance, singletons]
# the checks whose findings depend on which rows the estimation sample holds
SAMPLE_CHECKS = [time_gaps, balance, singletons]
