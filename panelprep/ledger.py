"""The drop ledger and the story of a preparation.

Every row removed from the input is recorded once, with its row in the
input file, the step that removed it and a reason id.  Rows are held as
0-based positions and written as the project's row numbers (data rows
counted from 1, ``panelprep.names``).  The
invariant ``rows read = rows kept + rows in the ledger`` is checked before
anything is written.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from panelprep.errors import InputError
from panelprep.names import DEFAULT_NAMES, AddedNames


@dataclass
class StepRecord:
    """One line of the story: a step (a stable ``id``, and ``step`` in words) with rows
    and entities before and after.  The ledger's step column holds the ``id``."""

    id: str
    step: str
    rows_before: int
    rows_after: int
    entities_before: int
    entities_after: int
    note: str = ""

    def to_dict(self) -> dict:
        return {
            "id": self.id,
            "step": self.step,
            "rows_before": self.rows_before,
            "rows_after": self.rows_after,
            "entities_before": self.entities_before,
            "entities_after": self.entities_after,
            "note": self.note,
        }


@dataclass
class Ledger:
    """Rows removed from the input, in the order they were removed."""

    rows_read: int
    _rows: list[np.ndarray] = field(default_factory=list)
    _reasons: list[str] = field(default_factory=list)
    _steps: list[str] = field(default_factory=list)
    story: list[StepRecord] = field(default_factory=list)

    def drop(self, input_rows: np.ndarray, reason: str, step: str) -> None:
        """Record removed rows (0-based input row numbers) under one reason and step id."""
        rows = np.asarray(input_rows, dtype=np.int64)
        if len(rows):
            self._rows.append(rows)
            self._reasons.append(reason)
            self._steps.append(step)

    @property
    def n_dropped(self) -> int:
        return int(sum(len(r) for r in self._rows))

    def by_reason(self) -> dict[str, int]:
        out: dict[str, int] = {}
        for rows, reason in zip(self._rows, self._reasons):
            out[reason] = out.get(reason, 0) + len(rows)
        return out

    def verify(self, rows_kept: int) -> None:
        """Raise when rows read differ from rows kept plus rows recorded."""
        if self.rows_read != rows_kept + self.n_dropped:
            raise RuntimeError(
                f"drop ledger out of balance: read {self.rows_read}, kept {rows_kept}, "
                f"recorded {self.n_dropped}"
            )
        if self._rows:
            every = np.concatenate(self._rows)
            if len(np.unique(every)) != len(every):
                raise RuntimeError("drop ledger records a row twice")

    def to_frame(self, frame: pd.DataFrame, keys: list[str],
                 names: AddedNames = DEFAULT_NAMES) -> pd.DataFrame:
        """One row per dropped input row: input row (from 1), key columns, reason, step.

        The added columns take their names from ``names`` (``row``,
        ``reason``, ``step``).
        """
        if self._rows:
            rows = np.concatenate(self._rows)
            reasons = np.repeat(self._reasons, [len(r) for r in self._rows])
            steps = np.repeat(self._steps, [len(r) for r in self._rows])
        else:
            rows = np.zeros(0, dtype=np.int64)
            reasons = steps = np.zeros(0, dtype=object)
        out = frame[keys].iloc[rows].reset_index(drop=True)
        out.insert(0, names.row, rows + 1)
        out[names.reason] = pd.Series(reasons, dtype="str")
        out[names.step] = pd.Series(steps, dtype="str")
        return out


def require_rows(rows: int, where: str) -> None:
    """An empty sample cannot be prepared: say where it became empty."""
    if rows == 0:
        raise InputError(f"no rows left after {where}; nothing to prepare")
