"""PanelIndex: the entity and time codes every check and transform works on.

Built once per frame.  Keys are factorised into dense integer codes:
``entity_codes`` in 0..n_entities-1 (sorted by key value, so output order is
stable), ``period_codes`` in 0..n_periods-1 counted on the full grid from the
first to the last period seen.  A row with any key part missing gets -1 in
both and is left out of everything except the missing-key check.  ``order``
sorts the keyed rows by (entity, period) and is what gap, duplicate and lag
logic runs on as sorted segment reductions.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np
import pandas as pd

from panelprep._groups import group_counts, segment_bounds
from panelprep.errors import ColumnError
from panelprep.limits import check_grid
from panelprep.timeaxis import Grid, TimeAxis, build_time_axis


@dataclass(eq=False)
class PanelIndex:
    """Integer codes for the (entity, time) key of a frame.

    Attributes
    ----------
    entity, time : column names of the key.
    entity_codes : int64 (n,), -1 where any entity column is missing or blank.
    entity_labels : DataFrame with one row per entity code, the key's values.
    axis : the parsed time column (``TimeAxis``).
    first_period : grid ordinal of period code 0.
    n_periods : number of periods on the grid from first to last seen.
    period_codes : int64 (n,), -1 where the time value is missing.
    """

    entity: list[str]
    time: str
    entity_codes: np.ndarray
    entity_labels: pd.DataFrame
    axis: TimeAxis
    first_period: int
    n_periods: int
    period_codes: np.ndarray

    @property
    def n_rows(self) -> int:
        return len(self.entity_codes)

    @property
    def n_entities(self) -> int:
        return len(self.entity_labels)

    @cached_property
    def keyed(self) -> np.ndarray:
        """Rows with a complete key (entity and time present)."""
        return (self.entity_codes >= 0) & (self.period_codes >= 0)

    @cached_property
    def cell(self) -> np.ndarray:
        """One int64 per row for the (entity, period) pair; -1 where not keyed."""
        cell = self.entity_codes * np.int64(self.n_periods)
        cell += self.period_codes
        if not self.keyed.all():
            cell[~self.keyed] = -1
        return cell

    @cached_property
    def sorted_cells(self) -> np.ndarray:
        """The distinct (entity, period) cells of keyed rows, ascending."""
        cells = self.cell[self.order]
        if len(cells) == 0:
            return cells
        first = np.ones(len(cells), dtype=bool)
        first[1:] = cells[1:] != cells[:-1]
        return cells[first]

    @cached_property
    def order(self) -> np.ndarray:
        """Positions of keyed rows sorted by (entity, period), stable."""
        rows = np.flatnonzero(self.keyed)
        cells = self.cell[rows]
        if len(cells) > 1 and np.all(cells[1:] >= cells[:-1]):
            return rows
        return rows[np.argsort(cells, kind="stable")]

    def period_labels(self, period_codes: np.ndarray | list[int]) -> list[str]:
        return self.axis.label(np.asarray(period_codes, dtype=np.int64) + self.first_period)

    def entity_key(self, codes: np.ndarray | list[int]) -> list[str]:
        """Entity keys as display strings (parts joined with '/')."""
        labels = self.entity_labels.iloc[np.asarray(codes, dtype=np.int64)]
        if len(self.entity) == 1:
            return [str(v) for v in labels.iloc[:, 0]]
        return ["/".join(str(v) for v in row) for row in labels.itertuples(index=False)]

    def subset(self, rows: np.ndarray) -> PanelIndex:
        """Index of a subset of rows (boolean mask or positions), codes re-densified.

        Entity codes are re-numbered so entities with no remaining rows vanish,
        and the period grid is cut to the span the subset covers.  Both maps
        keep the order of codes, so when ``rows`` is a boolean mask and this
        index's sort order is already known, the subset inherits it instead of
        sorting again.
        """
        ent = self.entity_codes[rows]
        per = self.period_codes[rows]
        timed = per >= 0
        low = int(per[timed].min()) if timed.any() else 0
        high = int(per[timed].max()) if timed.any() else -1
        per = np.where(timed, per - low, -1)
        present = np.flatnonzero(group_counts(ent[ent >= 0], self.n_entities) > 0)
        remap = np.full(self.n_entities, -1, dtype=np.int64)
        remap[present] = np.arange(len(present))
        new_ent = (np.where(ent >= 0, remap[np.where(ent >= 0, ent, 0)], -1) if len(remap)
                   else np.full(len(ent), -1, dtype=np.int64))
        child = PanelIndex(
            entity=self.entity,
            time=self.time,
            entity_codes=new_ent,
            entity_labels=self.entity_labels.iloc[present].reset_index(drop=True),
            axis=TimeAxis(
                freq=self.axis.freq,
                step=self.axis.step,
                base=self.axis.base,
                ordinal=self.axis.ordinal[rows],
                missing=self.axis.missing[rows],
                off_grid=self.axis.off_grid[rows],
                inferred=self.axis.inferred,
                instant=None if self.axis.instant is None else self.axis.instant[rows],
                data_step=self.axis.data_step,
                step_stated=self.axis.step_stated,
                written_as=self.axis.written_as,
            ),
            first_period=self.first_period + low,
            n_periods=high - low + 1,
            period_codes=per,
        )
        rows = np.asarray(rows)
        if rows.dtype == bool and "order" in self.__dict__:
            position = np.cumsum(rows) - 1
            kept = self.order[rows[self.order]]
            child.__dict__["order"] = position[kept]
        return child


@dataclass(frozen=True)
class EntityRuns:
    """Keyed rows sorted by (entity, period) with one segment per entity.

    ``rows`` are frame positions in sorted order, ``starts`` the first
    position of each entity's segment in ``rows``, ``entity`` the entity code
    of each segment.  Only entities with at least one keyed row appear.
    """

    rows: np.ndarray
    starts: np.ndarray
    entity: np.ndarray


def entity_runs(index: PanelIndex, rows: np.ndarray | None = None) -> EntityRuns:
    """Sorted segments of ``index.order`` restricted to a boolean mask of rows."""
    order = index.order if rows is None else index.order[rows[index.order]]
    codes = index.entity_codes[order]
    starts = segment_bounds(codes)
    return EntityRuns(rows=order, starts=starts, entity=codes[starts] if len(order) else codes)


def build_index(
    frame: pd.DataFrame, entity: list[str] | str, time: str, freq: str | None = None,
    grid: Grid | None = None,
) -> PanelIndex:
    """Factorise the key columns of ``frame`` once.

    Blank strings (empty or only whitespace) in key columns count as missing.
    With ``grid`` (the time axis of a whole input read in partitions,
    ``timeaxis.time_grid``) the rows are placed on it and period codes count
    from its first period, so every partition shares one grid; its size is
    then checked once on the whole input, not here.
    Raises ``ColumnError`` for an absent column and ``TimeParseError`` for
    time values that cannot be placed on a grid.
    """
    entity = [entity] if isinstance(entity, str) else list(entity)
    for column in [*entity, time]:
        if column not in frame.columns:
            raise ColumnError(f"key column {column!r} not found; columns are {list(frame.columns)}")
    if time in entity:
        raise ColumnError(f"column {time!r} cannot be both an entity and the time key")

    n = len(frame)
    combined = np.zeros(n, dtype=np.int64)
    missing = np.zeros(n, dtype=bool)
    for column in entity:
        values = frame[column]
        codes, uniques = pd.factorize(values, sort=True, use_na_sentinel=True)
        codes = codes.astype(np.int64, copy=False)
        if pd.api.types.is_string_dtype(uniques.dtype) or uniques.dtype == object:
            blank = pd.Series(np.asarray(uniques, dtype=object)).astype(str).str.strip() == ""
            if blank.any():
                codes = np.where(np.isin(codes, np.flatnonzero(blank.to_numpy())), -1, codes)
        missing |= codes < 0
        combined = combined * np.int64(max(len(uniques), 1)) + np.where(codes < 0, 0, codes)
        if len(entity) > 2:
            # re-rank (order kept) so the product of distinct counts cannot overflow int64
            combined = pd.factorize(combined, sort=True)[0].astype(np.int64, copy=False)

    combined = np.where(missing, -1, combined)
    entity_codes, uniq_combined = pd.factorize(combined, sort=True, use_na_sentinel=True)
    entity_codes = entity_codes.astype(np.int64, copy=False)
    if len(uniq_combined) and uniq_combined[0] == -1:
        # -1 sorts first: shift codes so missing becomes -1 and real keys start at 0
        entity_codes = entity_codes - 1
        uniq_combined = uniq_combined[1:]
    first_rows = np.full(len(uniq_combined), n, dtype=np.int64)
    keyed_entity = entity_codes >= 0
    np.minimum.at(first_rows, entity_codes[keyed_entity], np.flatnonzero(keyed_entity))
    labels = frame[entity].iloc[first_rows].reset_index(drop=True)
    return index_on_entity_codes(entity, entity_codes, labels, frame[time], time, freq, grid)


def index_on_entity_codes(
    entity: list[str], entity_codes: np.ndarray, entity_labels: pd.DataFrame,
    time_values: pd.Series, time: str, freq: str | None = None, grid: Grid | None = None,
) -> PanelIndex:
    """The time half of ``build_index``: a ``PanelIndex`` from entity codes already made
    (sorted dense, -1 for a missing key; ``entity_labels`` one row per code) and the
    time column, parsed onto its grid (or placed on ``grid``) as ``build_index`` does."""
    if grid is not None:
        axis = grid.axis_for(time_values)
        first, last = grid.span
    else:
        axis = build_time_axis(time_values, freq=freq, column=time)
        has_time = ~axis.missing
        if has_time.any():
            # no copy of the ordinals when every row has a time
            placed = axis.ordinal if has_time.all() else axis.ordinal[has_time]
            first, last = int(placed.min()), int(placed.max())
            del placed
            check_grid(len(entity_labels), last - first + 1, time, *axis.label([first, last]))
        else:
            first, last = 0, -1
    period_codes = (axis.ordinal - first).astype(np.int64, copy=False)
    period_codes[axis.missing] = -1
    return PanelIndex(
        entity=entity,
        time=time,
        entity_codes=entity_codes,
        entity_labels=entity_labels,
        axis=axis,
        first_period=first,
        n_periods=last - first + 1,
        period_codes=period_codes,
    )
