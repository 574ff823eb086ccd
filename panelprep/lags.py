"""Gap-aware lags, leads and differences.

The lag k of x at (i, t) is x at (i, t - k): the row of the same entity k
periods earlier on the grid, or missing when that period is absent.  It is
never the previous row across a gap, nor a row of another entity.  Rows are
found by binary search of the target cell in the sorted (entity, period)
cells, so the cost is one sort (already in the index) and one search.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from panelprep.checks.context import to_float
from panelprep.errors import InputError
from panelprep.index import PanelIndex
from panelprep.names import DEFAULT_NAMES, AddedNames

KINDS = ("lag", "lead", "diff")


@dataclass(frozen=True)
class Shift:
    """One derived column: ``kind`` of ``variable`` at distance ``k`` periods.

    Its name comes from the ``kind`` template of ``names`` (``sales_lag1``
    by default).
    """

    variable: str
    k: int
    kind: str
    names: AddedNames = DEFAULT_NAMES

    @property
    def name(self) -> str:
        return self.names.derived(self.kind, self.variable, self.k)

    @property
    def option(self) -> str:
        """How the user asked for it, for messages: ``--lag sales:1``."""
        return f"--{self.kind} {self.variable}:{self.k}"


def parse_shifts(kind: str, specs: list[str] | str | None,
                 names: AddedNames = DEFAULT_NAMES) -> list[Shift]:
    """``"sales:1,sales:2"`` -> shifts; a bare ``var`` means distance 1.

    ``names`` gives the template of the derived columns' names.
    """
    if kind not in KINDS:
        raise ValueError(kind)
    if specs is None:
        return []
    items = specs.split(",") if isinstance(specs, str) else list(specs)
    out = []
    for item in (i.strip() for i in items):
        if not item:
            continue
        name, _, distance = item.partition(":")
        try:
            k = int(distance) if distance else 1
        except ValueError:
            raise InputError(f"--{kind} {item!r}: distance must be a whole number") from None
        if k < 1:
            raise InputError(f"--{kind} {item!r}: distance must be at least 1")
        out.append(Shift(name.strip(), k, kind, names))
    return out


def shifted_values(index: PanelIndex, values: np.ndarray, k: int) -> np.ndarray:
    """``values`` of the same entity ``k`` periods earlier (negative k: later); NaN if absent.

    Where a key appears on several rows, the first in (entity, period) order
    is the one looked up.
    """
    order = index.order
    sorted_cells = index.cell[order]
    period = index.period_codes
    target_period = period - k
    valid = index.keyed & (target_period >= 0) & (target_period < index.n_periods)
    target = np.where(valid, index.cell - k, -1)
    pos = np.searchsorted(sorted_cells, target, side="left")
    pos = np.minimum(pos, max(len(sorted_cells) - 1, 0))
    found = valid & (len(sorted_cells) > 0)
    found &= sorted_cells[pos] == target if len(sorted_cells) else False
    out = np.full(len(values), np.nan)
    out[found] = values[order[pos[found]]]
    return out


def add_shifts(
    frame: pd.DataFrame, index: PanelIndex, shifts: list[Shift], decimal_comma: bool = False,
    missing_tokens: tuple[str, ...] = (),
) -> pd.DataFrame:
    """A copy of ``frame`` with one new float column per shift.

    The variable is read as the audit reads it: declared ``missing_tokens``,
    NaN and empty fields are missing, ``decimal_comma`` applies; any other
    text in it stops the run (``InputError``) rather than becoming a missing
    lag unreported.
    """
    if not shifts:
        return frame
    out = frame.copy()
    for shift in shifts:
        if shift.variable not in frame.columns:
            raise InputError(f"--{shift.kind} {shift.variable!r}: no such column")
        if shift.name in frame.columns:
            raise InputError(f"--{shift.kind} would create {shift.name!r}, which already exists")
        values, problem = to_float(frame[shift.variable], shift.variable, decimal_comma,
                                    tuple(missing_tokens))
        if problem is not None and len(problem.rows):
            shown = ", ".join(repr(v) for v in problem.values[:3])
            raise InputError(
                f"--{shift.kind} {shift.variable!r}: {len(problem.rows):,} value(s) of the column "
                f"are not numbers (e.g. {shown}); declare texts that mean missing with "
                "--missing-token, or use --decimal-comma if ',' is the decimal mark")
        _refuse_beyond_grid(index, shift)
        other = shifted_values(index, values, -shift.k if shift.kind == "lead" else shift.k)
        if np.isnan(other).all():
            raise InputError(
                f"{shift.option}: no row has a value of {shift.variable!r} for the same entity "
                f"{_distance(shift)}, so {shift.name!r} would be missing on every row; use a "
                "shorter distance")
        out[shift.name] = values - other if shift.kind == "diff" else other
    return out


def _distance(shift: Shift) -> str:
    periods = "period" if shift.k == 1 else "periods"
    return f"{shift.k:,} {periods} {'later' if shift.kind == 'lead' else 'earlier'}"


def _refuse_beyond_grid(index: PanelIndex, shift: Shift) -> None:
    """A distance as long as the whole grid finds nothing (and would overflow int64)."""
    if shift.k < index.n_periods:
        return
    first, last = index.period_labels([0, max(index.n_periods - 1, 0)])
    raise InputError(
        f"{shift.option}: {_distance(shift)} lies beyond the data, whose {index.n_periods:,} "
        f"period(s) run {first} to {last}, so {shift.name!r} would be missing on every row; "
        f"use a distance below {index.n_periods:,}")
