"""Schema contracts: a pandera schema, written in YAML, that a frame must satisfy.

A contract states what the data provider promised (column types, allowed
ranges, patterns, nulls) apart from the panel's structure.  It is checked
before the panel checks, and optionally on the written outputs; every
failing (column, check) pair becomes one ``contract-check-failed`` finding,
so a broken promise goes through the same gate as any other finding.

``load_contract`` is strict about the file (a typo in a setting is an error,
not a silently ignored key); ``check_contract`` never raises on bad data.
"""

from __future__ import annotations

from collections.abc import Hashable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import yaml

from panelprep._paths import refuse_link_loop
from panelprep.errors import InputError
from panelprep.findings import CONTRACT_FINDING_ID, MAX_EXAMPLES, Finding

try:
    import pandera.pandas as pa
except ImportError:  # pandera before 0.24 exposed the pandas API at the top level
    import pandera as pa  # type: ignore[no-redef]
import pandera.errors

try:
    from pandera.io.pandas_io import deserialize_schema
except ImportError:  # pandera before 0.26 kept the pandas serialisers in pandera.io
    from pandera.io import deserialize_schema  # type: ignore[attr-defined,no-redef]

FINDING_ID = CONTRACT_FINDING_ID

# Settings pandera reads from a schema file; anything else is a typo that
# pandera would silently ignore.
_SCHEMA_KEYS = frozenset({
    "schema_type", "version", "api", "dataframe_library", "columns", "checks", "index",
    "multiindex", "dtype", "coerce", "strict", "name", "ordered", "unique", "report_duplicates",
    "unique_column_names", "add_missing_columns", "title", "description", "metadata",
    "drop_invalid_rows",
})
_COLUMN_KEYS = frozenset({
    "dtype", "checks", "nullable", "unique", "coerce", "required", "regex", "default",
    "report_duplicates", "drop_invalid_rows", "name", "title", "description", "metadata",
})


def load_contract(path: str | Path) -> pa.DataFrameSchema:
    """Read a pandera ``DataFrameSchema`` from a YAML file.

    Parameters
    ----------
    path : the YAML contract (see ``schemas/README.md``).

    Returns
    -------
    pandera DataFrameSchema.

    Raises
    ------
    InputError, one line naming the file: absent or unreadable, not YAML
    (with the line), a setting pandera does not know (with its line), an
    unknown check, a bad dtype or bad check arguments.
    """
    source = Path(path)
    if not source.is_file():
        refuse_link_loop(source)
        raise InputError(f"{source}: no such contract file")
    try:
        text = source.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as err:
        raise InputError(f"{source}: cannot read the contract: {_short(err)}") from None
    try:
        node = yaml.compose(text, Loader=yaml.SafeLoader)
        document = yaml.safe_load(text)
    except yaml.YAMLError as err:
        mark = getattr(err, "problem_mark", None)
        where = f"{source}:{mark.line + 1}" if mark is not None else f"{source}"
        problem = getattr(err, "problem", None) or _short(err)
        raise InputError(f"{where}: not valid YAML: {problem}") from None
    _check_settings(source, document, node)
    try:
        return deserialize_schema(document)
    except AttributeError as err:
        raise InputError(f"{source}: not a valid contract: unknown check or setting "
                         f"({_short(err)})") from None
    except (pandera.errors.SchemaDefinitionError, pandera.errors.SchemaInitError, TypeError,
            ValueError, KeyError) as err:
        raise InputError(f"{source}: not a valid contract: {_short(err)}") from None


def _check_settings(source: Path, document: Any, node: yaml.Node | None) -> None:
    """Reject what pandera would ignore or crash on, naming the line."""
    if not isinstance(document, dict):
        raise InputError(f"{source}: not a valid contract: expected a mapping with 'columns', "
                         f"found {type(document).__name__}")
    unknown = [k for k in document if k not in _SCHEMA_KEYS]
    if unknown:
        raise InputError(f"{source}:{_line(node, unknown[0])}: not a valid contract: unknown "
                         f"setting {unknown[0]!r}; settings are {', '.join(sorted(_SCHEMA_KEYS))}")
    columns = document.get("columns")
    if not isinstance(columns, dict) or not columns:
        raise InputError(f"{source}:{_line(node, 'columns')}: not a valid contract: 'columns' "
                         "must map column names to their settings")
    columns_node = _child(node, "columns")
    for name, settings in columns.items():
        if settings is None:
            # pandera cannot read an empty column entry; it means "any values" here
            columns[name] = {}
            continue
        if not isinstance(settings, dict):
            raise InputError(f"{source}:{_line(columns_node, name)}: not a valid contract: "
                             f"column {name!r} must map settings (dtype, checks, nullable...)")
        for key in settings:
            if key in _COLUMN_KEYS or callable(getattr(pa.Check, str(key), None)):
                continue
            raise InputError(
                f"{source}:{_line(_child(columns_node, name), key)}: not a valid contract: "
                f"column {name!r} has unknown setting {key!r}; settings are "
                f"{', '.join(sorted(_COLUMN_KEYS))} or a check name"
            )


def _child(node: yaml.Node | None, key: Hashable) -> yaml.Node | None:
    if not isinstance(node, yaml.MappingNode):
        return None
    for key_node, value_node in node.value:
        if key_node.value == str(key):
            return value_node
    return None


def _line(node: yaml.Node | None, key: Hashable) -> int:
    """Line (from 1) of ``key`` inside a mapping node, else of the node itself."""
    if isinstance(node, yaml.MappingNode):
        for key_node, _ in node.value:
            if key_node.value == str(key):
                return key_node.start_mark.line + 1
    return node.start_mark.line + 1 if node is not None else 1


def _nan_as_null(frame: pd.DataFrame) -> pd.DataFrame:
    """``frame`` with Arrow float columns as float64, so a stored NaN is null to the contract.

    ``io.read_frame`` keeps a Parquet float column holding NaN in Arrow's
    type, where NaN is not null; the panel reads NaN as missing, and so does
    the contract (as it does for the text ``nan`` in a CSV).
    """
    arrow = [name for name, dtype in frame.dtypes.items()
             if isinstance(dtype, pd.ArrowDtype) and pd.api.types.is_float_dtype(dtype)]
    if not arrow:
        return frame
    out = frame.copy()
    for name in arrow:
        out[name] = frame[name].to_numpy(dtype=np.float64, na_value=np.nan)
    return out


def check_contract(
    frame: pd.DataFrame, schema: pa.DataFrameSchema, where: str = "input"
) -> list[Finding]:
    """Validate ``frame`` against a contract and report each failing (column, check).

    Validation is lazy, so every failure is collected; ``frame`` is not
    changed (a schema that coerces works on pandera's copy).

    Parameters
    ----------
    frame : the data to check.
    schema : a contract from ``load_contract`` (or any pandas DataFrameSchema).
    where : what the frame is (``input``, or an output file's name), shown in
        the messages and details.

    Returns
    -------
    One ``contract-check-failed`` finding, severity ``error``, per failing
    (column, check) pair, in pandera's report order.  ``count`` is the number
    of failure cases (rows, or 1 for a failure of the whole column such as a
    wrong dtype or an absent column); ``examples`` are up to 10 dicts
    ``{column, check, row, value}`` where ``row`` counts data rows from 1 when
    the index is the default positional one, else is the index label (None
    for whole-column failures); ``details`` are ``{column, check, where}``.
    An empty list when the frame satisfies the contract.

    Raises
    ------
    InputError only when the schema itself cannot be applied.
    """
    try:
        schema.validate(_nan_as_null(frame), lazy=True)
    except pandera.errors.SchemaErrors as err:
        cases = err.failure_cases
    except pandera.errors.SchemaError as err:
        cases = _single_case(err)
    except pandera.errors.SchemaDefinitionError as err:
        raise InputError(f"the contract cannot be applied to the {where}: {_short(err)}") from None
    else:
        return []
    return _findings(cases, frame.index, where)


def _single_case(err: pandera.errors.SchemaError) -> pd.DataFrame:
    failure = err.failure_cases
    column = getattr(err.schema, "name", None)
    check = str(err.check) if err.check is not None else (err.reason_code or "schema")
    if isinstance(failure, pd.DataFrame) and {"failure_case", "index"} <= set(failure.columns):
        rows = failure[["failure_case", "index"]].copy()
    else:
        rows = pd.DataFrame({"failure_case": [failure], "index": [None]})
    rows.insert(0, "check", check)
    rows.insert(0, "column", column)
    return rows


def _findings(cases: pd.DataFrame, index: pd.Index, where: str) -> list[Finding]:
    cases = cases.reset_index(drop=True)
    column = cases["column"].astype(object)
    check = cases["check"].astype(object).where(cases["check"].notna(), "schema").astype(str)
    # A column absent from the frame is reported with no column, the name as the case.
    absent = column.isna() & (check == "column_in_dataframe")
    column = column.where(~absent, cases["failure_case"].astype(object))
    column = column.where(column.notna(), None)
    keys = pd.DataFrame({"column": column.map(lambda c: "" if c is None else str(c)),
                         "check": check})
    positional = isinstance(index, pd.RangeIndex) and index.start == 0 and index.step == 1
    findings = []
    # one group per (column, check): bounded by the contract's size, not the data's
    for (name, check_name), group in keys.groupby(["column", "check"], sort=False):
        rows = group.index.to_numpy()
        shown = rows[:MAX_EXAMPLES]
        label = name or None
        examples = [
            {
                "column": label,
                "check": check_name,
                "row": _row(cases["index"].iat[i], positional),
                "value": None if absent.iat[i] else _plain(cases["failure_case"].iat[i]),
            }
            for i in shown
        ]
        subject = f"column {label!r}" if label is not None else "the table"
        findings.append(Finding(
            id=FINDING_ID,
            severity="error",
            count=len(rows),
            message=f"{where}: {subject} fails contract check {check_name} "
                    f"({len(rows)} case{'s' if len(rows) != 1 else ''})",
            examples=examples,
            details={"column": label, "check": check_name, "where": where},
        ))
    return findings


def _row(label: Any, positional: bool) -> Any:
    if label is None or (not isinstance(label, (tuple, list)) and pd.isna(label)):
        return None
    if positional and isinstance(label, (int, np.integer)):
        return int(label) + 1
    if isinstance(label, tuple):
        return [_plain(part) for part in label]
    return _plain(label)


def _plain(value: Any) -> Any:
    """A JSON-friendly scalar: numpy numbers become Python numbers, missing becomes None."""
    if value is None:
        return None
    if isinstance(value, (list, tuple, dict, set)):
        return str(value)
    try:
        if pd.isna(value):
            return None
    except (TypeError, ValueError):
        return str(value)
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        number = float(value)
        return number if np.isfinite(number) else str(number)
    if isinstance(value, str):
        return value
    if isinstance(value, pd.Timestamp):
        return value.isoformat()
    return str(value)


def _short(err: BaseException) -> str:
    text = " ".join(str(err).split())
    return text if len(text) <= 200 else text[:197] + "..."
