"""The numbers behind the report's pictures, computed from the panel index.

``picture_data`` turns a sample's integer codes into small, JSON-ready
arrays: which entity is present in which period (for a stated, deterministic
sample of entities), how many rows each entity has, how a variable's spread
splits into within and between entities, and the distribution of theta_i.
Everything that grows with the data is a bincount, a unique or a fancy-index
assignment on the codes; the only loop is over variables.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from panelprep._groups import group_counts
from panelprep.checks.context import AuditContext
from panelprep.index import PanelIndex
from panelprep.variation import within_measures

MAX_ENTITIES = 200
MAX_PERIODS = 240

# the four states of a presence-map cell: outside the entity's span on either
# side, observed, or a hole inside the span
BEFORE, PRESENT, HOLE, AFTER = 0, 1, 2, 3
STATE_WORDS = {str(BEFORE): "before entry", str(PRESENT): "observed",
               str(HOLE): "hole inside the span", str(AFTER): "after exit"}

SHARE_DEFINITION = (
    "within variance share = sd_within^2 / (sd_within^2 + sd_between^2), from the variation "
    "table (sd_within with denominator n - N, sd_between the ddof-1 SD of the N entity means); "
    "between share = 1 - within variance share"
)
THETA_DEFINITION = "theta_i = 1 - sqrt(s2_e / (T_i s2_u + s2_e)), one value per entity"


def picture_data(
    source: AuditContext | PanelIndex,
    theta: np.ndarray | None = None,
    max_entities: int = MAX_ENTITIES,
    max_periods: int = MAX_PERIODS,
    variation: dict[str, dict] | None = None,
    missing: dict[str, Any] | None = None,
) -> dict[str, Any]:
    """The data of every picture on the HTML page, JSON-serialisable.

    Parameters
    ----------
    source : AuditContext or PanelIndex
        With an ``AuditContext`` the pictures describe its estimation sample
        (``sample_index``) and, unless ``variation`` is given, its variation
        table.  With a ``PanelIndex`` they describe its keyed rows.
    theta : ndarray (N,), optional
        theta_i per entity, aligned with the entity codes of the sample.
    max_entities : int
        Most entity rows in the presence map.  Entities are sorted by entry
        period, then exit period, then key; with N > max_entities, every k-th
        entity of that order is shown, k = ceil(N / max_entities), starting
        with the first.
    max_periods : int
        Most period columns in the presence map.  With P periods and P >
        max_periods, consecutive periods are grouped in blocks of m = ceil(P /
        max_periods); a cell is present when the entity has a row in any
        period of its block.
    variation : dict, optional
        A variation table (``variation_table`` output); when absent and
        ``source`` is an ``AuditContext``, the context's own.
    missing : dict, optional
        :func:`missing_picture` of the audit; when absent and ``source`` is an
        ``AuditContext``, the context's own.

    Returns
    -------
    dict with keys ``presence`` (``states`` rows x columns of cell states,
    ``legend`` the words of each state: 0 before entry, 1 observed, 2 hole
    inside the span, 3 after exit; ``entities`` of each row, sorted by entry,
    then exit, then key; ``periods`` labels of each column, ``rule`` in words,
    ``entities_total``, ``entities_shown``, ``entity_step``, ``periods_total``,
    ``period_block``), ``flow`` (per column of the map: ``present_most``
    entities present in one period of it, ``entering`` and ``last_seen``
    entities whose first and last period lie in it), ``missing`` (None, or
    :func:`missing_picture`), ``obs_per_entity`` (``rows`` distinct rows-per-entity
    values with ``entities`` how many entities have each, ``periods`` the same
    for distinct periods observed), ``share`` (per variable ``within``,
    ``between`` or None when undefined, and ``definition``) and ``theta``
    (None, or distinct ``values`` with ``entities`` counts, ``min``,
    ``median``, ``max``, ``definition`` and ``shown`` for the rows of the
    presence map, in its order).

    Raises
    ------
    ValueError
        When ``theta`` does not hold one value per entity, or a maximum is
        below 1.
    """
    if max_entities < 1 or max_periods < 1:
        raise ValueError("max_entities and max_periods must be at least 1")
    if isinstance(source, AuditContext):
        index = source.sample_index
        entity, period, _ = source.sample_cells
        rows_per_entity = source.sample_counts
        variation = source.variation if variation is None else variation
    else:
        index = source
        keyed = index.keyed
        n_periods = max(index.n_periods, 1)
        cells = index.sorted_cells
        entity, period = cells // n_periods, cells % n_periods
        rows_per_entity = group_counts(index.entity_codes[keyed], index.n_entities)
    n_entities, n_periods = index.n_entities, max(index.n_periods, 0)
    periods_per_entity = group_counts(entity, n_entities)
    entry = np.full(n_entities, n_periods, dtype=np.int64)
    leave = np.full(n_entities, -1, dtype=np.int64)
    if len(entity):
        # the cells are sorted by entity, then period: a segment's ends are its entry and exit
        first = np.flatnonzero(np.r_[True, entity[1:] != entity[:-1]])
        last = np.r_[first[1:] - 1, len(entity) - 1]
        entry[entity[first]] = period[first]
        leave[entity[first]] = period[last]

    step = max(1, math.ceil(n_entities / max_entities))
    # rows sorted by entry, then exit, then key; every step-th of that order is shown
    order = np.lexsort((np.arange(n_entities), leave, entry))
    chosen = order[::step]
    block = max(1, math.ceil(n_periods / max_periods))
    n_columns = math.ceil(n_periods / block)
    position = np.full(n_entities, -1, dtype=np.int64)
    position[chosen] = np.arange(len(chosen))
    states = np.full((len(chosen), n_columns), HOLE, dtype=np.int8)
    column = np.arange(n_columns)
    states[column[None, :] < (entry[chosen] // block)[:, None]] = BEFORE
    states[column[None, :] > (leave[chosen] // block)[:, None]] = AFTER
    shown = position[entity] >= 0 if len(entity) else np.zeros(0, dtype=bool)
    states[position[entity[shown]], period[shown] // block] = PRESENT
    starts = np.arange(n_columns, dtype=np.int64) * block
    labels = _column_labels(index, starts, block, n_periods)
    has = periods_per_entity > 0
    # binned by column from the periods that occur: nothing walks the grid itself
    occurring, present = np.unique(period, return_counts=True)
    present_most = np.zeros(n_columns, dtype=np.int64)
    np.maximum.at(present_most, occurring // block, present)

    def per_column(periods: np.ndarray) -> list[int]:
        return np.bincount(periods // block, minlength=n_columns).astype(np.int64).tolist()

    out: dict[str, Any] = {
        "presence": {
            "states": states.tolist(),
            "legend": dict(STATE_WORDS),
            "entities": index.entity_key(chosen),
            "periods": labels,
            "entities_total": int(n_entities),
            "entities_shown": len(chosen),
            "entity_step": step,
            "periods_total": int(n_periods),
            "period_block": block,
            "rule": _rule(n_entities, step, len(chosen), n_periods, block),
        },
        "flow": {
            "periods": labels,
            "present_most": present_most.tolist(),
            "entering": per_column(entry[has]),
            "last_seen": per_column(leave[has]),
            "period_block": block,
        },
        "missing": missing if missing is not None else (
            missing_picture(source, max_periods) if isinstance(source, AuditContext) else None),
        "obs_per_entity": {
            "rows": _distribution(rows_per_entity),
            "periods": _distribution(periods_per_entity),
        },
        "share": {"variables": _shares(variation or {}), "definition": SHARE_DEFINITION},
        "theta": None,
    }
    if theta is not None:
        theta = np.asarray(theta, dtype=np.float64).ravel()
        if len(theta) != n_entities:
            raise ValueError(f"theta has {len(theta)} values for {n_entities} entities")
        values, counts = np.unique(theta, return_counts=True)
        out["theta"] = {
            "values": values.tolist(),
            "entities": counts.tolist(),
            "min": float(values[0]) if len(values) else None,
            "median": float(np.median(theta)) if len(theta) else None,
            "max": float(values[-1]) if len(values) else None,
            "shown": theta[chosen].tolist(),
            "definition": THETA_DEFINITION,
        }
    return out


def _column_labels(index: PanelIndex, starts: np.ndarray, block: int, n_periods: int) -> list[str]:
    """The label of each column of periods: its period, or "first–last" of its block."""
    if len(starts) == 0:
        return []
    labels = index.period_labels(starts)
    if block == 1:
        return labels
    ends = index.period_labels(np.minimum(starts + block - 1, n_periods - 1))
    return [a if a == b else f"{a}–{b}" for a, b in zip(labels, ends)]


def _distribution(per_entity: np.ndarray) -> dict[str, list[int]]:
    """Distinct values of a per-entity count and how many entities have each."""
    values, counts = np.unique(per_entity, return_counts=True)
    return {"values": values.tolist(), "entities": counts.tolist()}


def _shares(variation: dict[str, dict]) -> dict[str, dict[str, float | None]]:
    """Within variance share and between share per variable; None when undefined.

    The share is ``variation.within_measures``'s ``within_variance_share``
    (``SHARE_DEFINITION``), the number the variation table shows under that
    name; undefined means a missing SD, or both SDs zero up to a tolerance of
    1e-12 times the variable's largest absolute value (squared).
    """
    out: dict[str, dict[str, float | None]] = {}
    for name, row in variation.items():
        share = within_measures(row)["within_variance_share"]
        out[name] = ({"within": None, "between": None} if share is None
                     else {"within": share, "between": 1.0 - share})
    return out


def _rule(n_entities: int, step: int, shown: int, n_periods: int, block: int) -> str:
    """The sampling rule of the presence map in words, for the page to print."""
    if step == 1:
        rows = f"all {n_entities:,} entities, sorted by entry, then exit, then key"
    else:
        rows = (f"{shown:,} of {n_entities:,} entities: every k-th entity in the order by "
                f"entry, then exit, then key (k = {step}), starting with the first")
    if block == 1:
        columns = f"each of the {n_periods:,} periods"
    else:
        columns = (f"{n_periods:,} periods grouped in blocks of {block} consecutive periods "
                   "(a cell is present when the entity has a row in any period of its block)")
    return f"Rows: {rows}. Columns: {columns}."


def missing_picture(ctx: AuditContext, max_periods: int = MAX_PERIODS) -> dict[str, Any] | None:
    """Share of the keyed rows missing each variable, per period (blocks as the presence map).

    ``share[j][c]`` is the missing cells of variable j over the keyed rows
    (exact repeats collapsed) in column c's periods; None where a column
    holds no row.  None when no variable is selected.
    """
    if not ctx.variables:
        return None
    present, rows, missing = ctx.missing_by_period
    n_periods = max(ctx.index.n_periods, 1)
    block = max(1, math.ceil(n_periods / max_periods))
    starts = np.arange(0, n_periods, block, dtype=np.int64)
    labels = _column_labels(ctx.index, starts, block, n_periods)
    # each period that occurs adds to its column; the grid itself is never walked
    column = present // block
    column_rows = np.bincount(column, weights=rows, minlength=len(starts)).astype(np.int64)
    column_missing = np.zeros((len(starts), missing.shape[1]), dtype=np.int64)
    np.add.at(column_missing, column, missing)
    with np.errstate(invalid="ignore", divide="ignore"):
        share = column_missing / column_rows[:, None]
    return {
        "variables": list(ctx.variables),
        "periods": labels,
        "rows": column_rows.tolist(),
        "missing": column_missing.T.tolist(),
        "share": [[None if not math.isfinite(v) else float(v) for v in col]
                  for col in share.T.tolist()],
        "period_block": block,
    }
