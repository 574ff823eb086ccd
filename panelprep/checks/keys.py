"""Checks on the (entity, time) key: missing parts, duplicates, look-alike ids."""

from __future__ import annotations

import numpy as np
import pandas as pd

from panelprep.checks.base import Check, examples_of, row_ordered, tallied
from panelprep.checks.context import AuditContext
from panelprep.findings import MAX_EXAMPLES
from panelprep.words import plural, plural_word


def missing_key_tally(ctx: AuditContext) -> dict:
    """Rows without a full key: counts and the first examples (rows in file order)."""
    rows = np.flatnonzero(~ctx.keyed)
    return {"rows": len(rows), "no_entity": int((ctx.index.entity_codes < 0).sum()),
            "no_time": int((ctx.index.period_codes < 0).sum()),
            "examples": row_ordered(ctx.row_key(rows[:MAX_EXAMPLES]))}


def missing_key_finding(self: Check, tally: dict):
    rows, no_entity, no_time = tally["rows"], tally["no_entity"], tally["no_time"]
    if rows == 0:
        return None
    return self.finding(
        rows,
        f"{plural(rows, 'row')} {'lacks' if rows == 1 else 'lack'} a key: {no_entity} without entity, {no_time} without time",
        examples_of(tally),
        {"rows_without_entity": no_entity, "rows_without_time": no_time},
    )


missing_key = tallied("key-missing", "error", "rows whose entity or time key is missing",
                      missing_key_tally, missing_key_finding)


def conflicting_keys_tally(ctx: AuditContext) -> dict:
    """Keys on rows whose values differ: counts and the first keys (by first row) shown."""
    cells = ctx.conflicting_cells
    rows_in_conflict = np.flatnonzero(np.isin(ctx.index.cell, cells) & ctx.base)
    first_rows = rows_in_conflict[np.unique(ctx.index.cell[rows_in_conflict], return_index=True)[1]]
    shown = np.sort(first_rows)[:MAX_EXAMPLES]
    # every keyed row of each shown key, in file order: the example says which rows clash
    shown_cells = ctx.index.cell[shown]
    with_key = np.flatnonzero(np.isin(ctx.index.cell, shown_cells) & ctx.keyed)
    examples = []
    for example, cell in zip(ctx.row_key(shown), shown_cells):
        rows = ctx.input_rows(with_key[ctx.index.cell[with_key] == cell])
        examples.append(((example["row"],), {"rows": [int(r) for r in rows],
                                             **{k: v for k, v in example.items() if k != "row"}}))
    return {"keys": len(cells), "rows_involved": len(rows_in_conflict), "examples": examples}


def conflicting_keys_finding(self: Check, tally: dict):
    keys, involved = tally["keys"], tally["rows_involved"]
    if keys == 0:
        return None
    return self.finding(
        keys,
        f"{plural(keys, 'key')} {'appears' if keys == 1 else 'appear'} on rows with "
        f"differing values ({plural(involved, 'row')})",
        examples_of(tally),
        {"rows_involved": involved},
    )


conflicting_keys = tallied("key-conflict", "error", "the same (entity, time) key on rows whose values differ",
                           conflicting_keys_tally, conflicting_keys_finding)


def exact_repeats_tally(ctx: AuditContext) -> dict:
    """Rows repeating an earlier row: the count and the first examples (rows in file order)."""
    rows = np.flatnonzero(ctx.repeat)
    shown = rows[:MAX_EXAMPLES]
    examples = []
    for example, row, original in zip(ctx.row_key(shown), shown, _originals(ctx, shown)):
        first = {} if original is None else {"repeats_row": int(ctx.input_rows([original])[0])}
        examples.append({"row": example["row"], **first,
                         **{k: v for k, v in example.items() if k != "row"}})
    return {"rows": len(rows), "examples": row_ordered(examples)}


def exact_repeats_finding(self: Check, tally: dict):
    rows = tally["rows"]
    if rows == 0:
        return None
    return self.finding(
        rows,
        f"{plural(rows, 'row')} {plural_word(rows, 'repeats')} an earlier row exactly; "
        f"{'it is' if rows == 1 else 'they are'} collapsed for all counts",
        examples_of(tally),
    )


exact_repeats = tallied("row-repeated", "warning", "rows that repeat an earlier row exactly",
                        exact_repeats_tally, exact_repeats_finding)


_MISSING_MARK = "\x00missing"


def _originals(ctx: AuditContext, repeats: np.ndarray) -> list[int | None]:
    """For each shown repeated row, the first earlier row it repeats (a few rows only)."""
    columns = [*ctx.index.entity, ctx.index.time, *ctx.variables]
    out = []
    for row in repeats:
        same_key = np.flatnonzero(ctx.index.cell[: row] == ctx.index.cell[row])
        # compared as text, missing as its own mark: a row of mixed types holding
        # pd.NA cannot be compared value by value (NA has no truth value)
        earlier = ctx.frame[columns].iloc[same_key].astype("string").fillna(_MISSING_MARK)
        target = ctx.frame[columns].iloc[int(row)].astype("string").fillna(_MISSING_MARK)
        equal = earlier.eq(target, axis=1)
        hits = np.flatnonzero(equal.all(axis=1).to_numpy(dtype=bool))
        out.append(int(same_key[hits[0]]) if len(hits) else None)
    return out


def lookalike_ids_tally(ctx: AuditContext) -> dict:
    """Groups of ids equal once case and outer spaces are folded; examples by folded key."""
    labels = ctx.index.entity_labels
    text_columns = [c for c in labels.columns if not pd.api.types.is_numeric_dtype(labels[c].dtype)]
    none = {"groups": 0, "ids_involved": 0, "examples": []}
    if not text_columns or len(labels) < 2:
        return none
    folded = labels.astype(str)
    for column in text_columns:
        folded[column] = folded[column].str.strip().str.casefold()
    group = folded.groupby(list(labels.columns), sort=True).ngroup().to_numpy()
    sizes = np.bincount(group)
    involved = np.flatnonzero(sizes[group] > 1)
    if len(involved) == 0:
        return none
    shown_groups = np.unique(group[involved])[:MAX_EXAMPLES]
    keys = ctx.index.entity_key(involved)
    examples = []
    for g in shown_groups:
        members = np.flatnonzero(group[involved] == g)
        # a group ranks by its folded key, as the groups of one index are numbered
        rank = tuple(folded.iloc[int(involved[members[0]])])
        examples.append((rank, {"ids": [keys[i] for i in members]}))
    return {"groups": int((sizes > 1).sum()), "ids_involved": len(involved),
            "examples": examples}


def lookalike_ids_finding(self: Check, tally: dict):
    n_groups = tally["groups"]
    if n_groups == 0:
        return None
    return self.finding(
        n_groups,
        f"{plural(n_groups, 'group')} of entity ids {plural_word(n_groups, 'differs')} only by "
        "case or surrounding spaces "
        f"({tally['ids_involved']} ids); they are treated as different entities",
        examples_of(tally),
        {"ids_involved": tally["ids_involved"]},
    )


lookalike_ids = tallied("entity-id-lookalike", "warning", "entity ids that differ only by case or outer spaces",
                        lookalike_ids_tally, lookalike_ids_finding)


CHECKS = [missing_key, conflicting_keys, exact_repeats, lookalike_ids]
