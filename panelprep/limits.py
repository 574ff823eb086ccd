"""Limits that keep a run from exhausting the machine: memory before reading, grids after.

Two guards, both ending in one clear message instead of a machine that
starts swapping or an allocation error deep inside numpy:

* **Memory.** Before a file is read, ``check_memory`` estimates what the run
  will hold in memory (the data as read, times ``WORKING_SET_FACTOR`` for
  the copies a preparation makes) and compares it with what the machine has
  available (``MemAvailable`` in ``/proc/meminfo``).  When the estimate does
  not fit, the run stops with exit code 2 naming both numbers.  The
  environment variable ``PANELPREP_MEMORY_LIMIT`` overrides the available
  memory (``PANELPREP_MEMORY_LIMIT=8G``) or turns the guard off
  (``PANELPREP_MEMORY_LIMIT=off``).
* **Period grids.** Every per-period array is sized by the periods that
  occur, never by the span of the grid (see ``_groups.compact_codes``), so
  a mistyped date that stretches a daily grid over centuries costs nothing;
  the audit reports such a grid (``GRID_PERIODS``).  A grid whose
  (entity, period) cells would not fit in 64-bit codes cannot be indexed at
  all: ``check_grid`` stops the run naming the first and last period.
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from panelprep.errors import InputError

if TYPE_CHECKING:
    import pyarrow.parquet as pq

MEMORY_ENV = "PANELPREP_MEMORY_LIMIT"
# peak resident memory of a preparation over the in-memory size of the columns it reads:
# measured at 10 on a generated panel of 6 million rows (a text id, integer years, five
# float variables, four transforms): the frame, the float block of the variables, the
# index codes, one output table at a time and Arrow's copies while reading and writing
WORKING_SET_FACTOR = 10.0
# in-memory size of a CSV over its size on disk (1.26 on the same panel): numbers take
# about as many bytes as their digits, text gains 8-byte offsets
CSV_EXPANSION = 1.5
# a compressed CSV (.gz, .bz2 ...) holds several times its size as text
COMPRESSED_CSV_EXPANSION = 5.0 * CSV_EXPANSION
# Arrow IPC / Feather files are often lz4- or zstd-compressed
ARROW_EXPANSION = 2.0
_COMPRESSED_SUFFIXES = (".gz", ".bz2", ".xz", ".zst", ".lz4")

# a grid of more periods than this is reported by the audit as most likely mistyped
# (100,000 days are 274 years)
GRID_PERIODS = 100_000


@dataclass(frozen=True)
class Thresholds:
    """Tunable limits of the checks.

    low_within_ratio : a variable is reported as thin within entities when
        its within SD ratio (within SD / overall SD) is below this (default 0.05).
    constant_rtol : a group counts as constant in a variable when the root
        mean square deviation from its mean is at most this times the
        variable's largest absolute deviation from its overall mean
        (default 1e-9).
    max_grid_periods : a grid of more periods is reported as most likely
        mistyped (default ``limits.GRID_PERIODS``, 100,000).
    """

    low_within_ratio: float = 0.05
    constant_rtol: float = 1e-9
    max_grid_periods: int = GRID_PERIODS
# (entity, period) cells are int64 codes; keep headroom for the offsets lags add
MAX_GRID_CELLS = 1 << 62
# balance = largest-block scores every (first, last) pair of observed periods
LARGEST_BLOCK_PERIODS = 2048

_SIZE = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*([kmgt]?)i?b?\s*$", re.IGNORECASE)
_UNITS = {"": 1, "k": 1 << 10, "m": 1 << 20, "g": 1 << 30, "t": 1 << 40}


@dataclass(frozen=True)
class MemoryEstimate:
    """What reading a file will cost, in bytes.

    ``data`` is the estimated in-memory size of the columns read; ``peak``
    that times the working-set factor; ``basis`` says how ``data`` was
    estimated, for the message.
    """

    data: int
    peak: int
    basis: str


def estimate_memory(
    path: Path, fmt: str, columns: list[str] | None, n_columns: int,
    factor: float = WORKING_SET_FACTOR,
) -> MemoryEstimate:
    """Estimate the in-memory size of reading ``columns`` (all when None) of a file.

    Parquet: from the metadata (rows, column types, text lengths of the
    min and max statistics; see ``_parquet_bytes``).  CSV and Arrow IPC:
    the file's size times the share of columns read, times
    ``CSV_EXPANSION`` (``COMPRESSED_CSV_EXPANSION`` when compressed) or
    ``ARROW_EXPANSION``.  ``peak`` multiplies by ``factor``.
    """
    size = path.stat().st_size
    share = 1.0 if columns is None or n_columns == 0 else min(1.0, len(columns) / n_columns)
    if fmt == "parquet":
        import pyarrow.parquet as pq

        data = _parquet_bytes(pq.read_metadata(path), None if columns is None else set(columns))
        basis = "rows and column types in the Parquet metadata"
    elif fmt == "csv":
        compressed = path.suffix.lower() in _COMPRESSED_SUFFIXES
        expansion = COMPRESSED_CSV_EXPANSION if compressed else CSV_EXPANSION
        data = int(size * share * expansion)
        basis = f"file size x {expansion:g}" + (" (compressed)" if compressed else "")
    else:
        data = int(size * share * ARROW_EXPANSION)
        basis = f"file size x {ARROW_EXPANSION:g}"
    return MemoryEstimate(data=data, peak=int(data * factor), basis=basis)


def _parquet_bytes(meta: pq.FileMetaData, wanted: set[str] | None) -> int:
    """In-memory bytes of the wanted columns from row counts, types and statistics.

    Parquet's own uncompressed sizes count dictionary-encoded text once per
    distinct value, far below what pandas holds, so text is sized per row
    (8-byte offset plus the length of the column's min and max values) and
    every other column at 8 bytes per row, never below the stored size.
    """
    total = 0
    for g in range(meta.num_row_groups):
        group = meta.row_group(g)
        for c in range(group.num_columns):
            chunk = group.column(c)
            if wanted is not None and chunk.path_in_schema.split(".")[0] not in wanted:
                continue
            width = 8
            if chunk.physical_type in ("BYTE_ARRAY", "FIXED_LEN_BYTE_ARRAY"):
                stats = chunk.statistics
                # decimals are stored as byte arrays too, but their statistics are numbers
                if stats is not None and stats.has_min_max and isinstance(stats.min, (str, bytes)):
                    width += (len(stats.min) + len(stats.max)) // 2
            total += max(group.num_rows * width, chunk.total_uncompressed_size)
    return total


def available_memory() -> int | None:
    """Bytes a run may use: ``PANELPREP_MEMORY_LIMIT`` if set, else ``MemAvailable``.

    None when the guard is off (``PANELPREP_MEMORY_LIMIT=off``) or the
    machine does not say (no ``/proc/meminfo``).
    """
    given = os.environ.get(MEMORY_ENV, "").strip()
    if given.lower() in ("off", "0", "none", "no"):
        return None
    if given:
        return parse_size(given)
    try:
        with open("/proc/meminfo", encoding="ascii") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        return None
    return None


def parse_size(text: str) -> int:
    """``"512M"``, ``"8G"``, ``"1.5GiB"``, ``"1000000"`` -> bytes (binary units)."""
    match = _SIZE.match(text)
    if not match:
        raise InputError(f"{MEMORY_ENV}={text!r} is not a size like 8G or 512M, or 'off'")
    return int(float(match.group(1)) * _UNITS[match.group(2).lower()])


def check_memory(
    path: Path, fmt: str, columns: list[str] | None, n_columns: int,
    factor: float = WORKING_SET_FACTOR,
) -> MemoryEstimate | None:
    """Stop before reading a file whose run would not fit in the memory available.

    Raises ``InputError`` (exit code 2) naming the estimate and what is
    available; returns the estimate otherwise (None when the guard is off).
    """
    available = available_memory()
    if available is None:
        return None
    estimate = estimate_memory(path, fmt, columns, n_columns, factor)
    if estimate.peak > available:
        raise InputError(
            f"{path}: a run on it would need about {format_size(estimate.peak)} of memory "
            f"({format_size(estimate.data)} of data by {estimate.basis}, x{factor:g} working set) "
            f"but {format_size(available)} is available; read fewer columns, split the file "
            "and prepare it with --engine dask, or use a larger machine "
            f"({MEMORY_ENV}=off skips this check)"
        )
    return estimate


def format_size(n_bytes: float) -> str:
    """Bytes in binary units with three significant digits: ``1.5 GiB``."""
    value = float(n_bytes)
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if value < 1024 or unit == "TiB":
            return f"{value:.0f} {unit}" if unit == "B" else f"{value:.3g} {unit}"
        value /= 1024
    return f"{value:.3g} TiB"


def check_grid(n_entities: int, n_periods: int, column: str, first: str, last: str) -> None:
    """Stop when the (entity, period) cells of a grid do not fit in int64 codes.

    ``first`` and ``last`` are the labels of the grid's ends, named in the
    message so a mistyped value can be found.
    """
    if n_periods > 0 and max(n_entities, 1) * n_periods >= MAX_GRID_CELLS:
        raise InputError(
            f"time column {column!r} spans {n_periods:,} periods from {first} to {last}; with "
            f"{n_entities:,} entities the (entity, period) grid is too large to index "
            "(look for mistyped time values)"
        )


def grid_is_large(n_periods: int, limit: int = GRID_PERIODS) -> bool:
    """Whether a grid has more periods than a real panel would (see ``GRID_PERIODS``)."""
    return n_periods > limit
