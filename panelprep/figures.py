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
        Most entity rows in the presence map.  With N entities in key order
        and N > max_entities, every k-th entity is shown, k = ceil(N /
        max_entities), starting with the first.
    max_periods : int
        Most period columns in the presence map.  With P periods and P >
        max_periods, consecutive periods are grouped in blocks of m = ceil(P /
        max_periods); a cell is present when the entity has a row in any
        period of its block.
    variation : dict, optional
        A variation table (``variation_table`` output); when absent and
        ``source`` is an ``AuditContext``, the context's own.

    Returns
    -------
    dict with keys ``presence`` (``matrix`` rows x columns of bools,
    ``entities``, ``periods`` labels of each column, ``rule`` in words,
    ``entities_total``, ``entities_shown``, ``entity_step``, ``periods_total``,
    ``period_block``), ``obs_per_entity`` (``rows`` distinct rows-per-entity
    values with ``entities`` how many entities have each, ``periods`` the same
    for distinct periods observed), ``share`` (per variable ``within``,
    ``between`` or None when undefined, and ``definition``) and ``theta``
    (None, or distinct ``values`` with ``entities`` counts, ``min``,
    ``median``, ``max``, ``definition`` and ``shown`` for the sampled rows).

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

    step = max(1, math.ceil(n_entities / max_entities))
    chosen = np.arange(0, n_entities, step, dtype=np.int64)
    block = max(1, math.ceil(n_periods / max_periods))
    n_columns = math.ceil(n_periods / block)
    position = np.full(n_entities, -1, dtype=np.int64)
    position[chosen] = np.arange(len(chosen))
    matrix = np.zeros((len(chosen), n_columns), dtype=bool)
    shown = position[entity] >= 0 if len(entity) else np.zeros(0, dtype=bool)
    matrix[position[entity[shown]], period[shown] // block] = True
    starts = np.arange(n_columns, dtype=np.int64) * block
    labels = index.period_labels(starts) if n_columns else []
    if block > 1:
        ends = index.period_labels(np.minimum(starts + block - 1, n_periods - 1))
        labels = [a if a == b else f"{a}–{b}" for a, b in zip(labels, ends)]

    out: dict[str, Any] = {
        "presence": {
            "matrix": matrix.tolist(),
            "entities": index.entity_key(chosen),
            "periods": labels,
            "entities_total": int(n_entities),
            "entities_shown": len(chosen),
            "entity_step": step,
            "periods_total": int(n_periods),
            "period_block": block,
            "rule": _rule(n_entities, step, len(chosen), n_periods, block),
        },
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
        rows = f"all {n_entities:,} entities, in key order"
    else:
        rows = (f"{shown:,} of {n_entities:,} entities: every k-th entity in key order "
                f"(k = {step}), starting with the first")
    if block == 1:
        columns = f"each of the {n_periods:,} periods"
    else:
        columns = (f"{n_periods:,} periods grouped in blocks of {block} consecutive periods "
                   "(a cell is present when the entity has a row in any period of its block)")
    return f"Rows: {rows}. Columns: {columns}."
