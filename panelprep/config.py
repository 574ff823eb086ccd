"""The run file: every choice of a preparation in one TOML file.

A run file makes a preparation reproducible: the same file on the same data
gives the same outputs.  It is read with the standard library's ``tomllib``;
options given on the command line override the file's values key by key.
Relative paths in the file are read from the run file's folder; relative
paths given on the command line are read from the working directory.

Every key is optional except those marked *required*: a prepare needs
``input.path``, ``panel.entity``, ``panel.time``, ``model.y``, ``model.x``
and ``output.dir``, from the file or from the command line.

Keys
----

| key | type | default | meaning |
|---|---|---|---|
| `input.path` | path | *required* | data file; a relative path is read from the run file's folder |
| `input.format` | `csv`, `parquet`, `arrow` | by extension | input format |
| `input.delimiter` | one character | sniffed | CSV field separator |
| `input.decimal_comma` | bool | `false` | CSV numbers use `,` as the decimal mark |
| `input.missing_tokens` | list of text | `[]` | texts read as missing in numeric variables, e.g. `["n/a", "-"]` |
| `panel.entity` | text or list of text | *required* | entity key column(s) |
| `panel.time` | text | *required* | time column |
| `panel.freq` | `year`, `quarter`, `month`, `week`, `day`, `int`, `int:K` | inferred | period frequency; `int:K`: whole-number periods K apart (waves 80, 90: `int:10`) |
| `model.y` | text | *required* | dependent variable |
| `model.x` | list of text | *required* | regressors (at least one) |
| `contract.schema` | path | none | pandera YAML contract checked before the panel checks |
| `contract.validate_outputs` | bool | `false` | also check the written data files against the contract |
| `checks.fail_on` | `error`, `warning` | `error` | lowest severity that fails the gate |
| `checks.low_within_ratio` | number in [0, 1] | `0.05` | within SD ratio (within SD / overall SD) below this is reported as thin |
| `checks.constant_rtol` | number in (0, 1) | `1e-09` | constancy tolerance, relative to the variable's largest absolute value |
| `checks.severity` | table of finding id = `info`, `warning`, `error` | `{}` | severity per finding id, replacing the default |
| `clean.duplicates` | `fail`, `drop-exact`, `keep-first`, `keep-last`, `mean` | `fail` | what to do with repeated (entity, time) keys |
| `clean.normalise_ids` | `none`, `trim`, `trim-fold` | `none` | strip spaces from text ids (`trim-fold` also folds case) |
| `clean.singletons` | `keep`, `drop` | `keep` | drop entities observed once |
| `clean.balance` | `keep`, `complete-entities`, `largest-block` | `keep` | make the panel balanced |
| `clean.window` | two period labels, `""` for open | `["", ""]` | first and last period to keep |
| `derive.lag` | list of `var:k` | `[]` | gap-aware lags, k periods back |
| `derive.lead` | list of `var:k` | `[]` | gap-aware leads, k periods ahead |
| `derive.diff` | list of `var` or `var:k` | `[]` | gap-aware differences x(t) - x(t-k), k = 1 when absent |
| `output.dir` | path | *required* | output folder; a relative path is read from the run file's folder |
| `output.failed_dir` | path | `DIR.failed` beside `output.dir` | folder for a failed gate's diagnostics, replacing an earlier failed run's (output.dir is left as it was); a relative path is read from the run file's folder |
| `output.transforms` | list among `within`, `between`, `quasi`, `twoway`, `diff` | `["within", "between", "quasi"]` | transformed files to write |
| `output.method` | `swamy-arora`, `wallace-hussain`, `amemiya`, `nerlove` | `swamy-arora` | variance components for theta |
| `output.format` | `parquet`, `csv` | `parquet` | format of the data files |
| `output.compression` | `zstd`, `lz4`, `snappy`, `gzip`, `none` | `zstd` | codec of the Parquet files (zstd: the fastest total time at the smallest size measured) |
| `output.force` | bool | `false` | replace a non-empty output folder |
| `output.evidence` | bool | `true` | compute the entity-effect, correlated-effects, serial-correlation and cross-sectional dependence tests |
| `engine.kind` | `local`, `dask` | `local` | where the preparation runs: in this process, or partition by partition on a Dask cluster (`pip install 'panelprep[dask]'`) |
| `engine.cluster` | text | a local cluster | address of a running Dask scheduler (`tcp://host:8786`); without it the dask engine starts a local cluster sized to the machine and closes it |
| `engine.partitions` | whole number >= 1 | automatic | partitions of the shuffle by entity (dask engine) |
| `names.row` | text | `pp_row` | column of every row-level file holding each row's input row (from 1) |
| `names.intercept` | text | `pp_intercept` | quasi file: the 1 - theta column that stands in for the constant |
| `names.theta` | text | `pp_theta` | quasi file: theta of the row's entity |
| `names.entity_rows` | text | `pp_rows` | between file: rows of each entity in the sample |
| `names.reason` | text | `pp_reason` | dropped file: why the row was removed |
| `names.step` | text | `pp_step` | dropped file: the step that removed the row |
| `names.lag` | template | `{var}_lag{k}` | name of a derived lag, from {var} and {k} |
| `names.lead` | template | `{var}_lead{k}` | name of a derived lead, from {var} and {k} |
| `names.diff` | template | `{var}_diff{k}` | name of a derived difference, from {var} and {k} |
| `compare.previous` | path | none | previous vintage of the data; the input is compared with it before anything is written (findings `vintage-*`, `restated.parquet`); a relative path is read from the run file's folder |
| `compare.vars` | list of text | `model.y` and `model.x` | variables to compare |
| `compare.rtol` | number in [0, 1] | `1e-09` | a cell is restated when abs(new - old) > atol + rtol * abs(old) |
| `compare.atol` | number in [0, inf] | `0.0` | absolute tolerance of the comparison |
| `compare.max_restated_share` | number in [0, 1] | no limit | a variable restated in more than this share of its cells fails the gate (`vintage-restated-over-limit`) |

Errors are ``InputError`` with one line naming the file, the line, the key
and what is allowed.
"""

from __future__ import annotations

import copy
import json
import math
import os
import re
import textwrap
import tomllib
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from panelprep._paths import refuse_link_loop, resolved
from panelprep._version import __version__
from panelprep.choices import (
    BALANCE,
    CHECK_IDS,
    COMPONENT_FINDING_IDS,
    DUPLICATES,
    ENGINES,
    FORMATS,
    FREQ_CHOICES,
    FREQUENCIES,
    METHODS,
    OUTPUT_FORMATS,
    PARQUET_COMPRESSIONS,
    SINGLETONS,
    TRANSFORMS,
    parse_freq,
)
from panelprep.choices import NORMALISE as NORMALISE_IDS
from panelprep.errors import InputError
from panelprep.findings import (
    COMPARE_FINDING_IDS,
    CONTRACT_FINDING_ID,
    SEVERITIES,
    SKIPPED_COLUMNS_ID,
    STEP_FINDING_ID,
    UNCOMPUTABLE_ID,
)
from panelprep.limits import Thresholds
from panelprep.names import DEFAULT_NAMES, AddedNames

if TYPE_CHECKING:
    from panelprep.io import ReadOptions

# Checking a run file imports no pandas, pyarrow or scipy (panelprep.choices): what reads
# data (the read options, the draft's guesses) imports them where it is used.

# Finding ids that modules other than the structural checks emit; a run file
# may set their severity too.
EXTRA_FINDING_IDS = (*COMPONENT_FINDING_IDS, UNCOMPUTABLE_ID, CONTRACT_FINDING_ID,
                     SKIPPED_COLUMNS_ID, STEP_FINDING_ID, *COMPARE_FINDING_IDS)
FINDING_IDS: tuple[str, ...] = (*CHECK_IDS, *EXTRA_FINDING_IDS)

FAIL_ON = ("error", "warning")

_DEFAULT_THRESHOLDS = Thresholds()


@dataclass
class InputSection:
    """``[input]``: where the data is and how to read it."""

    path: Path | None = None
    format: str | None = None
    delimiter: str | None = None
    decimal_comma: bool = False
    missing_tokens: list[str] = field(default_factory=list)


@dataclass
class PanelSection:
    """``[panel]``: the key columns."""

    entity: list[str] | None = None
    time: str | None = None
    freq: str | None = None


@dataclass
class ModelSection:
    """``[model]``: the variables of the regression the outputs are for."""

    y: str | None = None
    x: list[str] | None = None


@dataclass
class ContractSection:
    """``[contract]``: an optional pandera schema the data must satisfy."""

    schema: Path | None = None
    validate_outputs: bool = False


@dataclass
class ChecksSection:
    """``[checks]``: the gate, the limits of the checks, severities per finding id."""

    fail_on: str = "error"
    low_within_ratio: float = _DEFAULT_THRESHOLDS.low_within_ratio
    constant_rtol: float = _DEFAULT_THRESHOLDS.constant_rtol
    severity: dict[str, str] = field(default_factory=dict)


@dataclass
class CleanSection:
    """``[clean]``: cleaning policies; the defaults change nothing."""

    duplicates: str = "fail"
    normalise_ids: str = "none"
    singletons: str = "keep"
    balance: str = "keep"
    window: tuple[str | None, str | None] = (None, None)


@dataclass
class DeriveSection:
    """``[derive]``: gap-aware lags, leads and differences, as ``var:k`` texts."""

    lag: list[str] = field(default_factory=list)
    lead: list[str] = field(default_factory=list)
    diff: list[str] = field(default_factory=list)


@dataclass
class OutputSection:
    """``[output]``: what to write and where."""

    dir: Path | None = None
    failed_dir: Path | None = None
    transforms: list[str] = field(default_factory=lambda: ["within", "between", "quasi"])
    method: str = "swamy-arora"
    format: str = "parquet"
    compression: str = "zstd"
    force: bool = False
    evidence: bool = True


@dataclass
class EngineSection:
    """``[engine]``: where the preparation runs (``panelprep.engine``)."""

    kind: str = "local"
    cluster: str | None = None
    partitions: int | None = None


@dataclass
class NamesSection:
    """``[names]``: names of the columns panelprep adds (see ``panelprep.names``)."""

    row: str = DEFAULT_NAMES.row
    intercept: str = DEFAULT_NAMES.intercept
    theta: str = DEFAULT_NAMES.theta
    entity_rows: str = DEFAULT_NAMES.entity_rows
    reason: str = DEFAULT_NAMES.reason
    step: str = DEFAULT_NAMES.step
    lag: str = DEFAULT_NAMES.lag
    lead: str = DEFAULT_NAMES.lead
    diff: str = DEFAULT_NAMES.diff


@dataclass
class CompareSection:
    """``[compare]``: the previous vintage to compare the input with before writing."""

    previous: Path | None = None
    vars: list[str] | None = None
    rtol: float = 1e-9
    atol: float = 0.0
    max_restated_share: float | None = None


_SECTIONS: dict[str, type] = {
    "input": InputSection,
    "panel": PanelSection,
    "model": ModelSection,
    "contract": ContractSection,
    "checks": ChecksSection,
    "clean": CleanSection,
    "derive": DeriveSection,
    "output": OutputSection,
    "engine": EngineSection,
    "names": NamesSection,
    "compare": CompareSection,
}
REQUIRED = ("input.path", "panel.entity", "panel.time", "model.y", "model.x", "output.dir")
_PATH_KEYS = ("input.path", "contract.schema", "output.dir", "output.failed_dir",
              "compare.previous")


class _Bad(Exception):
    """A value of the wrong type or outside what a key allows (``expected`` says what is)."""

    def __init__(self, expected: str) -> None:
        super().__init__(expected)
        self.expected = expected


def _text(value: Any, cli: bool) -> str:
    if not isinstance(value, str) or not value.strip():
        raise _Bad("a non-empty text")
    return value.strip()


def _path(value: Any, cli: bool) -> Path:
    if isinstance(value, Path):
        return value
    return Path(_text(value, cli))


def _bool(value: Any, cli: bool) -> bool:
    if not isinstance(value, bool):
        raise _Bad("true or false")
    return value


def _number(low: float, high: float, low_open: bool) -> Callable[[Any, bool], float]:
    bracket = "(" if low_open else "["
    expected = f"a number in {bracket}{low:g}, {high:g}{')' if low_open else ']'}"

    def parse(value: Any, cli: bool) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise _Bad(expected)
        number = float(value)
        inside = (low < number if low_open else low <= number) and (
            number < high if low_open else number <= high
        )
        if not math.isfinite(number) or not inside:
            raise _Bad(expected)
        return number

    return parse


def _count(value: Any, cli: bool) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < 1:
        raise _Bad("a whole number >= 1")
    return value


def _choice(allowed: tuple[str, ...]) -> Callable[[Any, bool], str]:
    def parse(value: Any, cli: bool) -> str:
        if not isinstance(value, str) or value not in allowed:
            raise _Bad(f"one of {', '.join(allowed)}")
        return value

    return parse


def _freq(value: Any, cli: bool) -> str:
    """A frequency, or ``int:K`` for whole-number periods K apart (kept as written, trimmed)."""
    try:
        if isinstance(value, str) and parse_freq(value.strip())[0] is not None:
            return value.strip().replace(" ", "")
    except InputError:
        pass
    raise _Bad(f"one of {FREQ_CHOICES}, K a whole number from 1")


def _items(value: Any, cli: bool, what: str) -> list[Any]:
    """A list from the file; on the command line a comma-separated text is a list too."""
    if cli and isinstance(value, str):
        return [item.strip() for item in value.split(",") if item.strip()]
    if isinstance(value, tuple):
        value = list(value)
    if not isinstance(value, list):
        raise _Bad(what)
    return value


def _texts(value: Any, cli: bool) -> list[str]:
    what = "a list of non-empty texts"
    items = _items(value, cli, what)
    if not all(isinstance(item, str) and item.strip() for item in items):
        raise _Bad(what)
    return [item.strip() for item in items]


def _names(value: Any, cli: bool) -> list[str]:
    """Column names: a text (commas separate several) or a list of texts, none repeated."""
    what = "a column name or a non-empty list of distinct column names"
    if isinstance(value, str):
        items: list[Any] = value.split(",")
    else:
        items = _items(value, cli, what)
    if not items or not all(isinstance(item, str) and item.strip() for item in items):
        raise _Bad(what)
    names = [item.strip() for item in items]
    if len(set(names)) != len(names):
        raise _Bad(what)
    return names


def _choices(allowed: tuple[str, ...]) -> Callable[[Any, bool], list[str]]:
    what = f"a list of distinct values among {', '.join(allowed)}"

    def parse(value: Any, cli: bool) -> list[str]:
        items = _items(value, cli, what)
        if not all(isinstance(item, str) and item in allowed for item in items):
            raise _Bad(what)
        if len(set(items)) != len(items):
            raise _Bad(what)
        return list(items)

    return parse


def _column_name(value: Any, cli: bool) -> str:
    if not isinstance(value, str) or not value.strip() or value != value.strip():
        raise _Bad("a column name (non-empty text without surrounding spaces)")
    if "{" in value or "}" in value:
        raise _Bad("a column name without braces")
    return value


def _template(value: Any, cli: bool) -> str:
    what = 'a name template holding {var} and {k}, e.g. "{var}_L{k}"'
    if not isinstance(value, str) or value != value.strip() or "{var}" not in value \
            or "{k}" not in value:
        raise _Bad(what)
    try:
        value.format(var="x", k=1)
    except (KeyError, IndexError, ValueError):
        raise _Bad(what) from None
    return value


def _char(value: Any, cli: bool) -> str:
    if cli and value == "\\t":
        value = "\t"
    if not isinstance(value, str) or len(value) != 1 or value in ('"', "\n", "\r"):
        raise _Bad('one character, e.g. ";" or "\\t"')
    return value


def _severities(value: Any, cli: bool) -> dict[str, str]:
    if not isinstance(value, Mapping):
        raise _Bad("a table of finding id = info, warning or error")
    out = {}
    for finding_id, severity in value.items():
        if finding_id not in FINDING_IDS:
            raise _Bad(f"a table whose keys are finding ids ({', '.join(FINDING_IDS)})")
        if severity not in SEVERITIES:
            raise _Bad("a table of finding id = info, warning or error")
        out[str(finding_id)] = str(severity)
    return out


def _window(value: Any, cli: bool) -> tuple[str | None, str | None]:
    what = 'two period labels as texts, "" for an open end, e.g. ["2010", ""]'
    items = value.split(",") if cli and isinstance(value, str) else _items(value, cli, what)
    if len(items) != 2:
        raise _Bad(what)
    out: list[str | None] = []
    for item in items:
        if isinstance(item, bool) or not isinstance(item, (str, int)):
            raise _Bad(what)
        label = str(item).strip()
        out.append(label or None)
    return out[0], out[1]


_SHIFT = re.compile(r"^\s*([^:]+?)\s*(?::\s*([^:]*?)\s*)?$")


def _shifts(need_k: bool) -> Callable[[Any, bool], list[str]]:
    what = 'a list of "var:k" texts with k a whole number >= 1' + (
        "" if need_k else ' (or "var" for k = 1)'
    )

    def parse(value: Any, cli: bool) -> list[str]:
        items = _items(value, cli, what)
        out = []
        for item in items:
            if not isinstance(item, str):
                raise _Bad(what)
            match = _SHIFT.match(item)
            if match is None:
                raise _Bad(what)
            name, distance = match.group(1), match.group(2)
            if distance is None:
                if need_k:
                    raise _Bad(what)
                out.append(name)
                continue
            if not distance.isdigit() or int(distance) < 1:
                raise _Bad(what)
            out.append(f"{name}:{int(distance)}")
        return out

    return parse


@dataclass(frozen=True)
class _Key:
    kind: str
    parse: Callable[[Any, bool], Any]
    help: str


_KEYS: dict[str, dict[str, _Key]] = {
    "input": {
        "path": _Key("path", _path, "data file; a relative path is read from this file's folder"),
        "format": _Key("`csv`, `parquet`, `arrow`", _choice(FORMATS), "input format"),
        "delimiter": _Key("one character", _char, "CSV field separator"),
        "decimal_comma": _Key("bool", _bool, "CSV numbers use `,` as the decimal mark"),
        "missing_tokens": _Key("list of text", _texts,
                               'texts read as missing in numeric variables, e.g. `["n/a", "-"]`'),
    },
    "panel": {
        "entity": _Key("text or list of text", _names, "entity key column(s)"),
        "time": _Key("text", _text, "time column"),
        "freq": _Key(", ".join(f"`{f}`" for f in FREQUENCIES) + ", `int:K`", _freq,
                     "period frequency; `int:K`: whole-number periods K apart (waves 80, 90: "
                     "`int:10`)"),
    },
    "model": {
        "y": _Key("text", _text, "dependent variable"),
        "x": _Key("list of text", _names, "regressors (at least one)"),
    },
    "contract": {
        "schema": _Key("path", _path, "pandera YAML contract checked before the panel checks"),
        "validate_outputs": _Key("bool", _bool,
                                 "also check the written data files against the contract"),
    },
    "checks": {
        "fail_on": _Key("`error`, `warning`", _choice(FAIL_ON),
                        "lowest severity that fails the gate"),
        "low_within_ratio": _Key("number in [0, 1]", _number(0.0, 1.0, False),
                                 "within SD ratio (within SD / overall SD) below this is reported as thin"),
        "constant_rtol": _Key("number in (0, 1)", _number(0.0, 1.0, True),
                              "constancy tolerance, relative to the variable's largest "
                              "absolute value"),
        "severity": _Key("table of finding id = `info`, `warning`, `error`", _severities,
                         "severity per finding id, replacing the default"),
    },
    "clean": {
        "duplicates": _Key(", ".join(f"`{v}`" for v in DUPLICATES), _choice(DUPLICATES),
                           "what to do with repeated (entity, time) keys"),
        "normalise_ids": _Key(", ".join(f"`{v}`" for v in NORMALISE_IDS), _choice(NORMALISE_IDS),
                              "strip spaces from text ids (`trim-fold` also folds case)"),
        "singletons": _Key("`keep`, `drop`", _choice(SINGLETONS), "drop entities observed once"),
        "balance": _Key(", ".join(f"`{v}`" for v in BALANCE), _choice(BALANCE),
                        "make the panel balanced"),
        "window": _Key('two period labels, `""` for open', _window,
                       "first and last period to keep"),
    },
    "derive": {
        "lag": _Key("list of `var:k`", _shifts(True), "gap-aware lags, k periods back"),
        "lead": _Key("list of `var:k`", _shifts(True), "gap-aware leads, k periods ahead"),
        "diff": _Key("list of `var` or `var:k`", _shifts(False),
                     "gap-aware differences x(t) - x(t-k), k = 1 when absent"),
    },
    "output": {
        "dir": _Key("path", _path,
                    "output folder; a relative path is read from this file's folder"),
        "failed_dir": _Key("path", _path,
                           "folder for a failed gate's diagnostics, replacing an earlier "
                           "failed run's (output.dir is left as it was); a relative path is "
                           "read from this file's folder"),
        "transforms": _Key("list among " + ", ".join(f"`{t}`" for t in TRANSFORMS),
                           _choices(TRANSFORMS), "transformed files to write"),
        "method": _Key(", ".join(f"`{m}`" for m in METHODS), _choice(METHODS),
                       "variance components for theta"),
        "format": _Key("`parquet`, `csv`", _choice(OUTPUT_FORMATS), "format of the data files"),
        "compression": _Key(", ".join(f"`{c}`" for c in PARQUET_COMPRESSIONS),
                            _choice(PARQUET_COMPRESSIONS),
                            "codec of the Parquet files (zstd: the fastest total time at the "
                            "smallest size measured)"),
        "force": _Key("bool", _bool, "replace a non-empty output folder"),
        "evidence": _Key("bool", _bool,
                         "compute the entity-effect, correlated-effects, serial-correlation "
                         "and cross-sectional dependence tests"),
    },
    "engine": {
        "kind": _Key("`local`, `dask`", _choice(ENGINES),
                     "where the preparation runs: in this process, or partition by partition "
                     "on a Dask cluster (`pip install 'panelprep[dask]'`)"),
        "cluster": _Key("text", _text,
                        "address of a running Dask scheduler (`tcp://host:8786`); without it "
                        "the dask engine starts a local cluster sized to the machine and "
                        "closes it"),
        "partitions": _Key("whole number >= 1", _count,
                           "partitions of the shuffle by entity (dask engine)"),
    },
    "names": {
        "row": _Key("text", _column_name,
                    "column of every row-level file holding each row's input row (from 1)"),
        "intercept": _Key("text", _column_name,
                          "quasi file: the 1 - theta column that stands in for the constant"),
        "theta": _Key("text", _column_name, "quasi file: theta of the row's entity"),
        "entity_rows": _Key("text", _column_name,
                            "between file: rows of each entity in the sample"),
        "reason": _Key("text", _column_name, "dropped file: why the row was removed"),
        "step": _Key("text", _column_name, "dropped file: the step that removed the row"),
        "lag": _Key("template", _template, "name of a derived lag, from {var} and {k}"),
        "lead": _Key("template", _template, "name of a derived lead, from {var} and {k}"),
        "diff": _Key("template", _template, "name of a derived difference, from {var} and {k}"),
    },
    "compare": {
        "previous": _Key("path", _path,
                         "previous vintage of the data; the input is compared with it before "
                         "anything is written (findings `vintage-*`, `restated.parquet`); a "
                         "relative path is read from this file's folder"),
        "vars": _Key("list of text", _names, "variables to compare"),
        "rtol": _Key("number in [0, 1]", _number(0.0, 1.0, False),
                     "a cell is restated when abs(new - old) > atol + rtol * abs(old)"),
        "atol": _Key("number in [0, inf]", _number(0.0, math.inf, False),
                     "absolute tolerance of the comparison"),
        "max_restated_share": _Key("number in [0, 1]", _number(0.0, 1.0, False),
                                   "a variable restated in more than this share of its cells "
                                   "fails the gate (`vintage-restated-over-limit`)"),
    },
}

# Defaults shown in the key table where the value itself says little.
_TABLE_DEFAULTS = {
    "input.format": "by extension",
    "input.delimiter": "sniffed",
    "panel.freq": "inferred",
    "contract.schema": "none",
    "output.failed_dir": "`DIR.failed` beside `output.dir`",
    "engine.cluster": "a local cluster",
    "engine.partitions": "automatic",
    "compare.previous": "none",
    "compare.vars": "`model.y` and `model.x`",
    "compare.max_restated_share": "no limit",
}


def _default(dotted: str) -> Any:
    section, key = dotted.split(".")
    return getattr(_SECTIONS[section](), key)


def key_table() -> str:
    """The markdown table of every run-file key (the one in this module's docstring)."""
    lines = ["| key | type | default | meaning |", "|---|---|---|---|"]
    for section, keys in _KEYS.items():
        for name, spec in keys.items():
            dotted = f"{section}.{name}"
            if dotted in REQUIRED:
                shown = "*required*"
            elif dotted in _TABLE_DEFAULTS:
                shown = _TABLE_DEFAULTS[dotted]
            else:
                value = _default(dotted)
                shown = f"`{value if isinstance(value, str) else _toml_value(value)}`"
            help_text = spec.help.replace("this file's folder", "the run file's folder")
            lines.append(f"| `{dotted}` | {spec.kind} | {shown} | {help_text} |")
    return "\n".join(lines)


@dataclass
class RunFile:
    """A parsed run file: one dataclass per section, holding plain values.

    Attributes
    ----------
    input, panel, model, contract, checks, clean, derive, output, engine, names, compare :
        the sections (see the module docstring for every key and default).
    source : the run file read, or None when built in code.
    lines : line of each ``section.key`` in the file, for messages about
        keys checked together (not compared).
    """

    input: InputSection = field(default_factory=InputSection)
    panel: PanelSection = field(default_factory=PanelSection)
    model: ModelSection = field(default_factory=ModelSection)
    contract: ContractSection = field(default_factory=ContractSection)
    checks: ChecksSection = field(default_factory=ChecksSection)
    clean: CleanSection = field(default_factory=CleanSection)
    derive: DeriveSection = field(default_factory=DeriveSection)
    output: OutputSection = field(default_factory=OutputSection)
    engine: EngineSection = field(default_factory=EngineSection)
    names: NamesSection = field(default_factory=NamesSection)
    compare: CompareSection = field(default_factory=CompareSection)
    source: Path | None = None
    lines: dict[str, int] = field(default_factory=dict, compare=False, repr=False)

    def get(self, dotted: str) -> Any:
        """The value of a key given as ``section.key``."""
        section, key = _split_dotted(dotted)
        return getattr(getattr(self, section), key)

    def merged(self, overrides: Mapping[str, Any]) -> RunFile:
        """A copy with command-line values in place of the file's.

        Parameters
        ----------
        overrides : values keyed by ``section.key`` (``{"model.y": "sales"}``);
            None means "not given" and keeps the file's value.  List keys
            also take a comma-separated text.  ``checks.severity`` is merged
            id by id rather than replaced.

        Returns
        -------
        RunFile, checked to hold every required key.

        Raises
        ------
        InputError naming the key and what it allows, or the first required
        key still missing.
        """
        out = copy.deepcopy(self)
        for dotted, value in overrides.items():
            if value is None:
                continue
            section, key = _split_dotted(dotted)
            try:
                parsed = _KEYS[section][key].parse(value, True)
            except _Bad as bad:
                raise InputError(
                    f"command-line value for {dotted} must be {bad.expected}, got {value!r}"
                ) from None
            if dotted == "checks.severity":
                parsed = {**out.checks.severity, **parsed}
            setattr(getattr(out, section), key, parsed)
            out.lines.pop(dotted, None)
        out._require()
        return out

    def _where(self, dotted: str) -> str:
        if self.source is None:
            return ""
        line = self.lines.get(dotted)
        return f"{self.source}:{line}: " if line else f"{self.source}: "

    def _require(self) -> None:
        for dotted in REQUIRED:
            if self.get(dotted) is None:
                section, key = dotted.split(".")
                where = f"{self.source}: " if self.source is not None else ""
                raise InputError(
                    f"{where}{dotted} is required: set {key} under [{section}] "
                    "or give it on the command line"
                )
        if not self.model.x:
            raise InputError(f"{self._where('model.x')}model.x names no regressor")
        if self.model.y in self.model.x:
            raise InputError(f"{self._where('model.x')}model.y {self.model.y!r} "
                             "is also in model.x")
        keys = [*self.panel.entity, self.panel.time]
        if self.panel.time in self.panel.entity:
            raise InputError(f"{self._where('panel.time')}panel.time {self.panel.time!r} "
                             "is also an entity column")
        clash = [v for v in [self.model.y, *self.model.x] if v in keys]
        if clash:
            raise InputError(f"{self._where('model.x')}key column(s) {clash} cannot also be "
                             "model.y or model.x")

    def read_options(self) -> ReadOptions:
        """How to read the input, as ``panelprep.io.ReadOptions``."""
        from panelprep.io import ReadOptions

        return ReadOptions(
            input_format=self.input.format,
            delimiter=self.input.delimiter,
            decimal_comma=self.input.decimal_comma,
            missing_tokens=tuple(self.input.missing_tokens),
        )

    def added_names(self) -> AddedNames:
        """The names of the columns panelprep adds, as ``panelprep.names.AddedNames``."""
        return AddedNames(**{k: getattr(self.names, k) for k in _KEYS["names"]})

    def thresholds(self) -> Thresholds:
        """The limits of the checks, as ``panelprep.checks.Thresholds``."""
        return Thresholds(
            low_within_ratio=self.checks.low_within_ratio,
            constant_rtol=self.checks.constant_rtol,
        )

    def values(self) -> dict[str, Any]:
        """Every key as ``section.key`` -> its value as JSON data (paths as text, lists as lists)."""
        out: dict[str, Any] = {}
        for section, keys in _KEYS.items():
            for key in keys:
                value = self.get(f"{section}.{key}")
                if isinstance(value, Path):
                    value = str(value)
                elif isinstance(value, (list, tuple)):
                    value = list(value)
                elif isinstance(value, Mapping):
                    value = dict(value)
                out[f"{section}.{key}"] = value
        return out

    def to_toml(self, base: str | Path | None = None, header: list[str] | None = None) -> str:
        """The canonical run file: every key in a fixed order, each with a comment.

        Keys without a value (an inferred frequency, no contract) are
        written commented out.  Paths are written as held (absolute after
        ``load_run_file``) or, with ``base``, relative to that folder.
        Loading the text again gives an equal ``RunFile`` (its ``source`` aside).
        ``header`` replaces the title comment.
        """
        values = {f"{s}.{k}": self.get(f"{s}.{k}") for s, keys in _KEYS.items() for k in keys}
        if base is not None:
            for dotted in _PATH_KEYS:
                if values[dotted] is not None:
                    values[dotted] = Path(os.path.relpath(resolved(values[dotted]),
                                                          resolved(base)))
        active = {dotted for dotted, value in values.items() if value is not None}
        title = [f"panelprep run file, canonical form (panelprep {__version__})"]
        return _render(values, active, {}, header or title)


def _split_dotted(dotted: str) -> tuple[str, str]:
    section, _, key = dotted.partition(".")
    if section not in _KEYS or key not in _KEYS[section]:
        raise InputError(f"unknown run-file key {dotted!r}; keys are "
                         + ", ".join(f"{s}.{k}" for s, keys in _KEYS.items() for k in keys))
    return section, key


# --- reading -----------------------------------------------------------------

_BARE_OR_QUOTED = r'(?:[A-Za-z0-9_-]+|"(?:[^"\\]|\\.)*"|\'[^\']*\')'
_HEADER = re.compile(rf"^\s*\[\[?\s*({_BARE_OR_QUOTED}(?:\s*\.\s*{_BARE_OR_QUOTED})*)\s*\]\]?")
_KEY_LINE = re.compile(rf"^\s*({_BARE_OR_QUOTED}(?:\s*\.\s*{_BARE_OR_QUOTED})*)\s*=")
_PART = re.compile(_BARE_OR_QUOTED)


def _key_parts(dotted: str) -> tuple[str, ...]:
    parts = []
    for part in _PART.findall(dotted):
        if part[0] in "\"'":
            part = part[1:-1]
            if part and part[0] != "'":
                part = part.replace('\\"', '"').replace("\\\\", "\\")
        parts.append(part)
    return tuple(parts)


def key_lines(text: str) -> dict[tuple[str, ...], int]:
    """Line (from 1) where each table header and key of a TOML text first appears.

    A light scan, not a parser: it follows ``[table]`` headers and
    ``key =`` lines, skipping multi-line strings, which is enough to point
    at the line of a key that the parsed document shows is wrong.
    """
    found: dict[tuple[str, ...], int] = {}
    table: tuple[str, ...] = ()
    in_string: str | None = None
    for number, line in enumerate(text.splitlines(), start=1):
        if in_string is not None:
            if line.count(in_string) % 2 == 1:
                in_string = None
            continue
        header = _HEADER.match(line)
        if header and not _KEY_LINE.match(line):
            table = _key_parts(header.group(1))
            found.setdefault(table, number)
        else:
            key = _KEY_LINE.match(line)
            if key:
                found.setdefault((*table, *_key_parts(key.group(1))), number)
        for quotes in ('"""', "'''"):
            if line.count(quotes) % 2 == 1:
                in_string = quotes
                break
    return found


def _line_of(lines: dict[tuple[str, ...], int], path: tuple[str, ...]) -> int | None:
    """The line of ``path``, or of its closest enclosing table or key that was found."""
    for end in range(len(path), 0, -1):
        if path[:end] in lines:
            return lines[path[:end]]
    return None


def load_run_file(path: str | Path, overrides: Mapping[str, Any] | None = None) -> RunFile:
    """Read a run file, apply command-line ``overrides`` and check it is complete.

    Parameters
    ----------
    path : the TOML run file.
    overrides : values by ``section.key`` that replace the file's (see
        ``RunFile.merged``); a required key may come from here alone.

    Returns
    -------
    RunFile whose paths from the file are resolved against its folder.

    Raises
    ------
    InputError, one line: the file is absent or not TOML (with the line
    tomllib reports), a section or key is unknown (with its line), a value
    has the wrong type or is not allowed (key, line and what is allowed), or
    a required key is missing.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> _ = (folder / "run.toml").write_text(
    ...     '[input]\\npath = "panel.csv"\\n[panel]\\nentity = "firm"\\ntime = "year"\\n'
    ...     '[model]\\ny = "sales"\\nx = ["capital"]\\n[output]\\ndir = "out"\\n')
    >>> run = load_run_file(folder / "run.toml", {"model.y": "staff"})
    >>> run.model.y, run.input.path == folder.resolve() / "panel.csv"
    ('staff', True)
    """
    source = Path(path)
    text = _read_text(source)
    try:
        document = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        message = " ".join(str(err).split())
        at = re.search(r"line (\d+)", message)
        where = f"{source}:{at.group(1)}" if at else f"{source}"
        raise InputError(f"{where}: not valid TOML: {message}") from None
    lines = key_lines(text)
    run = RunFile(source=source)

    def fail(key_path: tuple[str, ...], message: str) -> InputError:
        line = _line_of(lines, key_path)
        return InputError(f"{source}:{line}: {message}" if line else f"{source}: {message}")

    for section, body in document.items():
        if section not in _KEYS:
            if isinstance(body, dict):
                raise fail((section,), f"unknown section [{section}]; sections are "
                           + ", ".join(f"[{s}]" for s in _KEYS))
            raise fail((section,), f"unknown key {section!r} outside any section; "
                       "put keys under a [section]")
        if not isinstance(body, dict):
            raise fail((section,), f"{section} must be a table: write [{section}] "
                       "and its keys below it")
        for key, value in body.items():
            dotted = f"{section}.{key}"
            if key not in _KEYS[section]:
                raise fail((section, key), f"unknown key {dotted}; [{section}] takes "
                           + ", ".join(_KEYS[section]))
            try:
                parsed = _KEYS[section][key].parse(value, False)
            except _Bad as bad:
                bad_path = (section, key)
                if dotted == "checks.severity" and isinstance(value, dict):
                    wrong = next((k for k in value if k not in FINDING_IDS), None)
                    if wrong is not None:
                        raise fail((section, key, wrong),
                                   f"unknown finding id {wrong!r} in checks.severity; ids are "
                                   + ", ".join(FINDING_IDS)) from None
                    wrong = next(k for k, v in value.items() if v not in SEVERITIES)
                    raise fail((section, key, wrong),
                               f"checks.severity.{wrong} must be one of "
                               f"{', '.join(SEVERITIES)}, got {value[wrong]!r}") from None
                raise fail(bad_path, f"{dotted} must be {bad.expected}, got {_shown(value)}"
                           ) from None
            if dotted in _PATH_KEYS and not parsed.is_absolute():
                parsed = resolved(source.parent / parsed)
            setattr(getattr(run, section), key, parsed)
            line = _line_of(lines, (section, key))
            if line is not None:
                run.lines[dotted] = line
    return run.merged(overrides or {})


def _shown(value: Any) -> str:
    if isinstance(value, dict):
        return "a table"
    if isinstance(value, bool):
        return "true" if value else "false"
    return repr(value)


def _read_text(path: Path) -> str:
    if not path.exists():
        refuse_link_loop(path)
        raise InputError(f"{path}: no such run file")
    if path.is_dir():
        raise InputError(f"{path}: is a directory, expected a run file")
    try:
        raw = path.read_bytes()
    except OSError as err:
        raise InputError(f"{path}: cannot read the run file: {err.strerror}") from None
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        line = raw[: err.start].count(b"\n") + 1
        raise InputError(f"{path}:{line}: the run file is not UTF-8 text") from None


# --- writing -----------------------------------------------------------------


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(float(value)) if isinstance(value, float) else str(value)
    if isinstance(value, Path):
        value = value.as_posix()
    if isinstance(value, str):
        # JSON strings are TOML basic strings, once DEL (allowed raw in JSON) is escaped
        return json.dumps(value, ensure_ascii=False).replace("\x7f", "\\u007f")
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value("" if v is None else v) for v in value) + "]"
    if isinstance(value, Mapping):
        inner = ", ".join(f"{k} = {_toml_value(v)}" for k, v in value.items())
        return "{" + (f" {inner} " if inner else "") + "}"
    raise TypeError(f"cannot write {value!r} as TOML")


def _assignment(dotted: str, value: Any) -> str:
    key = dotted.split(".")[1]
    if dotted == "panel.entity" and isinstance(value, list) and len(value) == 1:
        value = value[0]
    return f"{key} = {_toml_value(value)}"


_EXAMPLES = {
    "input.path": "data.csv",
    "input.format": "csv",
    "input.delimiter": ";",
    "panel.entity": "firm_id",
    "panel.time": "year",
    "panel.freq": "year",
    "model.y": "sales",
    "model.x": ["capital"],
    "output.dir": "prepared",
    "output.failed_dir": "prepared.failed",
    "contract.schema": "schemas/firm_year.yaml",
    "checks.severity": {"period-holes": "error"},
    "engine.cluster": "tcp://scheduler:8786",
    "engine.partitions": 16,
    "compare.previous": "previous.parquet",
    "compare.vars": ["sales", "capital"],
    "compare.max_restated_share": 0.01,
}


def _render(values: dict[str, Any], active: set[str], notes: dict[str, str],
            header: list[str]) -> str:
    """TOML text of ``values``: keys in ``active`` set, the others commented out.

    ``notes`` adds a trailing comment to a key's line (the starter's
    ``# guessed`` marks).
    """
    out = [f"# {line}" if line else "#" for line in header]
    for section, keys in _KEYS.items():
        out += ["", f"[{section}]"]
        for key, spec in keys.items():
            dotted = f"{section}.{key}"
            if dotted == "checks.severity":
                continue
            value = values.get(dotted)
            out.append(f"# {_plain(spec.help)} [{_plain(spec.kind)}]")
            shown = value if value is not None else _EXAMPLES.get(dotted)
            line = _assignment(dotted, shown)
            if dotted in notes:
                line += f"  # {notes[dotted]}"
            out.append(line if dotted in active else f"# {line}")
        if section == "checks":
            severity = values.get("checks.severity") or {}
            text = (_plain(_KEYS["checks"]["severity"].help) + " (info, warning or error); ids: "
                    + ", ".join(FINDING_IDS))
            out += [""] + [f"# {line}" for line in textwrap.wrap(text, 92, break_on_hyphens=False)]
            shown_map = severity or _EXAMPLES["checks.severity"]
            on = "checks.severity" in active and bool(severity)
            prefix = "" if on else "# "
            out.append(f"{prefix}[checks.severity]")
            out += [f"{prefix}{k} = {_toml_value(v)}" for k, v in shown_map.items()]
    return "\n".join(out) + "\n"


def _plain(text: str) -> str:
    return text.replace("`", "")


__all__ = [
    "EXTRA_FINDING_IDS", "FINDING_IDS", "REQUIRED", "RunFile", "key_lines", "key_table",
    "load_run_file",
]
