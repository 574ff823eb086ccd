"""Cleaning policies: each off by default, each recorded in the ledger.

Policies that change what the audit sees run before it (id normalisation,
the time window, duplicates); policies that shape the estimation sample run
after it (singletons, balance).  Every rule works on the ``PanelIndex``
codes: row masks out, no per-entity loops.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from panelprep._groups import compact_codes, group_counts, group_sums, segment_bounds
from panelprep.choices import BALANCE, DUPLICATES, NORMALISE, SINGLETONS
from panelprep.errors import InputError
from panelprep.index import PanelIndex
from panelprep.limits import LARGEST_BLOCK_PERIODS
from panelprep.timeaxis import build_time_axis


@dataclass
class Policies:
    """How to clean; the defaults change nothing.

    duplicates : ``fail`` (any repeated key fails the gate), ``drop-exact``
        (drop rows that repeat an earlier row exactly), ``keep-first`` /
        ``keep-last`` (one row per key, by file order), ``mean`` (exact
        repeats dropped, conflicting rows replaced by the mean of their
        numeric values, kept on the key's first row).
    normalise_ids : ``trim`` strips surrounding spaces from text entity ids,
        ``trim-fold`` also folds case.
    singletons : ``drop`` removes entities with one row; when period effects
        are also absorbed, periods with one row too, repeated until none is
        left (dropping one can create another).
    balance : ``complete-entities`` keeps entities observed in every period
        of the window (or of the panel's span); ``largest-block`` keeps the
        contiguous block of periods, and the entities observed in all of it,
        with the most rows.
    window : first and last period label to keep, either may be None.
    """

    duplicates: str = "fail"
    normalise_ids: str = "none"
    singletons: str = "keep"
    balance: str = "keep"
    window: tuple[str | None, str | None] = field(default=(None, None))

    def validate(self) -> None:
        for name, allowed in (("duplicates", DUPLICATES), ("normalise_ids", NORMALISE),
                              ("singletons", SINGLETONS), ("balance", BALANCE)):
            if getattr(self, name) not in allowed:
                raise InputError(f"cleaning policy {name} = {getattr(self, name)!r} is not one of "
                                 f"{', '.join(allowed)}")


@dataclass(frozen=True)
class Removal:
    """Rows a policy removes (mask over the current rows), with its reason id."""

    mask: np.ndarray
    reason: str
    step: str


def normalise_ids(frame: pd.DataFrame, entity: list[str], how: str) -> tuple[pd.DataFrame, int]:
    """Entity ids trimmed (and case-folded); returns the new frame and rows changed.

    ``trim-fold`` merges ids that differ only by case, and writes each merged
    id in its most frequent trimmed spelling (ties: the first in sort order),
    so ``F00042`` stays ``F00042`` when a stray ``f00042`` joins it.  The work
    is on distinct ids, broadcast back through factorised codes.
    """
    if how == "none":
        return frame, 0
    out = frame.copy()
    changed = np.zeros(len(frame), dtype=bool)
    for column in entity:
        values = frame[column]
        if pd.api.types.is_numeric_dtype(values.dtype):
            continue
        codes, uniques = pd.factorize(values, use_na_sentinel=True)
        if len(uniques) == 0:
            continue
        trimmed = pd.Series(uniques, dtype="str").str.strip()
        if how == "trim-fold":
            counts = np.bincount(codes[codes >= 0], minlength=len(uniques))
            spellings = pd.DataFrame({"folded": trimmed.str.casefold(), "spelling": trimmed,
                                      "rows": counts})
            spellings = spellings.groupby(["folded", "spelling"], sort=True)["rows"].sum()
            spellings = spellings.reset_index().sort_values(
                ["folded", "rows", "spelling"], ascending=[True, False, True], kind="stable")
            canonical = spellings.drop_duplicates("folded").set_index("folded")["spelling"]
            trimmed = trimmed.str.casefold().map(canonical)
        new = pd.Series(np.asarray(trimmed, dtype=object)[np.where(codes >= 0, codes, 0)],
                        index=values.index, dtype="str").where(codes >= 0)
        changed |= (new != values).fillna(False).to_numpy(dtype=bool)
        out[column] = new
    return out, int(changed.sum())


def window_removal(index: PanelIndex, window: tuple[str | None, str | None]) -> Removal | None:
    """Rows outside the inclusive window [first, last] of period labels.

    A window whose first period comes after its last, or that holds no
    period of the data, is a bad option (``InputError``), not an empty panel.
    """
    first, last = window
    if not first and not last:
        return None
    ordinal = index.axis.ordinal
    outside = np.zeros(index.n_rows, dtype=bool)
    bounds = {}
    for label, side in ((first, "first"), (last, "last")):
        if not label:
            continue
        bounds[side] = _period_ordinal(index, label, side)
        outside |= (ordinal < bounds[side]) if side == "first" else (ordinal > bounds[side])
    shown = f"--window {first or ''},{last or ''} (clean.window)"
    if len(bounds) == 2 and first != last and bounds["first"] > bounds["last"]:
        raise InputError(f"{shown}: the first period {first} comes after the last {last}; "
                         "give the earlier period first")
    timed = ~index.axis.missing
    if timed.any() and not (timed & ~outside).any():
        span = index.axis.label([int(ordinal[timed].min()), int(ordinal[timed].max())])
        raise InputError(f"{shown}: no row lies inside the window; the data's periods run "
                         f"from {span[0]} to {span[1]}, choose the window within that span")
    outside &= timed
    return Removal(outside, "outside-window", f"keep periods {first or '...'} to {last or '...'}")


def _period_ordinal(index: PanelIndex, label: str, side: str) -> int:
    freq = None if index.axis.freq == "int" else index.axis.freq
    try:
        axis = build_time_axis(pd.Series([_typed_label(label, index)]), freq=freq,
                               column=f"window {side}")
    except InputError as err:
        raise InputError(f"time window {side} {label!r}: {err}") from None
    if index.axis.freq == "int":
        # a label between grid points bounds the window from inside: round the first
        # bound up and the last down, so no period outside [first, last] is kept
        offset = int(label) - index.axis.base
        return int(-(-offset // index.axis.step) if side == "first" else offset // index.axis.step)
    return int(axis.ordinal[0])


def _typed_label(label: str, index: PanelIndex):
    return int(label) if index.axis.freq in ("int", "year") and str(label).strip().lstrip("-").isdigit() else label


def duplicate_removal(
    frame: pd.DataFrame, index: PanelIndex, repeat: np.ndarray, how: str
) -> Removal | None:
    """Rows a duplicates policy removes (``mean`` also needs ``merge_means``)."""
    if how in ("fail",):
        return None
    if how in ("drop-exact", "mean"):
        return Removal(repeat.copy(), "exact-repeat", "drop exact repeated rows")
    keyed = index.keyed
    order = index.order if how == "keep-first" else index.order[::-1]
    cells = index.cell[order]
    # stable order of rows within a key: the first (or last) row in file order wins
    by_cell = order[np.argsort(cells, kind="stable")]
    sorted_cells = index.cell[by_cell]
    first_of_cell = np.ones(len(by_cell), dtype=bool)
    first_of_cell[1:] = sorted_cells[1:] != sorted_cells[:-1]
    drop = np.zeros(index.n_rows, dtype=bool)
    drop[by_cell[~first_of_cell]] = True
    drop &= keyed
    reason = "duplicate-key-not-first" if how == "keep-first" else "duplicate-key-not-last"
    return Removal(drop, reason, f"one row per key ({how})")


def merge_means(
    frame: pd.DataFrame, index: PanelIndex, values: np.ndarray, variables: list[str]
) -> tuple[pd.DataFrame, Removal | None]:
    """Replace rows sharing a key by one row holding the mean of their values.

    The key's first row (file order) is kept and receives the means (NaN
    ignored; all-NaN stays NaN); the other rows are removed.
    """
    rows = np.flatnonzero(index.keyed)
    cells = index.cell[rows]
    uniq, inverse, counts = np.unique(cells, return_inverse=True, return_counts=True)
    shared = counts[inverse] > 1
    if not shared.any():
        return frame, None
    first_row = np.full(len(uniq), np.iinfo(np.int64).max)
    np.minimum.at(first_row, inverse, rows)
    block = values[rows]
    present = ~np.isnan(block)
    sums = group_sums(inverse, np.where(present, block, 0.0), len(uniq))
    n_present = group_sums(inverse, present.astype(np.float64), len(uniq))
    with np.errstate(invalid="ignore", divide="ignore"):
        means = np.where(n_present > 0, sums / np.where(n_present > 0, n_present, 1), np.nan)
    target = np.flatnonzero(counts > 1)
    out = frame.copy()
    for j, name in enumerate(variables):
        merged = means[target, j]
        if pd.api.types.is_numeric_dtype(out[name].dtype):
            column = out[name].to_numpy(dtype=np.float64, na_value=np.nan, copy=True)
            column[first_row[target]] = merged
        else:
            # A text column (declared missing tokens, stray text) keeps its other cells as
            # written, so the audit still reports stray text and reads tokens as missing;
            # numpy's float-to-text is the shortest text that reads back to the same float.
            column = out[name].to_numpy(dtype=object, copy=True)
            column[first_row[target]] = np.where(np.isnan(merged), None,
                                                 merged.astype(str).astype(object))
        out[name] = column
    drop = np.zeros(index.n_rows, dtype=bool)
    drop[rows[shared]] = True
    drop[first_row[target]] = False
    return out, Removal(drop, "duplicate-key-merged", "conflicting rows replaced by their mean")


def singleton_removal(index: PanelIndex, alive: np.ndarray, with_periods: bool) -> Removal | None:
    """Entities (and with ``with_periods`` also periods) with one row, to a fixed point."""
    if not alive.any():
        return None
    drop = np.zeros(index.n_rows, dtype=bool)
    current = alive.copy()
    # a grid longer than the rows is counted over the periods that occur
    periods, n_periods = compact_codes(np.where(index.keyed, index.period_codes, 0),
                                       max(index.n_periods, 1))
    while True:
        e_counts = group_counts(index.entity_codes[current], index.n_entities)
        lone = current & (e_counts[np.where(current, index.entity_codes, 0)] == 1)
        if with_periods:
            p_counts = group_counts(periods[current], n_periods)
            lone |= current & (p_counts[periods] == 1)
        if not lone.any():
            break
        drop |= lone
        current &= ~lone
    if not drop.any():
        return None
    step = "drop singletons" + (" (entities and periods, to a fixed point)" if with_periods else "")
    return Removal(drop, "singleton", step)


def balance_removal(
    index: PanelIndex, alive: np.ndarray, how: str,
    window: tuple[str | None, str | None] = (None, None),
) -> Removal | None:
    """Rows outside a balanced panel (see ``Policies.balance``).

    ``complete-entities`` asks for every period of the time window when one
    was given (either end may be open), else of the span the rows cover.
    """
    if how == "keep" or not alive.any():
        return None
    rows = np.flatnonzero(alive)
    cells = np.unique(index.cell[rows])
    n_periods = max(index.n_periods, 1)
    entity, period = cells // n_periods, cells % n_periods
    if how == "complete-entities":
        low = (_period_ordinal(index, window[0], "first") - index.first_period
               if window[0] else int(period.min()))
        high = (_period_ordinal(index, window[1], "last") - index.first_period
                if window[1] else int(period.max()))
        inside = (period >= low) & (period <= high)
        seen = group_counts(entity[inside], index.n_entities)
        complete = seen == (high - low + 1)
        step = "keep entities observed in every period"
    else:
        low, high, complete = _largest_block(entity, period, index.n_entities, n_periods)
        step = f"keep the largest balanced block ({low}..{high} on the grid)"
    p = index.period_codes
    keep = alive & complete[np.where(alive, index.entity_codes, 0)] & (p >= low) & (p <= high)
    drop = alive & ~keep
    if not drop.any():
        return None
    labels = index.period_labels([low, high])
    return Removal(drop, "unbalanced", step.replace(f"{low}..{high} on the grid",
                                                      f"{labels[0]} to {labels[1]}"))


def _largest_block(entity: np.ndarray, period: np.ndarray, n_entities: int, n_periods: int):
    """The contiguous period block [a, b] maximising entities complete over it times its length.

    Each entity's observed periods split into maximal runs; an entity is
    complete over [a, b] when one of its runs covers it.  Counting runs with
    start <= a and end >= b for every (a, b) is a 2-D cumulative sum over a
    table of the periods that occur (a block cannot span a period nobody
    observes, and between two occurring periods a run covers, every period
    occurs), so the cost is one pass over the cells plus occurring periods
    squared; more than ``LARGEST_BLOCK_PERIODS`` of them is refused.
    """
    if len(entity) == 0:
        return 0, -1, np.zeros(n_entities, dtype=bool)
    new_run = np.ones(len(entity), dtype=bool)
    new_run[1:] = (entity[1:] != entity[:-1]) | (period[1:] != period[:-1] + 1)
    starts = segment_bounds(np.cumsum(new_run))
    ends = np.append(starts[1:], len(entity)) - 1
    run_start, run_end = period[starts], period[ends]
    occurring, rank = np.unique(period, return_inverse=True)
    rank = rank.reshape(-1)
    size = len(occurring)
    if size > LARGEST_BLOCK_PERIODS:
        raise InputError(
            f"balance = largest-block compares every pair of periods and takes at most "
            f"{LARGEST_BLOCK_PERIODS:,} distinct periods; this sample has {size:,} "
            "(use complete-entities, or narrow the time window first)"
        )
    table = np.zeros((size, size), dtype=np.int64)
    np.add.at(table, (rank[starts], rank[ends]), 1)
    # covering[a, b] = #runs with start <= a and end >= b (a, b ranks of occurring periods)
    covering = np.cumsum(np.cumsum(table[:, ::-1], axis=0), axis=1)[:, ::-1]
    length = np.arange(size)[None, :] - np.arange(size)[:, None] + 1
    score = np.where(length > 0, covering * length, -1)
    low, high = (int(occurring[r]) for r in divmod(int(np.argmax(score)), size))
    run_entity = entity[starts]
    covers = (run_start <= low) & (run_end >= high)
    complete = np.zeros(n_entities, dtype=bool)
    complete[run_entity[covers]] = True
    return low, high, complete
