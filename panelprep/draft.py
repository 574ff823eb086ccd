"""A starter run file for a data file: keys guessed from the data, every other key shown.

``panelprep draft`` writes it.  The guesses read a sample of the rows (up to
1,000), so this module imports pandas and pyarrow; checking a run file
(``panelprep.config``) does not.
"""

from __future__ import annotations

import os
import re
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
from pyarrow import feather

from panelprep._paths import resolved
from panelprep._version import __version__
from panelprep.checks.context import looks_numeric
from panelprep.config import _KEYS, REQUIRED, _default, _render
from panelprep.errors import InputError
from panelprep.io import (
    ReadOptions,
    column_names,
    detect_format,
    integer_text_to_int,
    read_frame,
    refuse_checksum_failure,
    sniff_delimiter,
)
from panelprep.timeaxis import build_time_axis

_SAMPLE_ROWS = 1000
_ID_WORDS = {"id", "ids", "firm", "entity", "code", "name", "company", "country", "person",
             "individual", "household", "unit", "ident", "identifier", "key", "ticker", "isin",
             "region", "state", "plant", "store", "school", "group", "city", "town", "county",
             "district", "province", "municipality", "village", "farm", "bank", "branch",
             "hospital", "worker", "employee", "respondent", "patient", "student", "member"}
_TIME_WORDS = {"year", "yr", "date", "period", "quarter", "qtr", "month", "week", "day", "time",
               "wave", "t", "fyear", "fiscal"}


def _words(name: str) -> list[str]:
    spaced = re.sub(r"([a-z0-9])([A-Z])", r"\1 \2", name)
    return [w for w in re.split(r"[^A-Za-z0-9]+", spaced.lower()) if w]


def _named_like(name: str, vocabulary: set[str]) -> bool:
    for word in _words(name):
        if word in vocabulary:
            return True
        # glued forms such as firmid, companycode
        if any(word.endswith(v) and word[: -len(v)] in vocabulary for v in ("id", "code", "key")):
            return True
    return False


def _sample(path: Path, options: ReadOptions, names: list[str]) -> pd.DataFrame:
    """The first rows of a data file; CSV columns all as text, so ids keep their zeros."""
    fmt = detect_format(path, options.input_format)
    if fmt == "csv":
        with open(path, "rb") as handle:
            head = b"".join(line for _, line in zip(range(_SAMPLE_ROWS + 1), handle))
        with tempfile.TemporaryDirectory() as folder:
            part = Path(folder) / f"sample{path.suffix or '.csv'}"
            part.write_bytes(head)
            return read_frame(part, None, names, None, options)
    try:
        if fmt == "parquet":
            batches = pq.ParquetFile(path, page_checksum_verification=True).iter_batches(
                batch_size=_SAMPLE_ROWS)
            first = next(batches, None)
            if first is None:
                return pq.read_schema(path).empty_table().to_pandas()
            return first.to_pandas()
        return feather.read_table(path, memory_map=True).slice(0, _SAMPLE_ROWS).to_pandas()
    except (pa.ArrowException, OSError, ValueError) as err:
        if fmt == "parquet":
            refuse_checksum_failure(path, err, None)
        raise InputError(f"{path}: cannot read as {fmt}: {err}") from None


def _is_text(values: pd.Series) -> bool:
    return pd.api.types.is_string_dtype(values.dtype) or values.dtype == object


def _whole_numbers(values: pd.Series) -> bool:
    as_int = integer_text_to_int(values) if _is_text(values) else values
    return pd.api.types.is_integer_dtype(as_int.dtype)


def _parses_as_time(values: pd.Series, name: str) -> str | None:
    """The frequency the values parse at, or None when they are not periods."""
    present = values.dropna()
    if len(present) == 0:
        return None
    if _is_text(present):
        present = integer_text_to_int(present)
    try:
        return build_time_axis(present.reset_index(drop=True), None, name).name
    except (InputError, ValueError, TypeError, OverflowError):
        return None


def _guess_time(frame: pd.DataFrame, decimal_comma: bool) -> tuple[str | None, str | None]:
    """(column, frequency): a time-named column that parses, else a text column of
    period labels or dates, else a column of whole numbers that look like years."""
    columns = list(frame.columns)
    for name in columns:
        if _named_like(name, _TIME_WORDS):
            freq = _parses_as_time(frame[name], name)
            if freq is not None:
                return name, freq
    for name in columns:
        values = frame[name]
        if _is_text(values) and not looks_numeric(values, decimal_comma):
            freq = _parses_as_time(values, name)
            if freq is not None:
                return name, freq
    for name in columns:
        values = frame[name]
        if _whole_numbers(values):
            numbers = pd.to_numeric(values.dropna(), errors="coerce")
            if len(numbers) and numbers.between(1800, 2200).all():
                return name, _parses_as_time(values, name)
    named = [n for n in columns if _named_like(n, _TIME_WORDS)]
    return (named[0] if named else None), None


# a key with at most this share of duplicate (entity, time) pairs is near unique
_NEAR_UNIQUE = 0.05


@dataclass(frozen=True)
class _EntityGuess:
    """A candidate entity column and how it fares as a key with the time column."""

    name: str
    duplicate_keys: int  # distinct rows sharing an (entity, time) pair with an earlier one
    rows: int            # distinct rows with both values present
    entities: int
    text: bool
    id_named: bool

    def rank(self, position: int) -> tuple:
        near_unique = self.duplicate_keys <= _NEAR_UNIQUE * self.rows
        # an entity seen on about one row each (a row number, a measure) is no panel entity
        repeats = self.rows >= 1.5 * self.entities
        return (not (near_unique and repeats), not self.id_named, not self.text,
                self.duplicate_keys, position)


def _entity_kind(values: pd.Series, decimal_comma: bool) -> str | None:
    """``text`` (not numbers), ``integer`` (whole numbers, however stored) or None.

    Judged on the values, not the storage, so a CSV (read as text) and a
    Parquet copy (typed) of the same data give the same kind.
    """
    if pd.api.types.is_bool_dtype(values.dtype):
        return None
    present = values.dropna()
    if len(present) == 0:
        return None
    if _is_text(present) and (not looks_numeric(present, decimal_comma)
                              or present.astype(str).str.strip().str.match(r"0\d").any()):
        # digits with a leading zero (00123) are codes, read and written as text
        return "text"
    numbers = pd.to_numeric(present.astype(str).str.strip() if _is_text(present) else present,
                            errors="coerce")
    if numbers.isna().any() or (numbers.abs() == float("inf")).any():
        return None
    return "integer" if (numbers == numbers.round()).all() else None


def _guess_entity(frame: pd.DataFrame, time: str | None,
                  decimal_comma: bool) -> _EntityGuess | None:
    """The text or whole-number column that, with ``time``, makes the most nearly unique key.

    Ranked by: a near-unique key (duplicate pairs at most 5% of the distinct
    rows; exact repeated rows are not duplicates) whose entities are seen on
    1.5 rows or more on average, then a name like an id (``firm_id``,
    ``city``, ``code``), text before whole numbers, fewer duplicate pairs,
    then column order.  The
    values decide, not how the file stores them, so a CSV and a Parquet copy
    of the same data get the same guess.
    """
    distinct = frame.astype(str).drop_duplicates()
    timed = frame.loc[distinct.index, time].notna() if time else None
    guesses = []
    for name in frame.columns:
        if name == time:
            continue
        kind = _entity_kind(frame[name], decimal_comma)
        if kind is None:
            continue
        present = frame.loc[distinct.index, name].notna()
        if timed is not None:
            present &= timed
        keyed = distinct.loc[present.to_numpy(), [name, *([time] if time else [])]]
        if len(keyed) == 0:
            continue
        if kind == "integer":
            # 7 and 7.0 are one entity, in a CSV as in a Parquet copy
            keyed = keyed.assign(**{name: pd.to_numeric(keyed[name]).astype(float).astype(str)})
        if time:
            keyed = keyed.assign(**{time: _period_key(keyed[time])})
        guesses.append(_EntityGuess(
            name=name, duplicate_keys=int(keyed.duplicated().sum()), rows=len(keyed),
            entities=int(keyed[name].nunique()), text=kind == "text",
            id_named=_named_like(name, _ID_WORDS)))
    if not guesses:
        return None
    order = {name: i for i, name in enumerate(frame.columns)}
    return min(guesses, key=lambda g: g.rank(order[g.name]))


def _period_key(values: pd.Series) -> pd.Series:
    """Time values as text, whole numbers written one way (1935 and 1935.0 alike)."""
    numbers = pd.to_numeric(values, errors="coerce")
    return numbers.astype(float).astype(str).where(numbers.notna(), values)


_DECIMAL_COMMA = re.compile(r"^\s*[-+]?\d+,\d+\s*$")


def _guess_decimal_comma(frame: pd.DataFrame, delimiter: str) -> bool:
    if delimiter == ",":
        return False
    for name in frame.columns:
        values = frame[name]
        if not _is_text(values):
            continue
        present = values.dropna().astype(str)
        present = present[present.str.strip() != ""]
        if len(present) and present.str.fullmatch(_DECIMAL_COMMA.pattern).mean() >= 0.5:
            return True
    return False


_TOKENS = ("n/a", "N/A", "na", "NA", "-", ".", "null", "NULL", "nan", "NaN", "#N/A", "missing")


def _seen_tokens(frame: pd.DataFrame, numeric: list[str]) -> list[str]:
    seen: list[str] = []
    for name in numeric:
        values = frame[name]
        if _is_text(values):
            stripped = values.dropna().astype(str).str.strip()
            seen += [t for t in _TOKENS if t not in seen and (stripped == t).any()]
    return seen


def starter_run_file(data_path: str | Path, frame_head: pd.DataFrame | None = None,
                     run_dir: str | Path | None = None) -> str:
    """A commented starter run file for a data file, with guessed keys marked.

    Parameters
    ----------
    data_path : the data file (CSV, Parquet or Arrow).
    frame_head : the first rows of the data, when already read; else up to
        1,000 rows are read (CSV columns as text).
    run_dir : the folder the run file will be saved in; paths are written
        relative to it.  Without it ``input.path`` is written absolute.

    Returns
    -------
    TOML text that ``load_run_file`` reads without error.  The entity,
    time, y and x keys are guesses marked ``# guessed``: the entity is a
    text column named like an id (``firm_id``, ``code``, ``name``...), else
    an id-named column of whole numbers, else the first text column; the
    time column is named like a period (``year``, ``date``, ``quarter``...)
    and parses as one, else holds period labels or dates, else years; y is
    the first numeric column left and x the other numeric columns.  Every
    other key is written commented out with its default.

    Raises
    ------
    InputError when the file cannot be read or has fewer than two columns
    besides the entity and time columns.
    """
    path = Path(data_path)
    names = column_names(path)
    options = ReadOptions()
    delimiter = None
    if detect_format(path) == "csv":
        with open(path, "rb") as handle:
            delimiter = sniff_delimiter(handle.readline().decode("utf-8-sig", errors="replace"))
        options = ReadOptions(delimiter=delimiter)
    frame = frame_head if frame_head is not None else _sample(path, options, names)
    decimal_comma = delimiter is not None and _guess_decimal_comma(frame, delimiter)

    time, freq = _guess_time(frame, decimal_comma)
    guess = _guess_entity(frame, time, decimal_comma)
    entity = None if guess is None else guess.name
    notes = {}
    if time is None:
        time = next(c for c in frame.columns if c != entity)
        notes["panel.time"] = "guessed: no column looked like a period; check it"
    else:
        notes["panel.time"] = "guessed: " + (f"looks like {freq} periods" if freq
                                             else "named like a period")
    if guess is None:
        entity = next(c for c in frame.columns if c != time)
        notes["panel.entity"] = "guessed: no text or whole-number column; check it"
    else:
        notes["panel.entity"] = (
            f"guessed: {guess.duplicate_keys:,} duplicate ({entity}, {time}) keys in "
            f"{guess.rows:,} distinct rows read, {guess.entities:,} entities")
    rest = [c for c in frame.columns if c not in (entity, time)]
    numeric = [c for c in rest if looks_numeric(frame[c], decimal_comma)]
    chosen = numeric if len(numeric) >= 2 else numeric + [c for c in rest if c not in numeric]
    if len(chosen) < 2:
        raise InputError(f"{path}: cannot write a starter run file: it needs at least two "
                         f"columns besides {entity!r} and {time!r}; columns are {names}")
    notes["model.y"] = "guessed: first numeric column as y"
    notes["model.x"] = "guessed: the other numeric columns"

    base = Path(run_dir) if run_dir is not None else None
    data_written = (Path(os.path.relpath(resolved(path), resolved(base))) if base is not None
                    else resolved(path))
    values: dict[str, Any] = {f"{s}.{k}": _default(f"{s}.{k}")
                              for s, keys in _KEYS.items() for k in keys}
    values.update({
        "input.path": data_written,
        "input.decimal_comma": decimal_comma,
        "panel.entity": [entity],
        "panel.time": time,
        "panel.freq": freq,
        "model.y": chosen[0],
        "model.x": chosen[1:],
        "output.dir": Path(f"{path.stem}-prepared"),
    })
    active = set(REQUIRED)
    if decimal_comma:
        active.add("input.decimal_comma")
        notes["input.decimal_comma"] = "guessed: numbers such as 3,14 in the sample"
    if delimiter not in (None, ","):
        values["input.delimiter"] = delimiter
        notes["input.delimiter"] = "sniffed from the header; set it to be sure"
    if freq is not None:
        notes["panel.freq"] = "as the sample looks; inferred when absent"
    tokens = _seen_tokens(frame, chosen)
    if tokens:
        values["input.missing_tokens"] = tokens
        notes["input.missing_tokens"] = "seen in the sample: declare them if they mean missing"
    notes["output.dir"] = "relative to this file's folder"
    header = [
        f"panelprep run file: a starter for {path.name}, written by panelprep {__version__}.",
        "Lines marked 'guessed' were guessed from the data: check them before a run.",
        "Commented-out keys show their default or an example; remove the '# ' to set one.",
        "Values given on the command line override this file.",
    ]
    return _render(values, active, notes, header)
