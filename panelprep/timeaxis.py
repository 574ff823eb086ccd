"""Place time values on a period grid.

A time column may hold integer periods (``1995``, ``3``), dates or datetimes,
or period strings (``2021Q3``, ``2021-03``, ``2021-W07``).  We parse only the
distinct values (a panel has few periods however many rows it has), give each
an integer *ordinal* on the grid of its frequency, and broadcast back to rows
through the factorised codes.

Frequencies: ``year``, ``quarter``, ``month``, ``week``, ``day`` and ``int``
(integer periods with a fixed step, e.g. survey waves every two years).  The
step of integer periods is inferred from the distinct values (``_integer_step``)
or stated as ``int:K`` (``parse_freq``): waves coded 80 and 90 are one step of
10 apart, not eleven periods with nine missing.
A value is *off the grid* when it does not sit where the grid's other values
sit: a mid-month date in a panel of month-end dates, or an odd year in a
panel observed every other year.  Off-grid values are kept and placed in the
period that contains them; the audit reports them.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from panelprep.choices import parse_freq
from panelprep.errors import TimeParseError

_PATTERNS: dict[str, re.Pattern[str]] = {
    # whole numbers, also as written by tools that store years as floats ("1935.0")
    "int": re.compile(r"^\s*-?\d{1,9}(?:\.0*)?\s*$"),
    # any digit after the Q, so 2021Q5 is a quarter label with no such quarter
    "quarter": re.compile(r"^\s*(\d{4})\s*[-_ ]?[Qq](\d{1,2})\s*$"),
    "month": re.compile(r"^\s*(\d{4})(?:-|/|M|m)(\d{1,2})\s*$"),
    "week": re.compile(r"^\s*(\d{4})-?W(\d{2})\s*$"),
}

# a number with a decimal fraction (2000.5, 2021.1): never a period, a date or a month
_FRACTION = re.compile(r"^\s*[-+]?\d*\.\d*[1-9]\d*\s*$")
_WAYS = ("a time value with a decimal fraction is read neither as a date nor as a month or "
         "quarter; write whole-number periods (2001), dates (2001-06-30) or labels like "
         "2001Q3, 2001-03, 2001-W07")

# a UTC offset (Z, +01:00, -0500) written after a time of day
_UTC_OFFSET = re.compile(r"^(?P<wall>.*\d{2}:\d{2}(?::\d{2}(?:\.\d+)?)?)\s*(?:Z|[+-]\d{2}(?::?\d{2})?)$")

_EPOCH_WEEKDAY = 3  # 1970-01-01 was a Thursday (Monday = 0)
# integer periods further apart than this cannot be differenced in int64 without overflow
MAX_PERIOD_SPAN = 1 << 62
INT_GRID_SHARE = 0.9  # share of rows that must sit on an integer grid of step > 1


@dataclass(frozen=True)
class TimeAxis:
    """Where each row sits on the period grid.

    Attributes
    ----------
    freq : str
        One of ``FREQUENCIES``.
    step : int
        Grid step for ``int`` periods (1 otherwise).
    base : int
        For ``int`` periods, the value at ordinal 0 (the smallest value on the
        grid; an off-grid value below it gets a negative ordinal).
    ordinal : ndarray of int64, shape (n,)
        Period number on the grid for every row; meaningless where ``missing``.
    missing : ndarray of bool, shape (n,)
        Rows whose time value is absent.
    off_grid : ndarray of bool, shape (n,)
        Rows whose value is not on the grid (placed in the containing period).
    inferred : bool
        Whether ``freq`` was inferred rather than given.
    data_step : int or None
        For ``int`` periods, the greatest common divisor of the gaps between
        the distinct values (None for a single value or another frequency):
        what the data show, to compare with a stated ``int:K``.
    step_stated : bool
        Whether the step was stated (``int:K``) rather than inferred.
    written_as : str
        How the values were written: ``int``, ``date``, or the label kind
        (``quarter``, ``month``, ``week``); week labels are shown as week
        labels (``2021-W07``), weekly dates as dates.
    instant : ndarray of int64, shape (n,), or None
        One code per distinct moment the time values denote, so rows that
        spell the same moment differently (``2021-01-31`` and
        ``2021-01-31T00:00:00``, ``2001`` and ``2001.0``) share a code and
        two moments inside one period (an off-grid date) do not; meaningless
        where ``missing``.  Exact repeats are judged on it, not on the text.
    """

    freq: str
    step: int
    base: int
    ordinal: np.ndarray
    missing: np.ndarray
    off_grid: np.ndarray
    inferred: bool
    instant: np.ndarray | None = None
    data_step: int | None = None
    step_stated: bool = False
    written_as: str = "date"

    @property
    def name(self) -> str:
        """Frequency as reported: ``int:2`` for integer periods every two units."""
        return f"int:{self.step}" if self.freq == "int" else self.freq

    def label(self, ordinals: np.ndarray | list[int]) -> list[str]:
        """Human-readable period labels for grid ordinals."""
        ords = np.asarray(ordinals, dtype=np.int64)
        if self.freq == "int":
            return [str(int(v)) for v in self.base + ords * self.step]
        if self.freq == "year":
            return [str(int(v)) for v in ords]
        if self.freq == "quarter":
            return [f"{int(v) // 4}Q{int(v) % 4 + 1}" for v in ords]
        if self.freq == "month":
            return [f"{int(v) // 12}-{int(v) % 12 + 1:02d}" for v in ords]
        days = ords * 7 - _EPOCH_WEEKDAY if self.freq == "week" else ords
        dates = np.datetime64("1970-01-01") + days.astype("timedelta64[D]")
        if self.freq == "week" and self.written_as == "week":
            iso = pd.DatetimeIndex(dates).isocalendar()
            return [f"{y}-W{w:02d}" for y, w in zip(iso["year"], iso["week"])]
        return [str(d) for d in dates]


def build_time_axis(values: pd.Series, freq: str | None = None, column: str = "time") -> TimeAxis:
    """Parse a time column onto a period grid; see the module docstring.

    ``freq`` is one of ``FREQUENCIES``, ``int:K`` (integer periods K apart) or
    None (inferred).  Raises ``TimeParseError`` naming the column, the first
    bad row (counting data rows from 1) and its value when a value cannot be
    placed.
    """
    freq, stated_step = parse_freq(freq)
    codes, uniques = pd.factorize(values, use_na_sentinel=True)
    codes = codes.astype(np.int64, copy=False)
    missing = codes < 0
    if isinstance(uniques, pd.Index) and uniques.dtype == object or pd.api.types.is_string_dtype(
        uniques.dtype
    ):
        stripped = pd.Series(np.asarray(uniques, dtype=object)).astype(str).str.strip()
        # blank strings, and NaN written as text, are missing keys as a null or a stored NaN
        # is, not parse failures
        blank = ((stripped == "") | stripped.str.fullmatch(r"[-+]?[nN][aA][nN]")).to_numpy()
        if blank.any():
            missing = missing | np.isin(codes, np.flatnonzero(blank))
    else:
        blank = np.zeros(len(uniques), dtype=bool)

    kind, uniq_ord, uniq_off, step, base, found_freq, uniq_instant = _parse_uniques(
        uniques, blank, freq, codes, column, stated_step
    )
    safe = np.where(codes < 0, 0, codes)
    if len(uniq_ord) == 0:
        ordinal = np.zeros(len(codes), dtype=np.int64)
        off = np.zeros(len(codes), dtype=bool)
        instant = np.zeros(len(codes), dtype=np.int64)
    else:
        ordinal = uniq_ord[safe]
        off = uniq_off[safe] & ~missing
        instant = pd.factorize(uniq_instant)[0].astype(np.int64)[safe]
    return TimeAxis(
        freq=found_freq,
        step=step,
        base=base,
        ordinal=ordinal,
        missing=missing,
        off_grid=off,
        inferred=freq is None,
        instant=instant,
        data_step=_data_step(uniq_instant[~blank]) if found_freq == "int" else None,
        step_stated=stated_step is not None,
        written_as=kind,
    )


def _data_step(values: np.ndarray) -> int | None:
    """Greatest common divisor of the gaps between distinct whole numbers (None for one)."""
    spacing = np.diff(np.unique(values))
    return int(np.gcd.reduce(spacing)) if len(spacing) else None


@dataclass(frozen=True)
class Grid:
    """The time axis of every distinct time value of an input read in partitions.

    ``uniques`` holds the distinct values (``axis`` has one entry per
    value), so the frequency, the integer step and base, and the first and
    last period are those the whole column gives; :meth:`axis_for` places the
    rows of one partition on it, the same numbers ``build_time_axis`` gives
    on the whole column.
    """

    uniques: pd.Index
    axis: TimeAxis

    @property
    def span(self) -> tuple[int, int]:
        """First and last grid ordinal of a present value; (0, -1) when none is."""
        present = ~self.axis.missing
        if not present.any():
            return 0, -1
        return int(self.axis.ordinal[present].min()), int(self.axis.ordinal[present].max())

    def axis_for(self, values: pd.Series) -> TimeAxis:
        """The rows ``values`` (each one of ``uniques``, or missing) on this grid."""
        position = self.uniques.get_indexer(values)
        missing = (position < 0) | values.isna().to_numpy(dtype=bool)
        safe = np.where(position < 0, 0, position)
        axis = self.axis
        return replace(axis, ordinal=axis.ordinal[safe], missing=missing | axis.missing[safe],
                       off_grid=axis.off_grid[safe] & ~missing,
                       instant=None if axis.instant is None else axis.instant[safe])


def time_grid(distinct: pd.Series, freq: str | None = None, column: str = "time") -> Grid:
    """The grid of a time column from its distinct values (the frequency is inferred from
    distinct moments only, so they suffice)."""
    values = distinct.reset_index(drop=True)
    return Grid(uniques=pd.Index(values), axis=build_time_axis(values, freq=freq, column=column))


def _shown(value: object) -> str:
    """A value as written in a message: ``1e+300``, not ``np.float64(1e+300)``."""
    return repr(value.item() if isinstance(value, np.generic) else value)


def _first_row(codes: np.ndarray, unique_position: int) -> int:
    return int(np.flatnonzero(codes == unique_position)[0]) + 1


def _nanoseconds(stamps: pd.DatetimeIndex) -> np.ndarray:
    return stamps.values.astype("datetime64[ns]").astype(np.int64)


def _parse_uniques(uniques, blank, freq, codes, column, stated_step=None):
    """Return (kind, ordinals, off_grid, step, base, freq, instants) for distinct values.

    ``instants`` are int64 keys equal for values that denote the same moment.
    """
    n = len(uniques)
    if n == 0 or blank.all():
        return ("empty", np.zeros(n, np.int64), np.zeros(n, bool), 1, 0, freq or "int",
                np.zeros(n, np.int64))
    if pd.api.types.is_bool_dtype(uniques.dtype):
        raise TimeParseError(f"time column {column!r} holds true/false values, not periods")
    if pd.api.types.is_numeric_dtype(uniques.dtype):
        nums = np.asarray(uniques, dtype=np.float64)
        bad = ~np.isfinite(nums) | (nums != np.round(nums))
        if bad.any():
            k = int(np.flatnonzero(bad)[0])
            raise TimeParseError(
                f"time column {column!r}: value {_shown(uniques[k])} at row {_first_row(codes, k)} "
                f"is not a whole-number period: {_WAYS}"
            )
        # integers are taken as stored (through float64 two large ones could merge);
        # a float period must be a whole number float64 holds exactly
        limit = 2.0**63 if pd.api.types.is_integer_dtype(uniques.dtype) else 2.0**53
        huge = np.abs(nums) >= limit
        if huge.any():
            k = int(np.flatnonzero(huge)[0])
            raise TimeParseError(
                f"time column {column!r}: value {_shown(uniques[k])} at row {_first_row(codes, k)} "
                "is too large to be a period"
            )
        whole = (np.asarray(uniques, dtype=np.int64)
                 if pd.api.types.is_integer_dtype(uniques.dtype) else nums.astype(np.int64))
        rows = np.bincount(codes[codes >= 0], minlength=n)
        return ("int", *_integer_grid(whole, freq, column, rows, stated_step), whole)
    if pd.api.types.is_datetime64_any_dtype(uniques.dtype):
        stamps = pd.DatetimeIndex(uniques)
        if stamps.tz is not None:
            # the period is the calendar date as recorded: converting to UTC first would
            # put midnight, New Year's Day in Berlin into the previous day and year
            stamps = stamps.tz_localize(None)
        return ("date", *_date_grid(stamps, freq, column), _nanoseconds(stamps))
    return _parse_strings(uniques, blank, freq, codes, column, stated_step)


def _integer_grid(values: np.ndarray, freq: str | None, column: str, rows: np.ndarray,
                  stated_step: int | None = None):
    """Grid of distinct whole numbers ``values`` seen on ``rows`` rows each.

    ``stated_step`` (from ``int:K``) replaces the inferred step; values off
    that grid are marked off-grid as any others.
    """
    if freq not in (None, "int", "year"):
        raise TimeParseError(
            f"time column {column!r} holds whole numbers, which cannot be read as --freq {freq}"
        )
    low, high = int(values.min()), int(values.max())
    if high - low >= MAX_PERIOD_SPAN:
        raise TimeParseError(
            f"time column {column!r} spans {low} to {high}, too wide a range of periods "
            "to place on one grid (look for mistyped values)"
        )
    step = 1 if freq == "year" else stated_step or _integer_step(values, rows)
    residue = values % step
    on_grid = residue == _mode(residue, rows)
    base = int(values[on_grid].min())
    offset = values - base
    ordinal = offset // step
    off = offset % step != 0
    if freq == "year" or (freq is None and step == 1 and base >= 1000 and values.max() <= 2999):
        return ordinal + base, off, 1, base, "year"
    return ordinal, off, step, base, "int"


def _integer_step(values: np.ndarray, rows: np.ndarray) -> int:
    """Grid step of integer periods.

    The largest spacing between neighbouring distinct values on whose grid
    at least ``INT_GRID_SHARE`` of the rows sit, so an odd year in a panel
    observed every other year is off a grid of step 2 rather than making
    the step 1; the greatest common divisor of the spacings when no larger
    step qualifies (every value sits on that grid).  Two distinct values are
    one step apart: waves coded 80 and 90 (or 1 and 3) are two consecutive
    periods, not a span with holes in it; state ``int:1`` (``--freq int:1``
    for 2003 and 2005 as years with one missing) when the data do not show
    the step.  A single distinct value gives step 1.
    """
    spacing = np.diff(np.unique(values))
    if len(spacing) == 0:
        return 1
    if len(spacing) == 1:
        return max(int(spacing[0]), 1)
    gcd = max(int(np.gcd.reduce(spacing)), 1)
    sizes, counts = np.unique(spacing[spacing > gcd], return_counts=True)
    # a few most common spacings are candidates enough; keeps this cheap on odd data
    for size in np.sort(sizes[np.argsort(-counts, kind="stable")][:8])[::-1]:
        residue = values % size
        if rows[residue == _mode(residue, rows)].sum() >= INT_GRID_SHARE * rows.sum():
            return int(size)
    return gcd


def _parse_strings(uniques, blank, freq, codes, column, stated_step=None):
    text = pd.Series(np.asarray(uniques, dtype=object)).astype(str)
    fraction = text.str.fullmatch(_FRACTION.pattern).to_numpy() & ~blank
    if fraction.any():
        # pandas would read 2000.5 as a date in May and 2021.1 as a month: refuse instead
        k = int(np.flatnonzero(fraction)[0])
        raise TimeParseError(
            f"time column {column!r}: value {text[k]!r} at row {_first_row(codes, k)} "
            f"is not a whole-number period: {_WAYS}"
        )
    for kind in ("int", "quarter", "month", "week"):
        matched = text.str.fullmatch(_PATTERNS[kind].pattern).to_numpy() | blank
        if matched.all():
            return _string_grid(kind, text, blank, freq, codes, column, stated_step)
        if kind == "int" and 2 * matched[~blank].sum() > (~blank).sum():
            # mostly whole numbers: name the value that is not one, not a number that
            # happens to fail as a date
            k = int(np.flatnonzero(~matched)[0])
            raise TimeParseError(
                f"time column {column!r}: cannot read {text[k]!r} at row {_first_row(codes, k)} "
                "as a period: the other values are whole numbers"
            )
        if matched[~blank].any() and kind != "int":
            k = int(np.flatnonzero(~matched)[0])
            raise TimeParseError(
                f"time column {column!r} mixes kinds of period: {text[k]!r} at row "
                f"{_first_row(codes, k)} is not a {kind} label like the others"
            )
    return _date_strings(text, blank, freq, codes, column)


def _string_grid(kind, text, blank, freq, codes, column, stated_step=None):
    n = len(text)
    if kind == "int":
        nums = np.zeros(n, dtype=np.int64)
        nums[~blank] = (text[~blank].str.strip().str.replace(r"\.0*$", "", regex=True)
                        .astype(np.int64).to_numpy())
        rows = np.bincount(codes[codes >= 0], minlength=n)[~blank]
        ordinal, off, step, base, found = _integer_grid(nums[~blank], freq, column, rows,
                                                        stated_step)
        full_ord = np.zeros(n, np.int64)
        full_off = np.zeros(n, bool)
        full_ord[~blank], full_off[~blank] = ordinal, off
        return "int", full_ord, full_off, step, base, found, nums
    if freq is not None and freq != kind:
        k = int(np.flatnonzero(~blank)[0])
        raise TimeParseError(
            f"time column {column!r}: value {text[k]!r} at row {_first_row(codes, k)} "
            f"is a {kind} label, but --freq {freq} was given"
        )
    parts = text.str.extract(_PATTERNS[kind].pattern)
    year = pd.to_numeric(parts[0], errors="coerce").fillna(0).astype(np.int64).to_numpy()
    sub = pd.to_numeric(parts[1], errors="coerce").fillna(1).astype(np.int64).to_numpy()
    if kind == "month":
        bad = ((sub < 1) | (sub > 12)) & ~blank
        if bad.any():
            k = int(np.flatnonzero(bad)[0])
            raise TimeParseError(
                f"time column {column!r}: value {text[k]!r} at row {_first_row(codes, k)} "
                "has no such month"
            )
        ordinal = year * 12 + sub - 1
    elif kind == "quarter":
        bad = ((sub < 1) | (sub > 4)) & ~blank
        if bad.any():
            k = int(np.flatnonzero(bad)[0])
            raise TimeParseError(
                f"time column {column!r}: value {text[k]!r} at row {_first_row(codes, k)} "
                "has no such quarter (quarters are Q1 to Q4)"
            )
        ordinal = year * 4 + sub - 1
    else:
        bad = ((sub < 1) | (sub > 53)) & ~blank
        if bad.any():
            k = int(np.flatnonzero(bad)[0])
            raise TimeParseError(
                f"time column {column!r}: value {text[k]!r} at row {_first_row(codes, k)} "
                "has no such week"
            )
        year, sub = np.where(blank, 2000, year), np.where(blank, 1, sub)
        days = iso_week_monday(year, sub)
        # week 53 exists only in the ISO years whose week 53 starts before the next year's week 1
        missing = (days >= iso_week_monday(year + 1, np.ones_like(sub))) & ~blank
        if missing.any():
            k = int(np.flatnonzero(missing)[0])
            raise TimeParseError(
                f"time column {column!r}: value {text[k]!r} at row {_first_row(codes, k)} "
                f"has no such week: ISO year {year[k]} has 52 weeks (week 53 exists only in "
                "years that start or end on a Thursday)"
            )
        ordinal = (days + _EPOCH_WEEKDAY) // 7
    ordinal = ordinal.astype(np.int64)
    return kind, ordinal, np.zeros(n, bool), 1, 0, kind, ordinal


def iso_week_monday(year: np.ndarray, week: np.ndarray) -> np.ndarray:
    """Days since 1970-01-01 of the Monday of ISO week ``week`` of ISO year ``year``.

    Week 1 is the week holding 4 January (ISO 8601), so its Monday is 4 January
    less that day's weekday (Monday = 0).
    """
    first = (np.asarray(year, dtype=np.int64) - 1970).astype("datetime64[Y]")
    january_4 = first.astype("datetime64[D]").astype(np.int64) + 3
    return january_4 - (january_4 + _EPOCH_WEEKDAY) % 7 + 7 * (np.asarray(week) - 1)


def _date_strings(text, blank, freq, codes, column):
    # keep the wall-clock time as written: offsets differ across a daylight-saving change
    # (+01:00 in winter, +02:00 in summer), which pandas refuses to parse as one column
    wall = text.str.replace(_UTC_OFFSET.pattern, r"\g<wall>", regex=True)
    parsed = pd.to_datetime(wall.where(~pd.Series(blank), None), errors="coerce", format="ISO8601")
    bad = parsed.isna().to_numpy() & ~blank
    if bad.any():
        k = int(np.flatnonzero(bad)[0])
        raise TimeParseError(
            f"time column {column!r}: cannot read {text[k]!r} at row {_first_row(codes, k)} "
            "as a period (expected a whole number, a date, or a label like 2021Q3, 2021-03, 2021-W07)"
        )
    stamps = pd.DatetimeIndex(parsed)
    if stamps.tz is not None:
        stamps = stamps.tz_localize(None)
    stamps = stamps.where(~blank, stamps[~blank][0])
    ordinal, off, step, base, found = _date_grid(stamps, freq, column)
    return "date", ordinal, off, step, base, found, np.where(blank, 0, _nanoseconds(stamps))


def _date_grid(stamps: pd.DatetimeIndex, freq: str | None, column: str):
    if freq == "int":
        raise TimeParseError(f"time column {column!r} holds dates, which cannot be read as --freq int")
    days = stamps.values.astype("datetime64[D]").astype(np.int64)
    year = stamps.year.to_numpy().astype(np.int64)
    month = stamps.month.to_numpy().astype(np.int64)
    dom = stamps.day.to_numpy().astype(np.int64)
    month_end = stamps.is_month_end
    day_phase = np.where(month_end, 0, dom)  # 0 marks "last day of the month"
    time_of_day = (stamps.values.astype("datetime64[ns]").astype(np.int64)
                   - stamps.normalize().values.astype("datetime64[ns]").astype(np.int64))
    weekday = (days + _EPOCH_WEEKDAY) % 7
    # where inside its period each date sits, per frequency: on-grid dates share one phase
    phases = {
        "year": month * 100 + day_phase,
        "quarter": ((month - 1) % 3) * 100 + day_phase,
        "month": day_phase,
        "week": weekday,
        "day": np.zeros(len(days), np.int64),
    }
    # two spellings of one moment (2021-01-31, 2021-01-31T00:00:00) are one date, not two
    # votes: inference and the grid's phase count each moment once
    moments = np.unique(_nanoseconds(stamps), return_index=True)[1]
    if freq is None:
        freq = _infer_date_freq({name: phase[moments] for name, phase in phases.items()})
    if freq == "year":
        ordinal = year
    elif freq == "quarter":
        ordinal = year * 4 + (month - 1) // 3
    elif freq == "month":
        ordinal = year * 12 + month - 1
    elif freq == "week":
        # Monday-based weeks, as for 2021-W07 labels, so a period's label (its Monday)
        # is a day inside it whatever weekday the panel's dates fall on
        ordinal = (days + _EPOCH_WEEKDAY) // 7
    else:
        ordinal = days
    phase = phases[freq]
    off = (phase != _mode(phase[moments])) | (time_of_day != _mode(time_of_day[moments]))
    return ordinal.astype(np.int64), off, 1, 0, freq


def _infer_date_freq(phases: dict[str, np.ndarray]) -> str:
    """The coarsest frequency at which most distinct dates sit at the same phase.

    Month-end dates share phase "last day" at month frequency but spread over
    three phases at quarter frequency, so they read as monthly; a few
    mid-month dates among them stay a minority and are reported off the grid
    instead of turning the grid weekly (as a rule on the spacing between
    dates would).  More than half of the distinct dates must agree; a single
    distinct date reads as daily.
    """
    if len(phases["day"]) < 2:
        return "day"
    for freq in ("year", "quarter", "month", "week"):
        _, counts = np.unique(phases[freq], return_counts=True)
        if 2 * int(counts.max()) > len(phases[freq]):
            return freq
    return "day"


def _mode(values: np.ndarray, weights: np.ndarray | None = None) -> int:
    """Most common value (by ``weights`` when given); the smallest on ties."""
    uniq, inverse = np.unique(values, return_inverse=True)
    counts = np.bincount(inverse.reshape(-1), weights=weights, minlength=len(uniq))
    return int(uniq[np.argmax(counts)])

