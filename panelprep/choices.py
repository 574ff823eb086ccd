"""The fixed vocabularies of a run: every option's allowed values and every check's id.

They live here, apart from the modules that act on them, so that the run
file and the command line can check a value with the standard library only:
a mistyped ``--method`` is answered before pandas, pyarrow or scipy load.
Each module that acts on a vocabulary imports it from here under its usual
name (``components.METHODS``, ``clean.BALANCE``, ...).
"""

from __future__ import annotations

import re

from panelprep.errors import TimeParseError

# variance components (panelprep.components)
METHODS = ("swamy-arora", "wallace-hussain", "amemiya", "nerlove")
# every finding id the estimators emit (a run file may set their severity)
COMPONENT_FINDING_IDS = (
    "entity-variance-negative",
    "idiosyncratic-variance-negative",
    "regressor-dropped-within",
    "regressor-dropped-between",
    "regressor-dropped-pooled",
    "components-underidentified",
    "variance-beyond-float-range",
)

# cleaning policies (panelprep.clean)
DUPLICATES = ("fail", "drop-exact", "keep-first", "keep-last", "mean")
NORMALISE = ("none", "trim", "trim-fold")
SINGLETONS = ("keep", "drop")
BALANCE = ("keep", "complete-entities", "largest-block")

# where a preparation runs (panelprep.engine)
ENGINES = ("local", "dask")

# transformed files (panelprep.transforms)
TRANSFORMS = ("within", "between", "quasi", "twoway", "diff")

# period frequencies (panelprep.timeaxis)
FREQUENCIES = ("year", "quarter", "month", "week", "day", "int")
FREQ_CHOICES = "year, quarter, month, week, day, int or int:K (whole-number periods K apart)"
_STATED_STEP = re.compile(r"^\s*int\s*:\s*(\d{1,18})\s*$")

# file formats and Parquet codecs (panelprep.io); zstd is the default: on float columns
# without dictionary pages it writes faster than pyarrow's defaults and smaller
# (benchmarks/README.md, "Writes")
FORMATS = ("csv", "parquet", "arrow")
OUTPUT_FORMATS = ("parquet", "csv")
PARQUET_COMPRESSIONS = ("zstd", "lz4", "snappy", "gzip", "none")

# the structural checks in the order they run (panelprep.checks; a test holds this to
# the registry of checks)
CHECK_IDS = (
    "key-missing",
    "key-conflict",
    "row-repeated",
    "entity-id-lookalike",
    "period-holes",
    "period-off-grid",
    "panel-shape",
    "entity-single-obs",
    "values-not-numeric",
    "values-declared-missing",
    "values-nan-missing",
    "values-decimal-rounded",
    "values-missing",
    "sample-new-singletons",
    "var-fixed-within",
    "var-thin-within",
    "var-fixed-per-period",
)


def parse_freq(freq: str | None) -> tuple[str | None, int | None]:
    """``"int:10"`` -> ``("int", 10)``, ``"month"`` -> ``("month", None)``, None -> (None, None).

    Raises ``TimeParseError`` for anything else (``int:0`` included).
    """
    if freq is None:
        return None, None
    stated = _STATED_STEP.fullmatch(str(freq))
    if stated is not None and int(stated.group(1)) >= 1:
        return "int", int(stated.group(1))
    if freq in FREQUENCIES:
        return freq, None
    raise TimeParseError(f"--freq {freq!r} is not one of {FREQ_CHOICES}, K at least 1")
