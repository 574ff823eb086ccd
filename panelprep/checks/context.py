"""What every check reads: the frame, its index, numeric values and the samples.

Built once per audit; the expensive pieces are cached properties so a check
that needs them pays once and the rest reuse them.

Samples (all boolean row masks over the frame):

* ``keyed``: entity and time present;
* ``repeat``: a keyed row that repeats an earlier row exactly on every
  column read (a pair counts one repeat);
* ``base``: keyed and not a repeat;
* ``sample``: the estimation sample, ``base`` rows whose selected
  variables are all present (and numeric).

Counts after the key checks are taken on ``sample``.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
import pandas as pd

from panelprep._groups import group_counts, occurring, segment_bounds, select_rows
from panelprep._scale import Scaling, scaled_group_means
from panelprep.index import PanelIndex
from panelprep.limits import Thresholds
from panelprep.variation import variation_table, with_within_measures

# every whole number below 2^53 in magnitude is exact in float64; from there on some are not
_EXACT_INTEGER = 2.0**53
_NUMBER = re.compile(r"^\s*[-+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?\s*$")
# NaN as text, as Python, numpy and pandas write it (nan, NaN, -nan)
_NAN_TEXT = re.compile(r"^\s*[-+]?[nN][aA][nN]\s*$")


@dataclass(frozen=True)
class NonNumeric:
    """Text found in a variable that should be numeric, and values read as missing.

    ``rows`` are the positions of values that are not numbers;
    ``read_as_missing`` counts declared missing tokens; ``nan_rows`` are the
    positions of NaN values read as missing (the text ``nan`` in CSV, a NaN
    stored in a Parquet or Arrow float column); ``rounded_rows`` those of
    decimals (Parquet/Arrow ``decimal`` columns) that float64 does not hold
    exactly at the column's scale, read as the nearest float64 all the same.
    """

    column: str
    rows: np.ndarray
    values: list[str]
    read_as_missing: int
    nan_rows: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    rounded_rows: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))


@dataclass(eq=False)
class AuditContext:
    """The shared inputs of all checks (see the module docstring)."""

    frame: pd.DataFrame
    index: PanelIndex
    variables: list[str]
    thresholds: Thresholds = field(default_factory=Thresholds)
    decimal_comma: bool = False
    missing_tokens: tuple[str, ...] = ()
    # 0-based input position of each frame row, when earlier steps removed rows
    origin: np.ndarray | None = None
    # when the frame was read for this run: called with the variables once their float
    # block is taken, to drop the frame's copies of them (about n x k x 8 bytes)
    release_columns: Callable[[list[str]], None] | None = None

    def input_rows(self, rows: np.ndarray) -> np.ndarray:
        """Row numbers in the input (data rows from 1) of frame positions ``rows``."""
        rows = np.asarray(rows, dtype=np.int64)
        return (rows if self.origin is None else self.origin[rows]) + 1

    @cached_property
    def _numeric(self) -> tuple[np.ndarray, dict[str, NonNumeric]]:
        if self.release_columns is None and "_released" in self.__dict__:
            raise RuntimeError("the numeric block was released with the frame's variable "
                               "columns and cannot be rebuilt")
        n, k = len(self.frame), len(self.variables)
        values = np.empty((n, k), dtype=np.float64, order="F")
        bad: dict[str, NonNumeric] = {}
        for j, name in enumerate(self.variables):
            values[:, j], problem = to_float(
                self.frame[name], name, self.decimal_comma, self.missing_tokens
            )
            if problem is not None:
                bad[name] = problem
        # a column with text that is not a number, or decimals rounded, keeps it: the
        # findings quote the values as written (the repeated-row examples, which compare
        # rows on the columns too, come from checks that run before this block is taken)
        if self.release_columns is not None and not any(
                p.rows.size or p.rounded_rows.size for p in bad.values()):
            _ = self._duplicates  # compares rows sharing a key on the columns: before they go
            release, self.release_columns = self.release_columns, None
            self.__dict__["_released"] = True
            release(list(self.variables))
        return values, bad

    @property
    def values(self) -> np.ndarray:
        """Selected variables as float64 (n, k), column-major; NaN where absent."""
        return self._numeric[0]

    def release_values(self) -> None:
        """Free the full numeric block, and the checks' sorted cells, once the audit is done.

        It is a cache: ``values`` rebuilds it from the frame if asked again
        (unless ``release_columns`` dropped the frame's columns).  The
        sample's own block and every mask stay.
        """
        self.__dict__.pop("_numeric", None)
        # the checks' row-sized arrays of the sample; cached, so rebuilt if asked again
        self.__dict__.pop("sample_cells", None)
        if "sample_index" in self.__dict__:
            for name in ("cell", "order", "sorted_cells"):
                self.sample_index.__dict__.pop(name, None)

    def narrowed(self, keep: np.ndarray) -> AuditContext:
        """The same audit on a smaller estimation sample: ``sample & keep``.

        What describes the rows read (the numeric block, repeats, conflicting
        keys, ``base``, ``complete``) is shared, not recomputed; what depends
        on the sample (its index, cells, gaps, counts, variation) is derived
        afresh, lazily, from the narrowed mask.  Used to judge the audit on
        the sample left after the post-audit cleaning policies.
        """
        out = AuditContext(self.frame, self.index, self.variables, self.thresholds,
                           self.decimal_comma, self.missing_tokens, origin=self.origin)
        shared = {"_duplicates": self._duplicates, "base": self.base, "complete": self.complete,
                  "sample": self.sample & keep}
        for name in ("_numeric", "missing_by_period"):
            if name in self.__dict__:
                shared[name] = self.__dict__[name]
        out.__dict__.update(shared)
        return out

    @property
    def non_numeric(self) -> dict[str, NonNumeric]:
        return self._numeric[1]

    @property
    def keyed(self) -> np.ndarray:
        return self.index.keyed

    @cached_property
    def _duplicates(self) -> tuple[np.ndarray, np.ndarray]:
        """(repeat mask, cells that are conflicting duplicate keys)."""
        n = len(self.frame)
        order = self.index.order
        cells = self.index.cell[order]
        shared = np.zeros(len(order), dtype=bool)
        if len(order) > 1:
            same = cells[1:] == cells[:-1]
            shared[1:] |= same
            shared[:-1] |= same
        candidates = np.sort(order[shared])
        repeat = np.zeros(n, dtype=bool)
        if len(candidates):
            # rows are compared on the key and the selected variables, so the
            # count is the same whether the file was read whole or only in part
            columns = [*self.index.entity, self.index.time, *self.variables]
            subset = self.frame[columns].iloc[candidates]
            instant = self.index.axis.instant
            if instant is not None:
                # the time value as the moment it denotes: 2021-01-31 and 2021-01-31T00:00:00
                # on otherwise identical rows are an exact repeat, not a conflict
                subset = subset.copy()
                subset[self.index.time] = instant[candidates]
            repeat[candidates] = subset.duplicated(keep="first").to_numpy()
        remaining = candidates[~repeat[candidates]]
        cell_left = self.index.cell[remaining]
        uniq, counts = np.unique(cell_left, return_counts=True)
        return repeat, uniq[counts > 1]

    @property
    def repeat(self) -> np.ndarray:
        return self._duplicates[0]

    @property
    def conflicting_cells(self) -> np.ndarray:
        return self._duplicates[1]

    @cached_property
    def base(self) -> np.ndarray:
        return self.keyed & ~self.repeat

    @cached_property
    def complete(self) -> np.ndarray:
        """Rows whose selected variables are all present."""
        if not self.variables:
            return np.ones(len(self.frame), dtype=bool)
        return ~np.isnan(self.values).any(axis=1)

    @cached_property
    def sample(self) -> np.ndarray:
        return self.base & self.complete

    @cached_property
    def sample_index(self) -> PanelIndex:
        return self.index.subset(self.sample)

    @cached_property
    def sample_values(self) -> np.ndarray:
        return select_rows(self.values, self.sample)

    @cached_property
    def sample_counts(self) -> np.ndarray:
        """Rows per entity in the estimation sample."""
        return group_counts(self.sample_index.entity_codes, self.sample_index.n_entities)

    @cached_property
    def sample_cells(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Distinct (entity, period) pairs of the sample, sorted: (entity, period, starts)."""
        ix = self.sample_index
        cells = ix.sorted_cells
        entity = cells // max(ix.n_periods, 1)
        period = cells - entity * max(ix.n_periods, 1)
        return entity, period, segment_bounds(entity)

    @cached_property
    def gaps(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Per sample entity: holes in its span, the longest hole, periods missing inside it.

        One diff over the sorted distinct cells: a jump of more than one
        period inside an entity is a hole of (jump - 1) periods.
        """
        entity, period, starts = self.sample_cells
        n_entities = self.sample_index.n_entities
        holes = np.zeros(n_entities, dtype=np.int64)
        longest = np.zeros(n_entities, dtype=np.int64)
        missing = np.zeros(n_entities, dtype=np.int64)
        if len(entity) > 1:
            width = np.diff(period) - 1
            width[entity[1:] != entity[:-1]] = 0
            owner = entity[1:]
            jump = width > 0
            holes = group_counts(owner[jump], n_entities)
            missing = np.bincount(owner, weights=width, minlength=n_entities).astype(np.int64)
            # longest hole: a segment maximum over the entity-sorted widths
            per_entity = np.concatenate(([0], width))
            longest[entity[starts]] = np.maximum.reduceat(per_entity, starts)
        return holes, longest, missing

    @cached_property
    def missing_by_period(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Per period that occurs, keyed rows (exact repeats collapsed) and the missing
        cells of each selected variable: (period codes (P,), rows (P,), missing (P, k)).

        Only the periods that occur are listed, so the cost follows the rows,
        not the length of the grid.  Taken once from the numeric block, so it
        survives ``release_values``; ``narrowed`` contexts share it (it
        describes the rows read).
        """
        period = self.index.period_codes[self.base]
        present, compact, rows = occurring(period, self.index.n_periods)
        missing = np.zeros((len(present), len(self.variables)), dtype=np.int64)
        block = self.values
        for j in range(len(self.variables)):
            absent = np.isnan(block[:, j])[self.base]
            missing[:, j] = np.bincount(compact[absent], minlength=len(present))
        return present, rows, missing

    @cached_property
    def periods_per_entity(self) -> np.ndarray:
        """Distinct periods observed per entity in the sample."""
        entity, _, _ = self.sample_cells
        return group_counts(entity, self.sample_index.n_entities)

    @cached_property
    def sample_means(self) -> tuple[Scaling, np.ndarray]:
        """Scaling and entity means of the sample block (``_scale.scaled_group_means``).

        Read by the variation table here and, for the final sample, by the
        variance components and the evidence (``_moments.standard_sample``).
        """
        return scaled_group_means(self.sample_values, self.sample_index.entity_codes,
                                  self.sample_counts)

    @cached_property
    def variation(self) -> dict[str, dict]:
        """The variation table of the estimation sample (``variation_table``, ``within_measures``)."""
        return with_within_measures(variation_table(
            self.sample_index, self.sample_values, self.variables, self.thresholds.constant_rtol,
            shared=self.sample_means,
        ))

    def row_key(self, rows: np.ndarray) -> list[dict[str, object]]:
        """Example dicts (input row counted from 1, entity, time) for frame positions."""
        rows = np.asarray(rows, dtype=np.int64)
        out = []
        for row, number in zip(rows, self.input_rows(rows)):
            example: dict[str, object] = {"row": int(number)}
            for column in [*self.index.entity, self.index.time]:
                value = self.frame[column].iloc[int(row)]
                example[column] = None if pd.isna(value) else plain_value(value)
            out.append(example)
        return out


def plain_value(value: object) -> object:
    """A numpy scalar as the Python number it holds; other kinds of value as text."""
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.floating,)):
        return float(value)
    if isinstance(value, (str, int, float, bool)):
        return value
    return str(value)


def to_float(
    values: pd.Series, name: str, decimal_comma: bool, missing_tokens: tuple[str, ...]
) -> tuple[np.ndarray, NonNumeric | None]:
    """Numeric view of a column; text that is not a number becomes NaN and is reported.

    Infinite values (a text such as ``1e400`` reads as one) and whole numbers
    float64 cannot hold exactly count as not numbers.  Every other finite
    magnitude is usable: second moments are taken on centred, scaled columns
    (``_scale.standardise``).  Declared missing
    tokens that are numbers (``-999``) also apply to a column already stored
    as numbers.  NaN is missing, and reported apart from the empty field:
    the text ``nan`` (any case, a sign allowed) and a NaN that a column
    keeps apart from its nulls (``double[pyarrow]``, as ``io.read_frame``
    reads a Parquet float column holding NaN).  In a plain float64 column
    NaN is how pandas writes missing, so it is simply missing there.
    Booleans are 0 and 1 (nulls missing).
    """
    if pd.api.types.is_bool_dtype(values.dtype):
        return values.to_numpy(dtype=np.float64, na_value=np.nan), None
    if pd.api.types.is_numeric_dtype(values.dtype):
        out = values.to_numpy(dtype=np.float64, na_value=np.nan, copy=True)
        token_missing = np.isin(out, _numeric_tokens(missing_tokens, decimal_comma))
        nan = np.isnan(out) & values.notna().to_numpy()
        unusable = np.isinf(out)
        unusable |= _inexact_integers(values, out)
        bad_rows = np.flatnonzero(unusable)
        rounded = _rounded_decimals(values, out) & ~token_missing
        if len(bad_rows) == 0 and not token_missing.any() and not nan.any() and not rounded.any():
            return out, None
        out[token_missing | unusable] = np.nan
        shown = list(dict.fromkeys(str(v) for v in values.iloc[bad_rows[:200]]))[:10]
        return out, NonNumeric(
            column=name, rows=bad_rows, values=shown, read_as_missing=int(token_missing.sum()),
            nan_rows=np.flatnonzero(nan), rounded_rows=np.flatnonzero(rounded),
        )
    text = values.astype("str")
    present = values.notna().to_numpy()
    stripped = text.str.strip()
    if decimal_comma:
        stripped = stripped.str.replace(",", ".", regex=False)
    is_number = stripped.str.fullmatch(_NUMBER.pattern).fillna(False).to_numpy(dtype=bool)
    token_missing = text.str.strip().isin(list(missing_tokens)).to_numpy() & present
    nan = stripped.str.fullmatch(_NAN_TEXT.pattern).fillna(False).to_numpy(dtype=bool)
    nan = nan & present & ~token_missing
    blank = (stripped == "").to_numpy() & present
    out = np.full(len(values), np.nan)
    out[is_number] = stripped[is_number].astype(np.float64).to_numpy()
    is_number = is_number & ~_inexact_integer_text(stripped, out)
    # "1e400" reads as infinity: unusable, not a number
    is_number &= ~np.isinf(out)
    out[token_missing | ~is_number] = np.nan
    bad_rows = np.flatnonzero(present & ~is_number & ~token_missing & ~blank & ~nan)
    if len(bad_rows) == 0 and not token_missing.any() and not nan.any():
        return out, None
    shown = list(dict.fromkeys(text.iloc[bad_rows[:200]].tolist()))[:10]
    return out, NonNumeric(
        column=name, rows=bad_rows, values=shown, read_as_missing=int(token_missing.sum()),
        nan_rows=np.flatnonzero(nan),
    )


def _rounded_decimals(values: pd.Series, as_float: np.ndarray) -> np.ndarray:
    """Rows of a decimal column whose float64 does not give back the decimal at its scale.

    The float64 values are cast back to a decimal of the column's scale (76
    digits wide, so nothing overflows) and compared with the stored decimals:
    ``0.10`` comes back as ``0.10``, ``99999999999999.99`` as ``...98``.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    kind = getattr(values.dtype, "pyarrow_dtype", None)
    if kind is None or not pa.types.is_decimal(kind):
        return np.zeros(len(values), dtype=bool)
    wide = pa.decimal256(76, kind.scale)
    stored = pc.cast(pa.array(values.array), wide)
    present = ~np.isnan(as_float)
    try:
        back = pc.cast(pa.array(as_float, mask=~present), wide, safe=False)
    except pa.ArrowInvalid:
        # a float64 rounded past 76 digits: none of the column can be vouched for
        return present
    same = pc.fill_null(pc.equal(stored, back), True)
    return ~same.to_numpy(zero_copy_only=False)


def _inexact_integers(values: pd.Series, as_float: np.ndarray) -> np.ndarray:
    """Rows of an integer column whose value float64 cannot hold exactly (beyond 2^53)."""
    if not pd.api.types.is_integer_dtype(values.dtype):
        # a float column holds what it holds: no pass over it
        return np.zeros(len(values), dtype=bool)
    big = np.abs(as_float) >= _EXACT_INTEGER
    if not big.any():
        return np.zeros(len(values), dtype=bool)
    kind = np.uint64 if pd.api.types.is_unsigned_integer_dtype(values.dtype) else np.int64
    exact = values.to_numpy(dtype=kind, na_value=0)[big]
    rounded = as_float[big]
    # a value rounded up to 2^63 (2^64 unsigned) has no way back into its integer type
    overflow = rounded >= 2.0 ** (64 if kind is np.uint64 else 63)
    out = np.zeros(len(values), dtype=bool)
    out[big] = overflow | (np.where(overflow, 0.0, rounded).astype(kind) != exact)
    return out


def _inexact_integer_text(text: pd.Series, as_float: np.ndarray) -> np.ndarray:
    """Rows whose text is a whole number with more digits than float64 holds exactly."""
    big = np.abs(np.nan_to_num(as_float)) >= _EXACT_INTEGER
    out = np.zeros(len(text), dtype=bool)
    if not big.any():
        return out
    candidate = text[big]
    whole = candidate.str.fullmatch(r"[-+]?\d+").fillna(False).to_numpy(dtype=bool)
    fits = whole & (candidate.str.lstrip("+-").str.len().to_numpy() <= 18)
    rows = np.flatnonzero(big)
    exact = candidate[fits].astype(np.int64).to_numpy()
    out[rows[fits]] = as_float[rows[fits]].astype(np.int64) != exact
    # 19 digits and more do not fit int64: compare as Python integers (rare texts)
    wide = rows[whole & ~fits]
    out[wide] = [int(t) != int(f) for t, f in zip(text.iloc[wide], as_float[wide])]
    return out


def _numeric_tokens(tokens: tuple[str, ...], decimal_comma: bool) -> list[float]:
    """The declared missing tokens that are numbers, as floats."""
    marks = [t.strip().replace(",", ".") if decimal_comma else t.strip() for t in tokens]
    return [float(t) for t in marks if _NUMBER.fullmatch(t)]


def looks_numeric(values: pd.Series, decimal_comma: bool = False) -> bool:
    """Whether a text column is mostly numbers (so a few stray texts are defects)."""
    if pd.api.types.is_numeric_dtype(values.dtype) and not pd.api.types.is_bool_dtype(values.dtype):
        return True
    if not (pd.api.types.is_string_dtype(values.dtype) or values.dtype == object):
        return False
    sample = values.dropna().astype(str).str.strip()
    sample = sample[sample != ""].head(10_000)
    if decimal_comma:
        sample = sample.str.replace(",", ".", regex=False)
    if len(sample) == 0:
        return False
    return float(sample.str.fullmatch(_NUMBER.pattern).mean()) >= 0.5
