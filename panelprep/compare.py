"""Two vintages of one panel side by side: what entered, what left, what was restated.

Both vintages are keyed by one ``PanelIndex`` built on their key columns
stacked (so an entity or a period has the same integer code in both), and
each side is reduced to its distinct (entity, period) cells, first row per
cell.  Everything after that is arithmetic on int64 cell codes: a sorted
search pairs the cells both vintages hold, ``np.bincount`` counts per
period and per entity, and values are compared column by column on the
paired rows with the audit's own reading of numbers (``checks.context.to_float``).

What is reported (each a finding with a stable id, gated like the audit):

* entities and periods that appear or disappear, rows added and removed per
  period;
* restated cells per variable and per period (count, share of the cells
  both vintages hold a value for, largest absolute and relative change):
  a cell is restated when ``|new - old| > atol + rtol * |old|``;
* likely unit changes: an entity or a period whose restated cells of a
  variable are, for most of its compared cells, old times one power of ten;
* likely re-keyed entities: an entity gone from the new vintage whose
  history (period and values, rounded to about five significant digits)
  matches a new entity's over the periods both hold;
* values that became missing or were filled in, changes of a column's kind
  (number, text, true/false, date) and of the panel's shape.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa

from panelprep._groups import segment_bounds
from panelprep._schema import SCHEMA_VERSION
from panelprep._version import __version__
from panelprep.checks.context import looks_numeric, to_float
from panelprep.errors import ColumnError, InputError
from panelprep.findings import (
    COMPARE_FINDING_IDS,
    SEVERITIES,
    Finding,
    apply_severities,
    gate,
    gate_block,
    ordered,
)
from panelprep.index import build_index
from panelprep.io import DEFAULT_READ, ReadOptions, column_names, write_table
from panelprep.names import ROLE_AUXILIARY, ROLE_KEY
from panelprep.pipeline import load
from panelprep.runlog import RunLog
from panelprep.words import plural, plural_word

# kinds of change, as written in the ``pp_change`` column of restated.parquet
RESTATED, UNIT, NOW_MISSING, FILLED = "restated", "unit-change", "became-missing", "filled-in"
CHANGE_KINDS = (RESTATED, UNIT, NOW_MISSING, FILLED)
# added columns of restated.parquet
RESTATED_COLUMNS = {"variable": "pp_variable", "old": "pp_old", "new": "pp_new",
                    "kind": "pp_change"}
# a ratio new / old this close (relatively) to a power of ten counts as a unit change
_UNIT_RATIO_TOL = 5e-3
# binary digits of the mantissa kept when hashing histories (about five decimal digits)
_HASH_BITS = 17
_SHOWN = 10
# the picture of restated shares has at most this many period columns
_PICTURE_COLUMNS = 120


@dataclass(frozen=True)
class CompareOptions:
    """How two vintages are compared and gated.

    rtol, atol : a cell is restated when ``|new - old| > atol + rtol * |old|``
        (defaults ``1e-9`` and ``0``: only float noise is forgiven; raise
        ``atol`` to half the last digit a vendor rounds to).
    max_restated_share : a variable whose restated share (restated cells
        over the cells both vintages hold a value for) exceeds this is an
        error (``vintage-restated-over-limit``); None sets no limit.
    fail_on : lowest severity that fails the gate (``error`` or ``warning``).
    severities : severity per finding id, replacing the defaults.
    unit_share, min_unit_cells : an entity or a period has a likely unit
        change in a variable when at least ``min_unit_cells`` of its compared
        cells, and at least ``unit_share`` of them, are old times the same
        power of ten (not 1).
    rekey_share, min_rekey_periods : a gone entity and a new one are a likely
        re-key when their hashed histories agree on at least
        ``min_rekey_periods`` periods and on at least ``rekey_share`` of the
        periods both hold.
    """

    rtol: float = 1e-9
    atol: float = 0.0
    max_restated_share: float | None = None
    fail_on: str = "error"
    severities: dict[str, str] = field(default_factory=dict)
    unit_share: float = 0.8
    min_unit_cells: int = 3
    rekey_share: float = 0.8
    min_rekey_periods: int = 2

    def validate(self) -> None:
        if not (np.isfinite(self.rtol) and self.rtol >= 0):
            raise InputError(f"--rtol {self.rtol!r} must be a finite number >= 0")
        if not (np.isfinite(self.atol) and self.atol >= 0):
            raise InputError(f"--atol {self.atol!r} must be a finite number >= 0")
        share = self.max_restated_share
        if share is not None and not (0.0 <= share <= 1.0):
            raise InputError(f"--max-restated-share {share!r} must be a share in [0, 1]")
        if self.fail_on not in ("error", "warning"):
            raise InputError(f"--fail-on {self.fail_on!r} must be error or warning")
        for finding_id, severity in self.severities.items():
            if finding_id not in COMPARE_FINDING_IDS:
                raise InputError(f"severity given for unknown comparison finding id "
                                 f"{finding_id!r}; ids are {', '.join(COMPARE_FINDING_IDS)}")
            if severity not in SEVERITIES:
                raise InputError(f"severity {severity!r} for {finding_id} must be one of "
                                 + ", ".join(SEVERITIES))


@dataclass(frozen=True)
class PreviousVintage:
    """The previous vintage a preparation compares its input with (run file ``[compare]``).

    ``vars`` None compares the model's variables read from the file.
    """

    path: Path
    vars: list[str] | None = None
    options: CompareOptions = field(default_factory=CompareOptions)


@dataclass(frozen=True)
class _Side:
    """One vintage reduced to its distinct cells (ascending), first row per cell."""

    cells: np.ndarray
    rows: np.ndarray
    read: int
    unkeyed: int
    repeated: int


@dataclass(eq=False)
class Comparison:
    """The result of comparing two vintages.

    ``document`` is the JSON report (``to_dict()``); ``findings`` and
    ``verdict`` the gate; ``restated_table()`` builds restated.parquet's
    table: the new vintage's key columns of each changed cell, then
    ``pp_variable``, ``pp_old``, ``pp_new`` and ``pp_change`` (one of
    ``CHANGE_KINDS``).
    """

    verdict: str
    findings: list[Finding]
    document: dict[str, Any]
    _cells: dict[str, np.ndarray] = field(repr=False)
    _keys: pd.DataFrame = field(repr=False)
    _variables: list[str] = field(repr=False)

    @property
    def n_changed(self) -> int:
        return len(self._cells["row"])

    def to_dict(self) -> dict[str, Any]:
        return self.document

    def report(self) -> dict[str, Any]:
        """The document without its own gate, for a report whose findings already hold these."""
        return {k: v for k, v in self.document.items()
                if k not in ("schema_version", "tool", "verdict", "fail_on", "findings", "gate")}

    def restated_provenance(self, **more: Any) -> dict[str, Any]:
        """restated.parquet's metadata (``panelprep`` key): the vintages by sha256, the
        tolerance, each column's role; ``more`` adds the keys of a preparation's files."""
        keys = set(self._keys.columns)
        columns = [{"name": c, "role": ROLE_KEY if c in keys else ROLE_AUXILIARY}
                   for c in [*self._keys.columns, *RESTATED_COLUMNS.values()]]
        return {"schema_version": SCHEMA_VERSION, "version": __version__, **more,
                "file": "restated", "old_sha256": self.document["old"].get("sha256"),
                "new_sha256": self.document["new"].get("sha256"), "columns": columns,
                "restated_columns": RESTATED_COLUMNS, "tolerance": self.document["tolerance"]}

    def restated_table(self) -> pa.Table:
        c = self._cells
        keys = self._keys.iloc[c["row"]].reset_index(drop=True)
        table = pa.Table.from_pandas(keys, preserve_index=False)
        # names taken by index in Arrow: no Python object per changed cell
        names = pa.array(self._variables, pa.string())
        kinds = pa.array(CHANGE_KINDS, pa.string())
        added = {
            RESTATED_COLUMNS["variable"]: names.take(pa.array(c["variable"])),
            RESTATED_COLUMNS["old"]: pa.array(c["old"], pa.float64(), from_pandas=True),
            RESTATED_COLUMNS["new"]: pa.array(c["new"], pa.float64(), from_pandas=True),
            RESTATED_COLUMNS["kind"]: kinds.take(pa.array(c["kind"].astype(np.int64))),
        }
        for name, column in added.items():
            table = table.append_column(name, column)
        return table

    def restated_frame(self) -> pd.DataFrame:
        return self.restated_table().to_pandas()


def _column_kind(values: pd.Series, decimal_comma: bool) -> str:
    """A column's kind for the type-change check; integer and float are both numbers.

    A whole-number column that gains a missing value is read as floats: that
    is not a change of type, so the two are one kind.
    """
    dtype = values.dtype
    if pd.api.types.is_bool_dtype(dtype):
        return "true/false"
    if pd.api.types.is_numeric_dtype(dtype):
        return "number"
    if pd.api.types.is_datetime64_any_dtype(dtype):
        return "date"
    # text is judged on its first values (as the audit judges 10,000 of them): a long id
    # column costs no full pass
    head = values.iloc[:50_000]
    if head.isna().all():
        if values.isna().all():
            return "empty"
        head = values
    return "number" if looks_numeric(head, decimal_comma) else "text"


def _stack_keys(old: pd.DataFrame, new: pd.DataFrame, keys: list[str]) -> pd.DataFrame:
    """Both vintages' key columns, old rows first; a column typed apart in each is compared as text."""
    left, right = old[keys], new[keys]
    differ = [k for k in keys if left[k].dtype != right[k].dtype]
    if differ:
        left = left.astype({k: "string" for k in differ})
        right = right.astype({k: "string" for k in differ})
    return pd.concat([left, right], ignore_index=True)


def _side(cell: np.ndarray) -> _Side:
    keyed = np.flatnonzero(cell >= 0)
    cells, first = np.unique(cell[keyed], return_index=True)
    return _Side(cells=cells, rows=keyed[first], read=len(cell), unkeyed=len(cell) - len(keyed),
                 repeated=len(keyed) - len(cells))


def _shape(entity: np.ndarray, period: np.ndarray) -> dict[str, Any]:
    """Shape of one vintage from its distinct cells (ascending by entity, then period)."""
    if len(entity) == 0:
        return {"rows": 0, "entities": 0, "periods": 0, "balanced": False,
                "entities_with_holes": 0, "singleton_entities": 0}
    # cells ascend, so each entity is one segment whose first and last cell bound its span
    starts = segment_bounds(entity)
    ends = np.append(starts[1:], len(entity)) - 1
    counts = ends - starts + 1
    span = period[ends] - period[starts] + 1
    periods_seen = int(period.max() - period.min() + 1)
    return {
        "rows": len(entity),
        "entities": len(starts),
        "periods": periods_seen,
        "balanced": bool((counts == periods_seen).all()),
        "entities_with_holes": int((span > counts).sum()),
        "singleton_entities": int((counts == 1).sum()),
    }


def _segment_best(group: np.ndarray, value: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Per group (0..n-1): the largest value and the position holding it (-1 where none)."""
    best = np.full(n, -np.inf)
    where = np.full(n, -1, dtype=np.int64)
    if len(group):
        order = np.lexsort((value, group))
        last = np.ones(len(order), dtype=bool)
        last[:-1] = group[order][1:] != group[order][:-1]
        pick = order[last]
        best[group[pick]] = value[pick]
        where[group[pick]] = pick
    return best, where


def _unit_groups(group: np.ndarray, power: np.ndarray, candidate: np.ndarray,
                 compared_per_group: np.ndarray, options: CompareOptions
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Groups (entities or periods) whose cells mostly moved by one power of ten.

    Returns (power per group, 0 where none; cells of that power per group).
    """
    n = len(compared_per_group)
    out_power = np.zeros(n, dtype=np.int64)
    out_cells = np.zeros(n, dtype=np.int64)
    # powers of ten beyond +-60 are not changes of unit (and would not fit the code below)
    candidate = candidate & (np.abs(power) <= 60)
    if not candidate.any():
        return out_power, out_cells
    g, k = group[candidate], power[candidate]
    # one code per (group, power)
    code = g * 128 + (k + 64)
    uniq, counts = np.unique(code, return_counts=True)
    owner = uniq // 128
    best, where = _segment_best(owner, counts.astype(np.float64), n)
    has = where >= 0
    chosen = np.flatnonzero(has)
    cells = best[chosen].astype(np.int64)
    keep = (cells >= options.min_unit_cells) & (
        cells >= options.unit_share * compared_per_group[chosen])
    chosen, cells = chosen[keep], cells[keep]
    out_power[chosen] = uniq[where[chosen]] % 128 - 64
    out_cells[chosen] = cells
    return out_power, out_cells


def _history_hash(period: np.ndarray, values: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """One uint64 per cell from its period and values rounded to ``_HASH_BITS`` binary digits.

    Returns (hash, usable): a cell whose values are all missing is not usable.
    """
    columns: dict[str, np.ndarray] = {"p": period}
    usable = np.zeros(len(period), dtype=bool)
    for j, v in enumerate(values):
        present = ~np.isnan(v)
        usable |= present
        mantissa, exponent = np.frexp(np.where(present, v, 0.0))
        columns[f"m{j}"] = np.where(present, np.rint(mantissa * 2.0**_HASH_BITS), 2.0**40)
        columns[f"e{j}"] = exponent
    hashed = pd.util.hash_pandas_object(pd.DataFrame(columns), index=False).to_numpy()
    return hashed, usable


def _rekeys(gone_cells: tuple[np.ndarray, np.ndarray, list[np.ndarray]],
            new_cells: tuple[np.ndarray, np.ndarray, list[np.ndarray]],
            options: CompareOptions) -> pd.DataFrame:
    """Pairs (old entity, new entity, periods matched, periods both hold) that look re-keyed.

    ``*_cells`` are (entity codes, period codes, value columns) of the cells
    of gone and of new entities.  Cells are joined on their history hash;
    a hash held by more than one cell of its side is dropped first.
    """
    empty = pd.DataFrame({"old": [], "new": [], "matched": [], "overlap": []}, dtype=np.int64)
    if len(gone_cells[0]) == 0 or len(new_cells[0]) == 0 or not gone_cells[2]:
        return empty
    h_old, ok_old = _history_hash(gone_cells[1], gone_cells[2])
    h_new, ok_new = _history_hash(new_cells[1], new_cells[2])
    left = pd.DataFrame({"h": h_old[ok_old], "old": gone_cells[0][ok_old]})
    right = pd.DataFrame({"h": h_new[ok_new], "new": new_cells[0][ok_new]})
    # a hashed cell that two cells of one side share (a constant, zeros) tells no entity
    # apart from another: only cells unique on their side can pair entities
    left, right = (side[~side["h"].duplicated(keep=False).to_numpy()] for side in (left, right))
    pairs = left.merge(right, on="h").groupby(["old", "new"], sort=True).size()
    pairs = pairs[pairs >= options.min_rekey_periods].rename("matched").reset_index()
    if pairs.empty:
        return empty
    old_periods = pd.DataFrame({"old": gone_cells[0], "p": gone_cells[1]})
    new_periods = pd.DataFrame({"new": new_cells[0], "p": new_cells[1]})
    both = (pairs[["old", "new"]].merge(old_periods, on="old").merge(new_periods, on=["new", "p"])
            .groupby(["old", "new"], sort=True).size().rename("overlap").reset_index())
    pairs = pairs.merge(both, on=["old", "new"])
    pairs = pairs[pairs["matched"] >= options.rekey_share * pairs["overlap"]]
    # each entity in at most one pair: the best-matched first
    pairs = pairs.sort_values(["matched", "old", "new"], ascending=[False, True, True])
    pairs = pairs.drop_duplicates("old").drop_duplicates("new")
    return pairs.sort_values("old").reset_index(drop=True).astype(np.int64)


def _picture_columns(labels: list[str]) -> list[str]:
    """Labels of the picture's columns: each period, or ``first to last`` of each run of periods."""
    n = len(labels)
    if n <= _PICTURE_COLUMNS:
        return list(labels)
    column = np.arange(n) * _PICTURE_COLUMNS // n
    starts = np.flatnonzero(np.diff(column, prepend=-1))
    ends = np.append(starts[1:], n) - 1
    return [f"{labels[a]} to {labels[b]}" for a, b in zip(starts, ends)]


def compare_frames(
    old: pd.DataFrame,
    new: pd.DataFrame,
    entity: str | Sequence[str],
    time: str,
    vars: Sequence[str] | None = None,
    freq: str | None = None,
    options: CompareOptions | None = None,
    old_info: dict[str, Any] | None = None,
    new_info: dict[str, Any] | None = None,
    decimal_comma: bool = False,
    missing_tokens: Sequence[str] = (),
    progress: RunLog | None = None,
) -> Comparison:
    """Compare two vintages of a panel held in DataFrames.

    Parameters
    ----------
    old, new : the earlier and the later delivery of the same panel.
    entity, time : the key columns (the same in both).
    vars : variables to compare; default every non-key column both
        vintages hold that looks numeric in either.
    options : tolerances, thresholds and the gate (``CompareOptions``).

    Returns
    -------
    Comparison with ``verdict``, ``findings``, ``to_dict()`` and
    ``restated_table()``.

    Examples
    --------
    >>> import pandas as pd
    >>> old = pd.DataFrame({"firm": ["a", "a", "b"], "year": [1, 2, 1], "sales": [1.0, 2.0, 3.0]})
    >>> new = pd.DataFrame({"firm": ["a", "a", "b"], "year": [1, 2, 1], "sales": [1.0, 2.5, 3.0]})
    >>> compare_frames(old, new, "firm", "year").document["variables"]["sales"]["restated"]
    1
    """
    options = options or CompareOptions()
    options.validate()
    progress = progress if progress is not None else RunLog()
    entity = [entity] if isinstance(entity, str) else list(entity)
    keys = [*entity, time]
    for name, frame in (("OLD", old), ("NEW", new)):
        absent = [k for k in keys if k not in frame.columns]
        if absent:
            raise ColumnError(f"{name}: key columns {absent} not found; columns are "
                              f"{list(frame.columns)}")
    only_old = [c for c in old.columns if c not in new.columns and c not in keys]
    only_new = [c for c in new.columns if c not in old.columns and c not in keys]
    if vars is None:
        names = [c for c in old.columns if c in new.columns and c not in keys
                 and (looks_numeric(old[c], decimal_comma) or looks_numeric(new[c], decimal_comma))]
    else:
        names = list(dict.fromkeys(vars))
        clash = [v for v in names if v in keys]
        if clash:
            raise ColumnError(f"key columns {clash} cannot also be variables")
        nowhere = [v for v in names if v not in old.columns and v not in new.columns]
        if nowhere:
            raise ColumnError(f"variables {nowhere} are in neither vintage")
        only_old = [v for v in names if v not in new.columns]
        only_new = [v for v in names if v not in old.columns]
        names = [v for v in names if v in old.columns and v in new.columns]

    kinds = {c: (_column_kind(old[c], decimal_comma), _column_kind(new[c], decimal_comma))
             for c in [*keys, *names]}
    time_kinds = kinds[time]
    if time_kinds[0] != time_kinds[1] and "empty" not in time_kinds:
        raise InputError(f"time column {time!r} holds {time_kinds[0]} values in the old vintage "
                         f"and {time_kinds[1]} values in the new; the two cannot be aligned on "
                         "one period grid (deliver both in the same form)")
    type_changes = [{"column": c, "old": a, "new": b} for c, (a, b) in kinds.items()
                    if a != b and "empty" not in (a, b)]
    # values are compared where both vintages hold numbers (or true/false); a column that
    # turned to text is a type change, not every cell restated
    compared = [v for v in names if all(k in ("number", "true/false", "empty") for k in kinds[v])
                and kinds[v] != ("empty", "empty")]

    progress("compare.index", f"indexing both vintages on ({', '.join(entity)}) x {time}",
             rows=len(old) + len(new))
    index = build_index(_stack_keys(old, new, keys), entity, time, freq)
    n_old = len(old)
    periods = max(index.n_periods, 1)
    a, b = _side(index.cell[:n_old]), _side(index.cell[n_old:])
    # pair the cells both hold: a sorted search of the old cells among the new
    at = np.searchsorted(b.cells, a.cells)
    at_ok = np.minimum(at, max(len(b.cells) - 1, 0))
    matched = (at < len(b.cells)) & (b.cells[at_ok] == a.cells) if len(b.cells) else \
        np.zeros(len(a.cells), dtype=bool)
    in_old = np.zeros(len(b.cells), dtype=bool)
    in_old[at[matched]] = True
    pair_old, pair_new = a.rows[matched], b.rows[at[matched]]
    pair_cell = a.cells[matched]
    pair_entity, pair_period = pair_cell // periods, pair_cell % periods
    removed, added = a.cells[~matched], b.cells[~in_old]

    n_ent, n_per = index.n_entities, index.n_periods
    ent_a, per_a = a.cells // periods, a.cells % periods
    ent_b, per_b = b.cells // periods, b.cells % periods
    ent_in_a = np.bincount(ent_a, minlength=n_ent) > 0
    ent_in_b = np.bincount(ent_b, minlength=n_ent) > 0
    per_rows_a = np.bincount(per_a, minlength=n_per)
    per_rows_b = np.bincount(per_b, minlength=n_per)
    gone_entities = np.flatnonzero(ent_in_a & ~ent_in_b)
    new_entities = np.flatnonzero(~ent_in_a & ent_in_b)
    gone_periods = np.flatnonzero((per_rows_a > 0) & (per_rows_b == 0))
    new_periods = np.flatnonzero((per_rows_a == 0) & (per_rows_b > 0))
    removed_pp = np.bincount(removed % periods, minlength=n_per)
    added_pp = np.bincount(added % periods, minlength=n_per)
    labels = index.period_labels(np.arange(n_per))

    # cells of gone and new entities, for the re-key search
    gone_mask = np.zeros(n_ent, dtype=bool)
    gone_mask[gone_entities] = True
    new_mask = np.zeros(n_ent, dtype=bool)
    new_mask[new_entities] = True
    gone_at = np.flatnonzero(gone_mask[ent_a])
    new_at = np.flatnonzero(new_mask[ent_b])
    gone_values: list[np.ndarray] = []
    new_values: list[np.ndarray] = []

    variables: dict[str, dict[str, Any]] = {}
    unit_changes: list[dict[str, Any]] = []
    changed = {"row": [], "variable": [], "old": [], "new": [], "kind": []}
    share_grid: list[list[float | None]] = []
    totals = dict.fromkeys(("restated", "unit", "now_missing", "filled"), 0)
    tokens = tuple(missing_tokens)
    for j, name in enumerate(compared):
        progress("compare.values", f"comparing {name}", rows=len(pair_old))
        old_all = to_float(old[name], name, decimal_comma, tokens)[0]
        new_all = to_float(new[name], name, decimal_comma, tokens)[0]
        gone_values.append(old_all[a.rows[gone_at]])
        new_values.append(new_all[b.rows[new_at]])
        o, n = old_all[pair_old], new_all[pair_new]
        del old_all, new_all
        summary, hit, kind, units, shares = _compare_variable(
            name, o, n, pair_entity, pair_period, index, labels, options)
        variables[name] = summary
        unit_changes += units
        share_grid.append(shares)
        for key, label in (("restated", "restated"), ("unit", "unit_change_cells"),
                           ("now_missing", "became_missing"), ("filled", "filled_in")):
            totals[key] += summary[label]
        changed["row"].append(pair_new[hit])
        changed["variable"].append(np.full(len(hit), j, dtype=np.int64))
        changed["old"].append(o[hit])
        changed["new"].append(n[hit])
        changed["kind"].append(kind)

    progress("compare.rekeys", "looking for re-keyed entities",
             rows=len(gone_at) + len(new_at))
    pairs = _rekeys((ent_a[gone_at], per_a[gone_at], gone_values),
                    (ent_b[new_at], per_b[new_at], new_values), options)
    rekeyed = [{"old_entity": o_key, "new_entity": n_key, "periods_matched": int(m),
                "periods_both": int(v)}
               for o_key, n_key, m, v in zip(index.entity_key(pairs["old"].to_numpy()),
                                             index.entity_key(pairs["new"].to_numpy()),
                                             pairs["matched"], pairs["overlap"])]

    shape = {"old": _shape(ent_a, per_a), "new": _shape(ent_b, per_b)}
    for side, s in (("old", shape["old"]), ("new", shape["new"])):
        cells = per_a if side == "old" else per_b
        s["first_period"] = labels[int(cells.min())] if len(cells) else None
        s["last_period"] = labels[int(cells.max())] if len(cells) else None

    document: dict[str, Any] = {
        "schema_version": SCHEMA_VERSION,
        "tool": {"name": "panelprep", "version": __version__},
        "keys": {"entity": entity, "time": time, "freq": index.axis.name,
                 "freq_inferred": index.axis.inferred},
        "old": old_info or {"path": None, "sha256": None, "rows": len(old)},
        "new": new_info or {"path": None, "sha256": None, "rows": len(new)},
        "tolerance": {"rtol": options.rtol, "atol": options.atol,
                      "max_restated_share": options.max_restated_share,
                      "rule": "restated when |new - old| > atol + rtol * |old|"},
        "rows": {"old": a.read, "new": b.read, "old_cells": len(a.cells), "new_cells": len(b.cells),
                 "both": int(matched.sum()), "removed": len(removed), "added": len(added),
                 "old_without_key": a.unkeyed, "new_without_key": b.unkeyed,
                 "old_repeated_keys": a.repeated, "new_repeated_keys": b.repeated},
        "entities": {"old": int(ent_in_a.sum()), "new": int(ent_in_b.sum()),
                     "both": int((ent_in_a & ent_in_b).sum()),
                     "gone": len(gone_entities), "appeared": len(new_entities),
                     "gone_examples": index.entity_key(gone_entities[:_SHOWN]),
                     "appeared_examples": index.entity_key(new_entities[:_SHOWN])},
        "periods": {"gone": [labels[p] for p in gone_periods],
                    "appeared": [labels[p] for p in new_periods]},
        "by_period": [{"period": labels[p], "rows_old": int(per_rows_a[p]),
                       "rows_new": int(per_rows_b[p]), "removed": int(removed_pp[p]),
                       "added": int(added_pp[p])}
                      for p in np.flatnonzero((per_rows_a > 0) | (per_rows_b > 0))],
        "variables": variables,
        "not_compared": [v for v in names if v not in compared],
        "columns": {"only_old": only_old, "only_new": only_new},
        "types": type_changes,
        "rekeyed": rekeyed,
        "unit_changes": unit_changes,
        "shape": shape,
        "changed_cells": {"restated": totals["restated"], "unit_change": totals["unit"],
                          "became_missing": totals["now_missing"],
                          "filled_in": totals["filled"]},
        "picture": {"variables": compared, "periods": _picture_columns(labels),
                    "share": share_grid},
    }
    findings = _findings(document, options)
    findings = apply_severities(findings, options.severities)
    verdict = gate(findings, options.fail_on)
    document["verdict"] = verdict
    document["fail_on"] = options.fail_on
    document["findings"] = ordered([f.to_dict() for f in findings])
    document["gate"] = gate_block(document["findings"], options.fail_on)
    cells = {k: (np.concatenate(v) if v else np.zeros(0)) for k, v in changed.items()}
    for key, dtype in (("row", np.int64), ("variable", np.int64), ("kind", np.int8)):
        cells[key] = cells[key].astype(dtype)
    # restated.parquet in key order: entity, period, variable
    order = np.lexsort((cells["variable"], index.cell[n_old + cells["row"]]))
    cells = {k: v[order] for k, v in cells.items()}
    return Comparison(verdict=verdict, findings=findings, document=document, _cells=cells,
                      _keys=new[keys], _variables=compared)


def _compare_variable(
    name: str, o: np.ndarray, n: np.ndarray, pair_entity: np.ndarray, pair_period: np.ndarray,
    index, labels: list[str], options: CompareOptions,
) -> tuple[dict[str, Any], np.ndarray, np.ndarray, list[dict[str, Any]], list[float | None]]:
    """One variable on the paired cells ``o`` (old) and ``n`` (new).

    Returns its summary, the positions of the changed cells with their kind
    (an index into ``CHANGE_KINDS``), its unit changes, and its restated
    share per period (None where no cell was compared).  Full-length passes
    are few; everything about the size of a change runs on the restated
    cells alone.
    """
    n_per = index.n_periods
    o_there, n_there = ~np.isnan(o), ~np.isnan(n)
    both = o_there & n_there
    with np.errstate(invalid="ignore"):
        # NaN compares false: a cell missing on either side is never restated
        restated_at = np.flatnonzero(np.abs(n - o) > options.atol + options.rtol * np.abs(o))
    now_missing_at = np.flatnonzero(o_there & ~n_there)
    filled_at = np.flatnonzero(~o_there & n_there)
    old_r, new_r = o[restated_at], n[restated_at]
    diff = np.abs(new_r - old_r)
    ent_r, per_r = pair_entity[restated_at], pair_period[restated_at]
    with np.errstate(divide="ignore", invalid="ignore"):
        relative = np.where(old_r != 0, diff / np.abs(old_r), -np.inf)
    unit, unit_changes = _unit_cells(name, old_r, new_r, ent_r, per_r, both & (o != 0),
                                     pair_entity, pair_period, index, labels, options)

    compared_pp = np.bincount(pair_period[both], minlength=n_per)
    restated_pp = np.bincount(per_r, minlength=n_per)
    abs_best, abs_at = _segment_best(per_r, diff, n_per)
    rel_best, _ = _segment_best(per_r, relative, n_per)
    n_both = int(compared_pp.sum())

    def largest(score: np.ndarray) -> dict[str, Any] | None:
        if len(score) == 0 or not np.isfinite(score).any():
            return None
        i = int(np.argmax(score))
        return {"change": float(score[i]), "old": float(old_r[i]), "new": float(new_r[i]),
                "entity": index.entity_key([ent_r[i]])[0], "period": labels[per_r[i]]}

    by_period = [{
        "period": labels[p], "compared": int(compared_pp[p]), "restated": int(restated_pp[p]),
        "share": float(restated_pp[p] / compared_pp[p]),
        "largest_abs_change": float(abs_best[p]) if abs_at[p] >= 0 else None,
        "largest_rel_change": (float(rel_best[p]) if abs_at[p] >= 0
                               and np.isfinite(rel_best[p]) else None),
    } for p in np.flatnonzero(compared_pp)]
    # the picture's columns: every period, or contiguous runs of them on a long grid
    column = np.arange(n_per) * min(n_per, _PICTURE_COLUMNS) // max(n_per, 1)
    compared_col = np.bincount(column, weights=compared_pp, minlength=min(n_per, _PICTURE_COLUMNS))
    restated_col = np.bincount(column, weights=restated_pp, minlength=len(compared_col))
    shares = [None if c == 0 else float(r / c) for c, r in zip(compared_col, restated_col)]
    summary = {
        "compared": n_both,
        "restated": len(restated_at),
        "restated_share": float(len(restated_at) / n_both) if n_both else None,
        "unit_change_cells": int(unit.sum()),
        "became_missing": len(now_missing_at),
        "filled_in": len(filled_at),
        "largest_abs_change": largest(diff),
        "largest_rel_change": largest(relative),
        "by_period": by_period,
    }
    kind_r = np.where(unit, CHANGE_KINDS.index(UNIT), CHANGE_KINDS.index(RESTATED))
    at = np.concatenate([restated_at, now_missing_at, filled_at])
    kind = np.concatenate([kind_r, np.full(len(now_missing_at), CHANGE_KINDS.index(NOW_MISSING)),
                           np.full(len(filled_at), CHANGE_KINDS.index(FILLED))]).astype(np.int8)
    return summary, at, kind, unit_changes, shares


def _unit_cells(
    name: str, old_r: np.ndarray, new_r: np.ndarray, ent_r: np.ndarray, per_r: np.ndarray,
    ratio_base: np.ndarray, pair_entity: np.ndarray, pair_period: np.ndarray, index,
    labels: list[str], options: CompareOptions,
) -> tuple[np.ndarray, list[dict[str, Any]]]:
    """Which restated cells moved by a group's power of ten, and the groups (entities, periods).

    A group (an entity or a period) has a likely unit change when most of its
    cells with an old value other than zero (``ratio_base``) are old times one
    power of ten other than 1 (``_unit_groups``).
    """
    usable = (old_r != 0) & (new_r != 0) & (np.sign(old_r) == np.sign(new_r))
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.abs(np.where(usable, new_r / np.where(usable, old_r, 1.0), 1.0))
        power = np.rint(np.log10(ratio)).astype(np.int64)
        near = np.abs(ratio / 10.0 ** power.astype(np.float64) - 1.0) <= _UNIT_RATIO_TOL
    candidate = usable & (power != 0) & near
    if not candidate.any():
        return candidate, []
    out: list[dict[str, Any]] = []
    unit = np.zeros(len(old_r), dtype=bool)
    found = {}
    for scope, group, every in (("period", per_r, pair_period), ("entity", ent_r, pair_entity)):
        size = index.n_entities if scope == "entity" else index.n_periods
        compared = np.bincount(every[ratio_base], minlength=size)
        powers, cells = _unit_groups(group, power, candidate, compared, options)
        unit |= candidate & (powers[group] != 0) & (power == powers[group])
        found[scope] = (compared, powers, cells)
    compared, powers, cells = found["period"]
    flagged = np.flatnonzero(powers)
    if len(flagged) > 1 and len(np.unique(powers[flagged])) == 1 and np.array_equal(
            flagged, np.flatnonzero(compared)):
        # every period in one new unit: one change of the whole variable
        return unit, [{"variable": name, "scope": "variable", "where": "every period",
                       "factor": float(10.0 ** int(powers[flagged[0]])),
                       "cells": int(cells.sum()), "compared": int(compared.sum())}]
    for scope in ("entity", "period"):
        compared, powers, cells = found[scope]
        flagged = np.flatnonzero(powers)
        where = (index.entity_key(flagged) if scope == "entity"
                 else [labels[p] for p in flagged])
        out += [{"variable": name, "scope": scope, "where": w,
                 "factor": float(10.0 ** int(powers[g])), "cells": int(cells[g]),
                 "compared": int(compared[g])} for w, g in zip(where, flagged)]
    return unit, out


def _shown(value: Any) -> str:
    if isinstance(value, bool):
        return "yes" if value else "no"
    return f"{value:,}" if isinstance(value, int) else str(value)


def _findings(doc: dict[str, Any], options: CompareOptions) -> list[Finding]:
    """The findings of a comparison document, in a fixed order."""
    out: list[Finding] = []
    rows, ents, pers = doc["rows"], doc["entities"], doc["periods"]
    rekeyed = doc["rekeyed"]

    def add(fid: str, severity: str, count: int, message: str, examples=(), details=None):
        if count:
            out.append(Finding(id=fid, severity=severity, count=count, message=message,
                               examples=list(examples), details=details or {}))

    for side in ("old", "new"):
        add("vintage-key-repeated", "warning", rows[f"{side}_repeated_keys"],
            f"{plural(rows[f'{side}_repeated_keys'], 'row')} of the {side} vintage "
            f"{plural_word(rows[f'{side}_repeated_keys'], 'repeats')} an (entity, time) key; "
            "each key is compared on its first row",
            details={"vintage": side})
        add("vintage-key-missing", "info", rows[f"{side}_without_key"],
            f"{plural(rows[f'{side}_without_key'], 'row')} of the {side} vintage without a full "
            "key, not compared", details={"vintage": side})
    add("vintage-columns-changed", "warning" if doc["columns"]["only_old"] else "info",
        len(doc["columns"]["only_old"]) + len(doc["columns"]["only_new"]),
        "columns only in the old vintage: " + (", ".join(doc["columns"]["only_old"]) or "none")
        + "; only in the new: " + (", ".join(doc["columns"]["only_new"]) or "none"),
        [{"column": c, "in": "old only"} for c in doc["columns"]["only_old"]]
        + [{"column": c, "in": "new only"} for c in doc["columns"]["only_new"]])
    add("vintage-type-changed", "warning", len(doc["types"]),
        "columns whose kind changed: " + ", ".join(
            f"{t['column']} ({t['old']} -> {t['new']})" for t in doc["types"]), doc["types"])
    periods_gone = pers["gone"]
    add("vintage-periods-gone", "warning", len(periods_gone),
        f"{plural(len(periods_gone), 'period')} with rows in the old vintage, none in the new: "
        + ", ".join(periods_gone[:_SHOWN]), [{"period": p} for p in periods_gone])
    add("vintage-periods-new", "info", len(pers["appeared"]),
        f"{plural(len(pers['appeared']), 'period')} new in this vintage: "
        + ", ".join(pers["appeared"][:_SHOWN]), [{"period": p} for p in pers["appeared"]])
    add("vintage-entities-gone", "warning", ents["gone"],
        f"{plural(ents['gone'], 'entity')} of the old vintage not in the new"
        + (f" ({len(rekeyed)} of them look re-keyed, see vintage-entity-rekeyed)" if rekeyed
           else ""), [{"entity": e} for e in ents["gone_examples"]])
    add("vintage-entities-new", "info", ents["appeared"],
        f"{plural(ents['appeared'], 'entity')} new in this vintage",
        [{"entity": e} for e in ents["appeared_examples"]])
    changed = [p for p in doc["by_period"] if p["removed"]]
    add("vintage-rows-removed", "warning", rows["removed"],
        f"{plural(rows['removed'], 'row')} (entity, period keys) of the old vintage not in "
        f"the new, in {plural(len(changed), 'period')}",
        [{"period": p["period"], "rows": p["removed"]} for p in changed])
    grown = [p for p in doc["by_period"] if p["added"]]
    add("vintage-rows-added", "info", rows["added"],
        f"{plural(rows['added'], 'row')} (entity, period keys) new in this vintage, in "
        f"{plural(len(grown), 'period')}", [{"period": p["period"], "rows": p["added"]} for p in grown])
    add("vintage-entity-rekeyed", "warning", len(rekeyed),
        f"{plural(len(rekeyed), 'entity')} gone from the old vintage whose history matches a "
        "new entity's over the periods both hold (likely re-keyed)", rekeyed)
    restated = {v: s for v, s in doc["variables"].items() if s["restated"]}
    total = sum(s["restated"] for s in restated.values())
    add("vintage-values-restated", "warning", total,
        f"{plural(total, 'cell')} with a different value in the new vintage (beyond atol "
        f"{options.atol:g} + rtol {options.rtol:g} x |old|): "
        + ", ".join(f"{v} {s['restated']:,} ({100 * s['restated_share']:.2f}%)"
                    for v, s in restated.items()),
        [{"variable": v, "cells": s["restated"], "share": s["restated_share"],
          "largest_abs_change": (s["largest_abs_change"] or {}).get("change")}
         for v, s in restated.items()])
    limit = options.max_restated_share
    if limit is not None:
        over = {v: s for v, s in restated.items() if s["restated_share"] > limit}
        add("vintage-restated-over-limit", "error", len(over),
            f"{plural(len(over), 'variable')} restated in more than {100 * limit:g}% of "
            "their cells "
            "(--max-restated-share): " + ", ".join(
                f"{v} {100 * s['restated_share']:.2f}%" for v, s in over.items()),
            [{"variable": v, "share": s["restated_share"]} for v, s in over.items()])
    units = doc["unit_changes"]
    add("vintage-unit-changed", "warning", len(units),
        f"{plural(len(units), 'group')} (entity, period or variable) whose values moved by a "
        "power of ten "
        "(a likely change of unit): " + ", ".join(
            f"{u['variable']} in {u['scope']} {u['where']} x{u['factor']:g}" for u in units[:5]),
        units)
    now_missing = {v: s["became_missing"] for v, s in doc["variables"].items()
                   if s["became_missing"]}
    add("vintage-values-now-missing", "warning", sum(now_missing.values()),
        f"{plural(sum(now_missing.values()), 'cell')} present in the old vintage, missing in "
        "the new: " + ", ".join(f"{v} {c:,}" for v, c in now_missing.items()),
        [{"variable": v, "cells": c} for v, c in now_missing.items()])
    filled = {v: s["filled_in"] for v, s in doc["variables"].items() if s["filled_in"]}
    add("vintage-values-filled", "info", sum(filled.values()),
        f"{plural(sum(filled.values()), 'cell')} missing in the old vintage, filled in the "
        "new: "
        + ", ".join(f"{v} {c:,}" for v, c in filled.items()),
        [{"variable": v, "cells": c} for v, c in filled.items()])
    old, new = doc["shape"]["old"], doc["shape"]["new"]
    moved = [k for k in ("balanced", "entities_with_holes", "singleton_entities")
             if old[k] != new[k]]
    add("vintage-shape-changed", "info", len(moved),
        "the panel's shape changed: " + "; ".join(
            f"{k.replace('_', ' ')} {_shown(old[k])} -> {_shown(new[k])}" for k in moved),
        [{"measure": k, "old": old[k], "new": new[k]} for k in moved])
    return out


def compare_files(
    old_path: str | Path,
    new_path: str | Path,
    entity: str | Sequence[str],
    time: str,
    vars: Sequence[str] | None = None,
    read_options: ReadOptions | None = None,
    progress: RunLog | None = None,
    **kwargs: Any,
) -> Comparison:
    """Read two vintages (only the columns needed when ``vars`` is given) and compare them."""
    read_options = read_options or DEFAULT_READ
    progress = progress if progress is not None else RunLog()
    entity = [entity] if isinstance(entity, str) else list(entity)
    frames, infos = [], []
    for side, path in (("old", old_path), ("new", new_path)):
        progress(f"read.{side}", f"reading {path}")
        wanted = None if vars is None else _present(Path(path), list(vars), read_options)
        frame, info = load(path, entity, time, wanted, read_options)
        frames.append(frame)
        infos.append(info)
    return compare_frames(frames[0], frames[1], entity, time, vars, old_info=infos[0],
                          new_info=infos[1], decimal_comma=read_options.decimal_comma,
                          missing_tokens=read_options.missing_tokens, progress=progress, **kwargs)


def _present(path: Path, wanted: list[str], read_options: ReadOptions) -> list[str]:
    """The variables of ``wanted`` this file holds (a vintage may lack one: it is a finding)."""
    names = set(column_names(path, read_options))
    return [v for v in wanted if v in names]



COMPARISON_FILES = ("restated.parquet", "comparison.json", "comparison.txt", "comparison.html")


def write_comparison(result: Comparison, folder, progress: RunLog | None = None) -> None:
    """restated.parquet, comparison.json, comparison.txt and comparison.html into an ``OutputFolder``."""
    import json

    from panelprep.report.comparison import comparison_lines, render_comparison_html
    from panelprep.report.text import verdict_line

    progress = progress if progress is not None else RunLog()
    doc = result.to_dict()
    progress("write.restated", "writing restated.parquet", rows=result.n_changed)
    meta = {"panelprep": json.dumps(result.restated_provenance(), sort_keys=True,
                                    allow_nan=False)}
    write_table(result.restated_table(), folder.path("restated.parquet"), "parquet", meta)
    progress("write.comparison", "writing comparison.json, comparison.txt, comparison.html")
    texts = {
        "comparison.json": json.dumps(doc, indent=2, ensure_ascii=False, allow_nan=False) + "\n",
        "comparison.txt": "\n".join([*comparison_lines(doc), "", verdict_line(doc)]) + "\n",
        "comparison.html": render_comparison_html(doc),
    }
    for name, text in texts.items():
        try:
            folder.path(name).write_text(text, encoding="utf-8")
        except OSError as err:
            raise InputError(f"cannot write {name}: {err.strerror or err}") from None
