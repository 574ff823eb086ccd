"""Read CSV, Parquet and Arrow IPC/Feather files; hash them; write outputs atomically.

Nothing here knows about panels beyond which columns hold entity ids: those
are read as text from CSV so that ``00123`` stays ``00123``.
"""

from __future__ import annotations

import codecs
import contextlib
import csv
import ctypes
import errno
import glob
import hashlib
import lzma
import os
import re
import secrets
import shutil
import signal
import stat
import sys
import threading
from collections.abc import Iterable, Sequence
from concurrent.futures import Future
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
from pyarrow import feather

from panelprep._paths import check_readable, refuse_link_loop, resolved
from panelprep.choices import FORMATS
from panelprep.errors import ColumnError, InputError
from panelprep.limits import check_memory

_SUFFIXES = {
    ".csv": "csv",
    ".tsv": "csv",
    ".txt": "csv",
    ".parquet": "parquet",
    ".pq": "parquet",
    ".feather": "arrow",
    ".arrow": "arrow",
    ".ipc": "arrow",
}
_DELIMITERS = (",", ";", "\t", "|")
# whole numbers, also as written by tools that store years as floats ("1935.0")
_INTEGER_TEXT = re.compile(r"^\s*-?\d{1,18}(?:\.0*)?\s*$")
_LEADING_ZERO = re.compile(r"^\s*-?0\d")
# compressed CSV read by the file's last suffix (Arrow detects the first four, Python reads xz)
CSV_COMPRESSIONS = (".gz", ".bz2", ".zst", ".lz4", ".xz")
# the first bytes of files that are not CSV text, to say what a file is instead of "not UTF-8"
_SUFFIX_ADVICE = ("compressed CSV is read from files named .csv" + ", .csv".join(CSV_COMPRESSIONS)
                  + "; rename it so its last suffix says how it is compressed, or decompress it")
_ARCHIVE_ADVICE = ("archives are not read; unpack it (compressed CSV is read from .csv"
                   + ", .csv".join(CSV_COMPRESSIONS) + " files)")
_COLUMNAR_ADVICE = "name it .parquet or .feather, or pass --input-format"
_MAGIC = (
    (b"\x1f\x8b", "gzip-compressed", _SUFFIX_ADVICE),
    (b"BZh", "bzip2-compressed", _SUFFIX_ADVICE),
    (b"\xfd7zXZ\x00", "xz-compressed", _SUFFIX_ADVICE),
    (b"\x28\xb5\x2f\xfd", "zstd-compressed", _SUFFIX_ADVICE),
    (b"\x04\x22\x4d\x18", "lz4-compressed", _SUFFIX_ADVICE),
    (b"PK\x03\x04", "a zip archive", _ARCHIVE_ADVICE),
    (b"7z\xbc\xaf\x27\x1c", "a 7z archive", _ARCHIVE_ADVICE),
    (b"PAR1", "a Parquet file", _COLUMNAR_ADVICE),
    (b"ARROW1", "an Arrow IPC file", _COLUMNAR_ADVICE),
)
_CONTROL = re.compile(r"[\x00-\x08\x0b\x0c\x0e-\x1f]")
# how JSON, XML and HTML begin (a CSV header may start "[id]", never '[{' or '<!')
_MARKUP_START = re.compile(
    r'^\s*(\{|\[\s*($|[\[{"\d-])|<[!?]|<(?i:html|head|body|table|div|svg|feed|rss)\b)')
# names shown from a header that is not what it should be
_EXCERPT = 40


@dataclass(frozen=True)
class ReadOptions:
    """How to read an input file.

    Parameters
    ----------
    input_format : ``csv``, ``parquet`` or ``arrow``; None picks by extension.
    delimiter : CSV field separator; None sniffs it from the header line.
    decimal_comma : CSV numbers use ``,`` as the decimal mark (``3,14``).
    missing_tokens : extra CSV texts to read as missing in numeric
        variables (for example ``n/a`` or ``-``).  Only the empty field is
        missing by default: any other text in a numeric variable is reported,
        never silently coerced.
    entity_as_text : read entity columns of a CSV as text (default) rather
        than letting numbers be inferred, which would drop leading zeros.
    """

    input_format: str | None = None
    delimiter: str | None = None
    decimal_comma: bool = False
    missing_tokens: tuple[str, ...] = field(default_factory=tuple)
    entity_as_text: bool = True


DEFAULT_READ = ReadOptions()


def detect_format(path: Path, given: str | None = None) -> str:
    """The input format: ``given`` if set, else by the file's extension."""
    if given is not None:
        if given not in FORMATS:
            raise InputError(f"--input-format {given!r} is not one of {', '.join(FORMATS)}")
        return given
    suffixes = [s.lower() for s in path.suffixes]
    for suffix in reversed(suffixes):
        if suffix in _SUFFIXES:
            return _SUFFIXES[suffix]
    raise InputError(
        f"{path}: cannot tell the format from the extension {path.suffix or '(none)'!r}; "
        f"use .csv, .parquet or .feather, or pass --input-format"
    )


def sha256_file(path: Path, chunk: int = 1 << 20) -> str:
    """Hex SHA-256 of a file's bytes, read in chunks."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        while block := handle.read(chunk):
            digest.update(block)
    return digest.hexdigest()


def sha256_in_background(path: Path) -> Future:
    """SHA-256 of ``path`` in a thread of its own, while other work goes on.

    hashlib and file reads release the GIL, so on two cores the hash costs
    no wall time (about 0.35 s per 2.5 M row file when done in line).
    ``result()`` gives the hex digest, or raises what hashing raised.
    """
    future: Future = Future()

    def run() -> None:
        try:
            future.set_result(sha256_file(path))
        except Exception as err:  # noqa: BLE001 (raised again by result())
            future.set_exception(err)

    threading.Thread(target=run, daemon=True).start()
    return future


def sniff_delimiter(header_line: str) -> str:
    """The most frequent of ``, ; TAB |`` in the header line (comma on ties)."""
    counts = {d: header_line.count(d) for d in _DELIMITERS}
    best = max(_DELIMITERS, key=lambda d: counts[d])
    return best if counts[best] > 0 else ","


def _text_stream(path: Path) -> pa.NativeFile:
    """The file's bytes, decompressed by its last suffix (see ``CSV_COMPRESSIONS``)."""
    if path.suffix.lower() == ".xz":
        # Arrow has no xz codec; Python's lzma reads it
        return pa.PythonFile(lzma.open(path, "rb"), mode="r")
    return pa.input_stream(str(path), compression="detect")


def _first_line(path: Path) -> bytes:
    """The header line's bytes, decompressed by extension (``.gz``, ``.xz``) as the data is read."""
    head = b""
    try:
        with _text_stream(path) as handle:
            while b"\n" not in head and b"\r" not in head:
                block = handle.read(1 << 16)
                if not block:
                    break
                head += block
    except (lzma.LZMAError, EOFError) as err:
        raise InputError(f"{path}: cannot decompress as xz: {_short(err)}") from None
    # Arrow ends a line at \n, \r\n or a lone \r; so does the header
    ends = [i for i in (head.find(b"\n"), head.find(b"\r")) if i >= 0]
    return head[: min(ends)] if ends else head


def _csv_header(path: Path, delimiter: str | None) -> tuple[list[str], str]:
    raw = _first_line(path)
    try:
        line = raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        _refuse_binary(path, raw)
        raise InputError(_not_utf8(path)) from None
    if _CONTROL.search(line):
        # a Parquet footer or a short archive can decode as text; control bytes give it away
        _refuse_binary(path, raw)
    if not line.strip():
        raise InputError(f"{path}: the first line is blank, expected a header")
    if _MARKUP_START.match(line):
        # JSON, XML or HTML saved under a .csv name: its first line is not a list of names
        raise InputError(f"{path}: the first line does not look like CSV column names (it begins "
                         f"{_excerpt(line.strip())!r}, like JSON, XML or HTML); the file must be "
                         "CSV with a header line, Parquet or Arrow")
    delimiter = delimiter or sniff_delimiter(line)
    return [n.strip() for n in _split_header(path, line, delimiter)], delimiter


def _refuse_binary(path: Path, head: bytes) -> None:
    """Name what a compressed, archived or columnar file is, read as CSV text."""
    for magic, kind, advice in _MAGIC:
        if head.startswith(magic):
            raise InputError(f"{path}: is {kind}, not CSV text; {advice}")


def _excerpt(text: str, width: int = _EXCERPT) -> str:
    return text if len(text) <= width else text[: width - 1] + "\u2026"


def _split_header(path: Path, line: str, delimiter: str) -> list[str]:
    try:
        return next(csv.reader([line], delimiter=delimiter))
    except csv.Error as err:
        raise InputError(f"{path}: cannot read the header line: {err}") from None


def column_names(path: Path, options: ReadOptions = DEFAULT_READ) -> list[str]:
    """Column names of a file without reading its data."""
    check_readable(path)
    fmt = detect_format(path, options.input_format)
    try:
        if fmt == "csv":
            names, _ = _csv_header(path, options.delimiter)
        elif fmt == "parquet":
            names = pq.read_schema(path).names
        else:
            names = _arrow_schema(path).names
    except InputError:
        raise
    except (pa.ArrowException, OSError, ValueError) as err:
        raise InputError(f"{path}: cannot read as {fmt}: {_short(err)}") from None
    counts = pd.Series(names, dtype=object).value_counts()
    duplicated = sorted(counts.index[counts > 1])
    if duplicated:
        shown = [_excerpt(str(n)) for n in duplicated[:5]]
        more = f" and {len(duplicated) - 5} more" if len(duplicated) > 5 else ""
        raise ColumnError(f"{path}: duplicate column names {shown}{more}")
    return names


def _arrow_schema(path: Path) -> pa.Schema:
    """The schema of an Arrow IPC / Feather file, without decompressing its data."""
    try:
        with pa.memory_map(str(path)) as source:
            return pa.ipc.open_file(source).schema
    except pa.ArrowInvalid:
        # Feather version 1 files are not IPC files; reading them is the only way in
        return feather.read_table(path, memory_map=True).schema


def read_frame(
    path: Path,
    columns: list[str] | None,
    entity: list[str],
    time: str | None = None,
    options: ReadOptions = DEFAULT_READ,
) -> pd.DataFrame:
    """Read ``columns`` (all when None) of a data file into a DataFrame.

    CSV entity columns are read as text; a CSV time column is read as text
    and turned into integers only when every value is a whole number, so
    dates and period labels round-trip to the same strings.  Parquet and
    Arrow keep their stored types, with two exceptions so that nothing is
    lost on the way into pandas: a true/false column with nulls (CSV
    ``true``/``false`` texts too) becomes pandas' nullable ``boolean``
    rather than objects, and a float variable holding NaN keeps Arrow's
    float type (``double[pyarrow]``), where NaN is a value apart from null,
    so the audit can report NaN on its own.  Raises
    ``InputError`` before reading when the run would not fit in memory
    (see ``limits.check_memory``).
    """
    names = column_names(path, options)
    wanted = names if columns is None else columns
    absent = [c for c in wanted if c not in names]
    if absent:
        raise ColumnError(f"{path}: column(s) {absent} not found; columns are {names}")
    fmt = detect_format(path, options.input_format)
    # before anything is read: a file that cannot fit stops here, not in the swap
    check_memory(path, fmt, wanted, len(names))
    try:
        if fmt == "csv":
            table = _read_csv(path, wanted, entity, time, options)
        elif fmt == "parquet":
            table = pq.read_table(path, columns=wanted, page_checksum_verification=True)
        else:
            table = feather.read_table(path, columns=wanted, memory_map=True)
    except InputError:
        raise
    except (pa.ArrowException, OSError, ValueError) as err:
        if fmt == "parquet":
            refuse_checksum_failure(path, err, wanted)
        raise InputError(f"{path}: cannot read as {fmt}: {_short(err)}") from None
    return frame_from_table(path, table, wanted, entity, time, fmt)


def frame_from_table(path: Path, table: pa.Table, wanted: list[str], entity: list[str],
                     time: str | None, fmt: str) -> pd.DataFrame:
    """The DataFrame of a table read from ``path``, typed as ``read_frame`` types it.

    Shared by ``read_frame`` and the dask engine's reader of one file or
    Parquet fragment (``panelprep.partitioned``), so every partition holds
    what the local engine would have read.
    """
    keys = {*entity, time}
    _refuse_nested_keys(path, table.schema, [k for k in (*entity, time) if k])
    table = _decimal_columns(table, time)
    # decimals stay Arrow decimals (not Python Decimal objects): the audit reads them as
    # float64 and reports the values float64 does not hold exactly (values-decimal-rounded)
    try:
        frame = table.to_pandas(types_mapper=_keep_decimal)
    except pa.ArrowNotImplementedError:
        raise ColumnError(_unconvertible(path, table)) from None
    for name, column in zip(table.column_names, table.columns):
        if pa.types.is_nested(column.type) and name not in keys:
            # lists, structs and maps arrive as arrays and dicts, which cannot be compared
            # or hashed; as their text they are reported like any other text in a variable
            values = frame[name]
            frame[name] = values.astype(str).where(values.notna(), None)
    for name, column in zip(table.column_names, table.columns):
        if name in keys or not column.null_count and not pa.types.is_floating(column.type):
            continue
        if pa.types.is_boolean(column.type):
            frame[name] = column.to_pandas(types_mapper={pa.bool_(): pd.BooleanDtype()}.get)
        elif pa.types.is_floating(column.type) and pc.any(pc.is_nan(column)).as_py():
            # pandas turns null into NaN; a stored NaN is reported apart (values-nan-missing)
            frame[name] = pd.Series(pd.arrays.ArrowExtensionArray(column), index=frame.index)
    if fmt == "csv" and time in frame.columns:
        frame[time] = integer_text_to_int(frame[time])
    del table
    release_arrow_memory()
    return frame[wanted]


def refuse_checksum_failure(path: Path, err: BaseException, columns: list[str] | None) -> None:
    """When ``err`` is a failed Parquet page checksum: one line naming the column and row group.

    Pages are verified when the file has checksums (panelprep writes them); the
    failing column and row group are found by reading each in turn, only here.
    """
    if "CRC checksum verification failed" not in str(err):
        return
    source = pq.ParquetFile(path, page_checksum_verification=True)
    meta = source.metadata
    names = columns or source.schema_arrow.names
    first = 0
    for group in range(meta.num_row_groups):
        rows = meta.row_group(group).num_rows
        for name in names:
            try:
                source.read_row_group(group, columns=[name])
            except (OSError, pa.ArrowException):
                raise InputError(
                    f"{path}: column {name!r} fails its page checksum in row group {group + 1} "
                    f"of {meta.num_row_groups} (rows {first + 1:,} to {first + rows:,}): the file "
                    "was damaged after it was written; get a fresh copy") from None
        first += rows
    raise InputError(f"{path}: a data page fails its checksum: the file was damaged after it "
                     "was written; get a fresh copy") from None


def _unconvertible(path: Path, table: pa.Table) -> str:
    """The message for a column pandas cannot hold (a union), found column by column."""
    for name, column in zip(table.column_names, table.columns):
        try:
            column.slice(0, 1).to_pandas()
        except pa.ArrowNotImplementedError:
            return (f"{path}: column {name!r} holds {column.type} values, which panelprep "
                    "cannot read; store one type per column, or leave the column out "
                    "(--vars)")
    return f"{path}: a column's type cannot be read into a table"


def _keep_decimal(arrow_type: pa.DataType) -> pd.ArrowDtype | None:
    return pd.ArrowDtype(arrow_type) if pa.types.is_decimal(arrow_type) else None


def _decimal_columns(table: pa.Table, time: str | None) -> pa.Table:
    """Decimals in types Arrow can group: a time column as float64, others as decimal128+.

    A period is a whole number, a date or a label, so a decimal time column is read as
    the number it holds (whole numbers beyond 2^53 are refused by the time axis);
    32- and 64-bit decimals have no hashing kernels (ids, repeated rows), so they are
    widened losslessly.
    """
    for i, name in enumerate(table.column_names):
        kind = table.schema.field(i).type
        if not pa.types.is_decimal(kind):
            continue
        if name == time:
            wanted = pa.float64()
        elif kind.bit_width < 128:
            wanted = pa.decimal128(kind.precision, kind.scale)
        else:
            continue
        table = table.set_column(i, name, pc.cast(table.column(i), wanted))
    return table


def _refuse_nested_keys(path: Path, schema: pa.Schema, keys: list[str]) -> None:
    """One line for a key column of lists, structs, maps, unions or intervals.

    A key is one value per row that can be compared and sorted; those are not.
    """
    for name in keys:
        if name in schema.names:
            kind = schema.field(name).type
            if pa.types.is_dictionary(kind):
                kind = kind.value_type
            if pa.types.is_nested(kind) or pa.types.is_interval(kind) or pa.types.is_union(kind):
                what = "nested values" if pa.types.is_nested(kind) else "values"
                raise ColumnError(
                    f"{path}: key column {name!r} holds {what} ({kind}); an entity or "
                    "time key must hold one text, number or date per row: flatten the "
                    "column upstream or name another column")


def release_arrow_memory() -> None:
    """Hand Arrow's freed buffers back to the system.

    The Arrow allocator keeps what a table held after it is gone (about the
    size of the table read, measured: 549 -> 357 MiB RSS after reading a
    2.55 M row file); peak memory is what counts for a run's size limit.
    """
    pa.default_memory_pool().release_unused()


def _read_csv(
    path: Path, wanted: list[str], entity: list[str], time: str | None, options: ReadOptions
) -> pa.Table:
    _, delimiter = _csv_header(path, options.delimiter)
    if options.decimal_comma and delimiter == ",":
        raise InputError(f"{path}: decimal commas need a delimiter other than ',' (found ',')")
    raw_names = {n.strip(): n for n in _raw_header(path, delimiter)}
    include = [raw_names[c] for c in wanted]
    as_text = [*(entity if options.entity_as_text else []), *([time] if time else [])]
    text_columns = {raw_names[c]: pa.string() for c in as_text if c in raw_names}
    table = _arrow_csv(path, include, text_columns, delimiter, options)
    # Arrow reads the texts "nan" and "inf" as floats, and whole numbers too long for
    # int64 as rounded floats; read such columns again as text so they are reported
    # like any other text instead of becoming missing, infinite or silently rounded.
    spelled = {name: pa.string() for name, column in zip(table.column_names, table.columns)
               if pa.types.is_floating(column.type)
               and (_has_non_finite(column) or _has_huge(column))}
    if spelled:
        table = _arrow_csv(path, include, {**text_columns, **spelled}, delimiter, options)
    return table.rename_columns([n.strip() for n in table.column_names])


def _arrow_csv(
    path: Path, include: list[str], column_types: dict[str, pa.DataType], delimiter: str,
    options: ReadOptions,
) -> pa.Table:
    convert = pacsv.ConvertOptions(
        include_columns=include,
        column_types=column_types,
        null_values=[""],
        strings_can_be_null=True,
        quoted_strings_can_be_null=False,
        decimal_point="," if options.decimal_comma else ".",
        timestamp_parsers=[],
    )
    parse = pacsv.ParseOptions(delimiter=delimiter, newlines_in_values=False)
    read = pacsv.ReadOptions(block_size=1 << 24)
    source = _text_stream(path) if path.suffix.lower() == ".xz" else path
    try:
        table = pacsv.read_csv(source, read_options=read, parse_options=parse,
                               convert_options=convert)
    except (lzma.LZMAError, EOFError) as err:
        raise InputError(f"{path}: cannot decompress as xz: {_short(err)}") from None
    except pa.ArrowInvalid as err:
        text = str(err)
        if "invalid UTF8" in text:
            raise InputError(_not_utf8(path)) from None
        if "Empty CSV file" in text:
            raise InputError(f"{path}: no data rows, only a header") from None
        raise InputError(f"{path}: cannot parse as CSV: {_short(err)}") from None
    finally:
        if source is not path:
            source.close()
    # Arrow reads a column holding bytes that are not UTF-8 as binary; pandas would
    # then fail on it far from here, so say where the bad bytes are instead
    if any(pa.types.is_binary(t) or pa.types.is_large_binary(t) for t in table.schema.types):
        raise InputError(_not_utf8(path))
    return table


def _not_utf8(path: Path) -> str:
    """One line naming the first byte of ``path`` that is not UTF-8 text, by line number."""
    decoder = codecs.getincrementaldecoder("utf-8")()
    line, offset = 1, 0
    with _text_stream(path) as handle:
        while block := handle.read(1 << 20):
            if offset == 0 and block[:2] in (codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE):
                return f"{path}: is UTF-16 text, not UTF-8; save the file as UTF-8"
            try:
                decoder.decode(block)
            except UnicodeDecodeError as err:
                # err.object is the undecoded tail of the previous block plus this one
                seen = err.object
                at = offset + len(block) - len(seen) + err.start
                line += seen[: err.start].count(b"\n")
                return (f"{path}: not UTF-8 text: byte 0x{seen[err.start]:02x} at line {line} "
                        f"(byte offset {at}); save the file as UTF-8")
            line += block.count(b"\n")
            offset += len(block)
    try:
        decoder.decode(b"", final=True)
    except UnicodeDecodeError:
        # a character cut short by the end of the file
        return (f"{path}: not UTF-8 text: the file ends inside a character at line {line}; "
                "save the file as UTF-8")
    return f"{path}: not UTF-8 text; save the file as UTF-8"


def _has_non_finite(column: pa.ChunkedArray) -> bool:
    """Whether a float column holds NaN or infinity (nulls, i.e. empty fields, do not count)."""
    return bool(pc.any(pc.invert(pc.is_finite(column))).as_py())


def _has_huge(column: pa.ChunkedArray) -> bool:
    """Whether a float column reaches 2^53 in magnitude, where float64 drops integer digits."""
    largest = pc.max(pc.abs(column)).as_py()
    return largest is not None and largest >= 2.0**53


def _raw_header(path: Path, delimiter: str) -> list[str]:
    return _split_header(path, _first_line(path).decode("utf-8-sig"), delimiter)


def integer_text_to_int(values: pd.Series) -> pd.Series:
    """Text that is all whole numbers becomes int64 (Int64 with gaps); else unchanged.

    Numbers written with leading zeros (waves ``01``, ``02``) stay text, so
    every output writes them as they were read; the time axis reads such
    text as integer periods all the same.
    """
    if not (pd.api.types.is_string_dtype(values.dtype) or values.dtype == object):
        return values
    present = values.dropna()
    uniques = pd.Series(present.unique()).astype(str)
    if len(uniques) == 0 or not uniques.str.fullmatch(_INTEGER_TEXT.pattern).all():
        return values
    if uniques.str.match(_LEADING_ZERO.pattern).any():
        return values
    digits = values.astype("string").str.strip().str.replace(r"\.0*$", "", regex=True)
    if len(present) == len(values):
        return digits.astype(np.int64)
    return digits.astype("Int64")


def _short(err: BaseException) -> str:
    text = " ".join(str(err).split())
    return text if len(text) <= 200 else text[:197] + "..."


def write_table(
    frame: pd.DataFrame | pa.Table | Iterable[pa.Table], path: Path, fmt: str,
    metadata: dict[str, str], compression: str = "zstd", dictionary: Sequence[str] | None = None,
) -> int:
    """Write a data file; Parquet carries ``metadata``.  Returns the rows written.

    ``frame`` is a DataFrame, an Arrow table, or Arrow tables of one schema
    written one after another (a table built and written in pieces never
    exists whole).  Written without the pandas index and without
    timestamps, so the same data and metadata give the same bytes on every
    run.  Parquet pages are dictionary-encoded only for the columns named in
    ``dictionary`` (all when None): key columns repeat and shrink, while a
    dictionary of distinct floats costs time and space.  A failing write (a
    full disk) is an ``InputError`` naming the file.
    """
    if isinstance(frame, pd.DataFrame):
        frame = pa.Table.from_pandas(frame, preserve_index=False)
    pieces = iter([frame] if isinstance(frame, pa.Table) else frame)
    del frame
    rows = 0
    try:
        first = next(pieces)
        if fmt == "parquet":
            schema_meta = {k.encode(): v.encode() for k, v in metadata.items()}
            schema = first.schema.with_metadata(schema_meta)
            writer = pq.ParquetWriter(
                path, schema, compression=compression, write_statistics=True,
                write_page_checksum=True,
                use_dictionary=True if dictionary is None else [
                    c for c in dictionary if c in schema.names])
        elif fmt == "csv":
            writer = pacsv.CSVWriter(path, first.schema)
        else:
            raise InputError(f"--format {fmt!r} must be parquet or csv")
        with writer:
            piece = first
            del first
            while piece is not None:
                writer.write_table(piece)
                rows += piece.num_rows
                piece = next(pieces, None)
        release_arrow_memory()
    except OSError as err:
        raise InputError(f"cannot write {path.name} into {path.parent}: "
                         f"{err.strerror or _short(err)}") from None
    return rows


# --- writing without ever losing or overwriting what is there ------------------------------
#
# Everything panelprep writes (a report, a run file, an output folder) is made first under a
# hidden name of its own beside the destination, then renamed into place.  That name is short
# and bounded whatever the destination is called, so a legal long name stays legal; it is
# created exclusively, so it can never be an existing file, least of all an input.  Every
# destination is checked against every file the run reads by file identity (device and inode,
# through links), not by name, before anything is written and again just before the rename.

TEMP_PREFIX = ".panelprep-partial-"
# what a failed gate writes; a failed-run folder holding only these may be replaced
DIAGNOSTIC_FILES = frozenset({"diagnostics.json", "diagnostics.txt", "report.html"})

_written: list[Path] = []


def written_paths() -> list[Path]:
    """What this process has put in place so far (files and folders), oldest first.

    The command line reads it to say truthfully what an interrupted run left.
    """
    return list(_written)


def _identity(path: str | os.PathLike[str]) -> tuple[int, int] | None:
    """(device, inode) of what ``path`` names, following links; None when there is nothing."""
    try:
        found = os.stat(path)
    except (OSError, ValueError):
        return None
    return found.st_dev, found.st_ino


def _lineage(path: Path) -> set[tuple[int, int]]:
    """Identities of ``path`` and of every folder holding it (after resolving links)."""
    absolute = resolved(path)
    found = {_identity(p) for p in (Path(path), absolute, *absolute.parents)}
    found.discard(None)
    return found


def refuse_input_clash(path: Path, inputs: Sequence[Path], what: str) -> None:
    """Refuse to write ``what`` at ``path`` when it is one of ``inputs``.

    The same file under another name (a hard link, a symbolic link, a bind
    mount) counts: files are compared by device and inode, and by their
    resolved paths.
    """
    path = Path(path)
    mine = _identity(path)
    for source in inputs:
        same = mine is not None and mine == _identity(source)
        if same or resolved(path) == resolved(source):
            raise InputError(f"{path}: {what} would overwrite the input {source} "
                             "(the same file); choose another path")


def _holds(folder: Path, source: Path) -> bool:
    """Whether ``folder`` is ``source`` or a folder above it, by identity or by path."""
    folder_abs, source_abs = resolved(folder), resolved(source)
    if folder_abs == source_abs or folder_abs in source_abs.parents:
        return True
    mine = _identity(folder)
    return mine is not None and mine in _lineage(Path(source))


def parent_folder(path: Path) -> Path:
    """The folder ``path`` goes into, as named; one line when it is missing or a file."""
    parent = Path(path).absolute().parent
    if parent.is_dir():
        return parent
    refuse_link_loop(parent)
    above = parent
    while not above.exists() and above != above.parent:
        above = above.parent
    if above.exists() and not above.is_dir():
        raise InputError(f"{path}: {above} is a file, not a folder")
    raise InputError(f"{path}: parent folder {parent} does not exist; create it first, or name "
                     "another path")


def check_file_destination(path: Path, inputs: Sequence[Path], what: str) -> Path:
    """Refuse, before anything runs, a file destination that cannot be written; its folder.

    Refused: one of ``inputs`` (``refuse_input_clash``), a link loop, a
    folder, a path whose parent folder is missing or a file.
    """
    path = Path(path)
    refuse_input_clash(path, inputs, what)
    if path.is_dir():
        raise InputError(f"{path}: is a folder, and {what} is written as a file; name a "
                         f"file (inside it, e.g. {path / 'NAME'}, or elsewhere)")
    return parent_folder(path)


def _fresh_name(parent: Path) -> Path:
    return parent / f"{TEMP_PREFIX}{os.getpid()}-{secrets.token_hex(4)}"


def write_file(path: str | Path, content: str | bytes, inputs: Sequence[Path] = (),
               what: str = "the file") -> Path:
    """Write ``content`` (text as UTF-8) to ``path`` atomically; return the path.

    The bytes go to a new hidden file beside ``path`` (created exclusively,
    with the usual permissions), which replaces ``path`` only once complete.
    ``path`` may not be one of ``inputs`` (see ``refuse_input_clash``); a
    failing write is an ``InputError`` naming the file and the reason, and
    leaves nothing behind.
    """
    path = Path(path)
    payload = content.encode("utf-8") if isinstance(content, str) else content
    parent = check_file_destination(path, inputs, what)
    _remove_abandoned(parent)
    try:
        while True:
            tmp = _fresh_name(parent)
            try:
                handle = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_CLOEXEC, 0o666)
            except FileExistsError:
                continue
            break
    except OSError as err:
        raise InputError(f"{path}: cannot write {what}: {err.strerror or _short(err)}") from None
    try:
        with os.fdopen(handle, "wb") as stream:
            stream.write(payload)
        # a link to an input made while the file was written is caught here
        refuse_input_clash(path, inputs, what)
        os.replace(tmp, path)
    except OSError as err:
        tmp.unlink(missing_ok=True)
        raise InputError(f"{path}: cannot write {what}: {err.strerror or _short(err)}") from None
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    _written.append(path)
    return path


def check_output_folder(target: Path, inputs: Sequence[Path], force: bool = False,
                        replaceable: frozenset[str] = frozenset(),
                        protect: Sequence[Path] = ()) -> None:
    """Refuse, with one line, an output folder that may not be written.

    Refused: the current folder or one above it, a ``target`` that is or
    holds one of ``inputs`` (even with ``force``), one that is, holds or
    lies inside a folder in ``protect``,
    a broken link, a file, and a non-empty folder unless ``force`` or it
    holds only names in ``replaceable``.
    """
    target = Path(target)
    _refuse_working_folder(target)
    parent_folder(target)
    try:
        for source in inputs:
            if _holds(target, Path(source)):
                raise InputError(f"{target}: output folder equals or contains the input {source}")
        for other in protect:
            if _holds(target, Path(other)) or _holds(Path(other), target):
                raise InputError(f"{target}: may not be, hold or lie inside the output folder "
                                 f"{other}; name a folder beside it")
        problem = _unacceptable(target, force, replaceable)
    except OSError as err:
        raise InputError(f"{target}: cannot use as an output folder: "
                         f"{err.strerror or _short(err)}") from None
    if problem:
        reason, hint = problem
        raise InputError(f"{target}: {reason}{hint}")


def _refuse_working_folder(target: Path) -> None:
    """An output folder is replaced as a whole: never the current folder or one above it."""
    where, here = resolved(target), resolved(Path.cwd())
    if where == here or where in here.parents:
        which = "the current folder" if where == here else "a folder above the current one"
        raise InputError(f"{str(target) or '.'}: is {which} ({where}); an output folder is "
                         "replaced as a whole, so name a new folder for it (e.g. "
                         "--out prepared)")


def _unacceptable(path: Path, force: bool,
                  replaceable: frozenset[str]) -> tuple[str, str] | None:
    """Why what ``path`` names may not be replaced by an output folder, and what to do.

    None when it may: nothing there, an empty folder, any folder under
    ``force``, or one holding only names in ``replaceable`` (a link counts
    as the folder it points to; replacing it removes the link itself).
    """
    try:
        found = os.lstat(path)
    except FileNotFoundError:
        return None
    if stat.S_ISLNK(found.st_mode) and not path.exists():
        return "is a broken symbolic link", ""
    # a link is judged by the folder it points to, though only the link is ever replaced
    if not path.is_dir():
        return "exists and is not a folder", ""
    names = set(os.listdir(path))
    if not names or force:
        return None
    if replaceable:
        if names <= replaceable:
            return None
        reason = ("folder exists and holds files other than a failed run's "
                  + ", ".join(sorted(replaceable)))
        return reason, "; move them, or name another folder (--failed-out)"
    return "folder exists and is not empty", " (use --force to replace it)"


class OutputFolder:
    """A folder that appears complete or not at all.

    Files are written into a hidden temporary folder beside ``target``
    (``.panelprep-partial-PID-XXXXXXXX``, whatever ``target`` is called);
    ``commit`` renames it into place in one step that never replaces what
    another run put there meanwhile (see ``commit``).  If anything fails
    before ``commit``, ``abandon`` removes the temporary folder and
    ``target`` is left as it was.  A run killed outright leaves its
    temporary folder behind; the next run writing into the same parent
    folder removes those whose process is gone.

    Refused up front (``check_output_folder``): a ``target`` that is or
    contains one of ``inputs``, one related to a folder in ``protect``, a
    ``target`` that is a file, and a non-empty ``target`` unless ``force``
    or it holds only names in ``replaceable``.
    """

    def __init__(self, target: Path, inputs: Sequence[Path], force: bool = False,
                 replaceable: frozenset[str] = frozenset(), protect: Sequence[Path] = ()) -> None:
        self.target = Path(target)
        self.inputs = [Path(p) for p in inputs]
        self.force = force
        self.replaceable = frozenset(replaceable)
        self._committed = False
        self._guarded = set().union(*(_lineage(source) for source in self.inputs))
        check_output_folder(self.target, self.inputs, force, self.replaceable, protect)
        # beside the target as named (not where a symbolic link leads), so the final
        # rename stays within one folder
        parent = parent_folder(self.target)
        _remove_abandoned(parent, self.target.name)
        try:
            self.temp = _fresh_folder(parent)
        except OSError as err:
            raise InputError(f"{self.target}: cannot create output: {err.strerror}") from None
        self._own = _own_identity(self.temp)

    def path(self, name: str) -> Path:
        return self.temp / name

    def commit(self) -> None:
        """Rename the temporary folder into place.

        Where the system offers it (Linux ``renameat2``), the rename never
        replaces anything: if something appeared at ``target`` meanwhile,
        the two are swapped in one step, what was there is judged, and it
        is swapped straight back (an ``InputError`` saying it appeared)
        unless it may be replaced, in which case it is removed.  There is
        never a moment without a folder at ``target`` once there was one.
        Elsewhere the check and the rename run under a lock file in the
        parent folder (``.panelprep-commit.lock``), so two panelprep runs
        cannot interleave.  Interrupts are held back until the commit is
        done.
        """
        with _signals_held():
            try:
                self._swap_in()
            except _NoAtomicRename:
                self._commit_locked()
            self._committed = True
            _written.append(self.target)

    def _appeared(self, path: Path) -> InputError | None:
        """The error for what was found at the target when it may not be replaced."""
        problem = _unacceptable(path, self.force, self.replaceable)
        # the folders holding the inputs, as they were when the run started and as they are
        guarded = self._guarded.union(*(_lineage(source) for source in self.inputs))
        if problem is None and not path.is_symlink() and _identity(path) in guarded:
            problem = "it holds one of the run's inputs", ""
        if problem is None:
            return None
        reason, hint = problem
        return InputError(f"{self.target}: target appeared during the run ({reason}); it was "
                          f"left as it was and nothing was written{hint}")

    def _swap_in(self) -> None:
        for _ in range(20):
            try:
                _rename(self.temp, self.target, _RENAME_NOREPLACE)
                return
            except FileExistsError:
                pass
            if self.force or self._replaceable_now():
                if self._exchange():
                    return
            else:
                self._clear_empty()
        raise InputError(f"{self.target}: kept changing while the output was put in place; "
                         "nothing was written, run again")

    def _replaceable_now(self) -> bool:
        """Whether the target is a folder holding only names this folder may replace."""
        try:
            names = set(os.listdir(self.target))
        except OSError:
            return False
        return bool(self.replaceable) and bool(names) and names <= self.replaceable

    def _clear_empty(self) -> None:
        """Without force: remove an empty folder (or a link to one) at the target, else refuse.

        Both removals fail on anything else put there meanwhile (``rmdir`` on
        a folder that is not empty, ``unlink`` on a folder), so what another
        run committed is never removed; the next round judges it again.
        """
        try:
            found = os.lstat(self.target)
        except FileNotFoundError:
            return
        error = self._appeared(self.target)
        if error is not None:
            raise error
        with contextlib.suppress(OSError):
            if stat.S_ISLNK(found.st_mode):
                os.unlink(self.target)
            else:
                os.rmdir(self.target)

    def _exchange(self) -> bool:
        """Under force: swap the new folder and what is at the target in one step."""
        try:
            _rename(self.temp, self.target, _RENAME_EXCHANGE)
        except FileNotFoundError:
            return False  # it went away again: try the plain rename once more
        # self.temp now names what was at the target
        error = self._appeared(self.temp)
        if error is not None:
            try:
                _rename(self.temp, self.target, _RENAME_EXCHANGE)
            except (OSError, _NoAtomicRename):
                self._committed = True  # self.temp is not ours now: never remove it
                raise InputError(f"{self.target}: what appeared there during the run could "
                                 f"not be put back; it is at {self.temp}") from None
            raise error
        old, self.temp = self.temp, self.target
        _discard(old)
        return True

    def _commit_locked(self) -> None:
        with _parent_lock(self.temp.parent):
            problem = self._appeared(self.target)
            if problem is not None:
                raise problem
            old = None
            if os.path.lexists(self.target):
                old = _fresh_name(self.temp.parent)
                os.rename(self.target, old)
            try:
                os.rename(self.temp, self.target)
            except OSError:
                if old is not None:
                    os.rename(old, self.target)
                raise
            if old is not None:
                _discard(old)

    def abandon(self) -> None:
        """Remove the temporary folder, only if it is still this run's own (by identity)."""
        if not self._committed and _own_identity(self.temp) == self._own:
            _remove_tree(self.temp)


# Linux renameat2 flags (linux/fs.h)
_RENAME_NOREPLACE, _RENAME_EXCHANGE = 1, 2
_AT_FDCWD = -100


class _NoAtomicRename(Exception):
    """The system or the file system offers no rename-without-replace."""


def _load_renameat2():
    if not sys.platform.startswith("linux"):
        return None
    try:
        function = ctypes.CDLL(None, use_errno=True).renameat2
    except (OSError, AttributeError):
        return None
    function.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p,
                         ctypes.c_uint]
    function.restype = ctypes.c_int
    return function


_renameat2 = _load_renameat2()


def _rename(source: Path, target: Path, flags: int) -> None:
    """``renameat2(source, target, flags)``; ``_NoAtomicRename`` where it is not offered."""
    if _renameat2 is None:
        raise _NoAtomicRename
    if _renameat2(_AT_FDCWD, os.fsencode(source), _AT_FDCWD, os.fsencode(target), flags) == 0:
        return
    code = ctypes.get_errno()
    if code in (errno.ENOSYS, errno.EINVAL, errno.EOPNOTSUPP, errno.ENOTSUP):
        raise _NoAtomicRename
    raise OSError(code, os.strerror(code), str(target))


@contextlib.contextmanager
def _parent_lock(parent: Path):
    """An exclusive lock on ``parent/.panelprep-commit.lock`` (the file stays, empty)."""
    import fcntl

    handle = os.open(parent / ".panelprep-commit.lock", os.O_RDWR | os.O_CREAT | os.O_CLOEXEC,
                     0o666)
    try:
        fcntl.flock(handle, fcntl.LOCK_EX)
        yield
    finally:
        os.close(handle)


@contextlib.contextmanager
def _signals_held():
    """Hold Ctrl-C and SIGTERM back for a few renames (main thread only)."""
    if threading.current_thread() is not threading.main_thread() or not hasattr(
            signal, "pthread_sigmask"):
        yield
        return
    before = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT, signal.SIGTERM})
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, before)


def _own_identity(path: Path) -> tuple[int, int] | None:
    """(device, inode) of ``path`` itself, not following a link."""
    try:
        found = os.lstat(path)
    except OSError:
        return None
    return found.st_dev, found.st_ino


def _discard(path: Path) -> None:
    """Remove what was moved aside: a link itself (never what it points to), or a folder."""
    if path.is_symlink() or path.is_file():
        path.unlink(missing_ok=True)
    else:
        _remove_tree(path)


def _fresh_folder(parent: Path) -> Path:
    """A new hidden folder in ``parent``, made with the usual permissions (umask).

    ``tempfile.mkdtemp`` would make it private (0700), and the output
    folder it becomes would stay so.
    """
    while True:
        folder = _fresh_name(parent)
        try:
            folder.mkdir()
        except FileExistsError:
            continue
        return folder


def _remove_abandoned(parent: Path, name: str | None = None) -> None:
    """Remove temporary files and folders left in ``parent`` by runs whose process has ended.

    With ``name``, also those earlier versions named after the target
    (``.NAME.partial-PID-XXXX``).
    """
    found = [(p, p.name[len(TEMP_PREFIX):]) for p in parent.glob(f"{TEMP_PREFIX}*")]
    if name:
        legacy = f".{name}.partial-"
        found += [(p, p.name[len(legacy):]) for p in parent.glob(f"{glob.escape(legacy)}*")]
    for path, rest in found:
        pid = rest.split("-")[0]
        if pid.isdigit() and not _process_alive(int(pid)):
            _discard(path)


def _process_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _remove_tree(folder: Path) -> None:
    shutil.rmtree(folder, ignore_errors=True)
