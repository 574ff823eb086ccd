"""The names of the columns panelprep adds to the output files, and their roles.

Every column the tool adds (the input row, the quasi file's intercept and
theta, the between file's rows per entity, the ledger's reason and step, the
derived lags, leads and differences) takes its name from ``AddedNames``, the
one place to change a default.  The run file's ``[names]`` section renames
them per run.  Before any data is read, ``check_added_names`` compares them
with the input's column names (known from the header or schema) and with each
other, so an output file can never hold two columns of one name.

Rows are numbered the same way everywhere (finding examples, error messages,
``dropped``, ``clean`` and every other row-level file): data rows of the
input counted from 1, the header not counted.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, fields

from panelprep.errors import InputError

# Roles of the columns of an output file, written into its metadata.
ROLE_KEY = "key"                # entity or time column, as read
ROLE_RESPONSE = "response"      # the dependent variable
ROLE_REGRESSOR = "regressor"    # an explanatory variable
ROLE_INTERCEPT = "intercept"    # stands in for the constant (quasi: 1 - theta_i); add none
ROLE_WEIGHT = "weight"          # rows behind each entity (between), for a weighted fit
ROLE_AUXILIARY = "auxiliary"    # provenance or a parameter, never a regressor
ROLES = (ROLE_KEY, ROLE_RESPONSE, ROLE_REGRESSOR, ROLE_INTERCEPT, ROLE_WEIGHT, ROLE_AUXILIARY)

ROW_CONVENTION = "data rows of the input counted from 1; the header is not a row"

# The templates of derived columns take the source variable and the distance.
TEMPLATE_FIELDS = ("lag", "lead", "diff")


@dataclass(frozen=True)
class AddedNames:
    """Names of the columns panelprep adds; the run file's ``[names]`` keys.

    row : every row-level file (clean, within, quasi, twoway, dropped): the
        input row of each row, counted from 1 over data rows.
    intercept : quasi: 1 - theta_i, the regressor in place of the constant.
    theta : quasi: theta_i of the row's entity.
    entity_rows : between: rows of the entity in the estimation sample.
    reason, step : dropped: why and in which step a row was removed.
    lag, lead, diff : templates of derived columns, with ``{var}`` and ``{k}``.
    """

    row: str = "pp_row"
    intercept: str = "pp_intercept"
    theta: str = "pp_theta"
    entity_rows: str = "pp_rows"
    reason: str = "pp_reason"
    step: str = "pp_step"
    lag: str = "{var}_lag{k}"
    lead: str = "{var}_lead{k}"
    diff: str = "{var}_diff{k}"

    def derived(self, kind: str, variable: str, k: int) -> str:
        """The name of a derived column: ``derived("lag", "sales", 1)`` is ``sales_lag1``."""
        return getattr(self, kind).format(var=variable, k=k)

    def validate(self) -> None:
        """Raise when a name is blank or a template lacks ``{var}`` or ``{k}``."""
        for spec in fields(self):
            value = getattr(self, spec.name)
            if not isinstance(value, str) or not value.strip() or value != value.strip():
                raise InputError(f"names.{spec.name} must be a non-empty name without "
                                 f"surrounding spaces, got {value!r}")
            if spec.name in TEMPLATE_FIELDS:
                if "{var}" not in value or "{k}" not in value:
                    raise InputError(f"names.{spec.name} {value!r} must contain {{var}} and {{k}}, "
                                     'e.g. "{var}_' + spec.name + '{k}"')
                try:
                    value.format(var="x", k=1)
                except (KeyError, IndexError, ValueError):
                    raise InputError(f"names.{spec.name} {value!r}: only {{var}} and {{k}} may "
                                     "appear in braces") from None
            elif "{" in value or "}" in value:
                raise InputError(f"names.{spec.name} {value!r} is a column name, not a template")


DEFAULT_NAMES = AddedNames()

# What each added column is, for messages.
_DESCRIBED = {
    "row": "input-row column (every row-level file)",
    "intercept": "intercept column (quasi file)",
    "theta": "theta column (quasi file)",
    "entity_rows": "rows-per-entity column (between file)",
    "reason": "reason column (dropped file)",
    "step": "step column (dropped file)",
}


# What each added column holds, written beside its role in every file's column list
# (``files[].columns`` and the Parquet metadata), keyed by AddedNames field.
MEANINGS = {
    "row": "the row's data row in the input, counted from 1 (header excluded)",
    "intercept": "1 - theta_i of the row's entity: the regressor that takes the place of the "
                 "constant in a fit on the quasi file; add no column of ones beside it",
    "theta": "theta_i of the row's entity, the share of its entity mean the quasi file "
             "subtracted",
    "entity_rows": "rows of the entity in the sample, for a fit weighted by rows per entity",
    "reason": "why the row was removed (a reason id)",
    "step": "the step that removed the row",
}


def added_columns(names: AddedNames, transforms: Iterable[str]) -> dict[str, str]:
    """``{field: column name}`` of the columns a run with these transforms adds."""
    wanted = set(transforms)
    out = {"row": names.row, "reason": names.reason, "step": names.step}
    if "quasi" in wanted:
        out.update(intercept=names.intercept, theta=names.theta)
    if "between" in wanted:
        out["entity_rows"] = names.entity_rows
    return out


def check_added_names(
    input_columns: Sequence[str],
    names: AddedNames,
    transforms: Iterable[str],
    derived: Sequence[tuple[str, str, str]] = (),
    source: str = "the input",
) -> None:
    """Refuse a run whose added columns would share a name with another column.

    Parameters
    ----------
    input_columns : every column name of the input (header or schema).
    names : the added names in force.
    transforms : the transforms the run writes (only their columns count).
    derived : ``(name, option, kind)`` of each derived column, e.g.
        ``("sales_lag1", "--lag sales:1", "lag")``.
    source : how to name the input in the message (its path).

    Raises
    ------
    InputError, one line listing every clash: both columns, and the
    ``names.*`` run-file key (or ``--names`` item) that renames ours.
    """
    present = set(input_columns)
    clashes: list[str] = []
    taken: dict[str, str] = {}

    def rename(key: str) -> str:
        return f"rename ours with names.{key} in the run file or --names {key}=NEW"

    for made, option, kind in derived:
        if made in present:
            clashes.append(
                f"{source} has a column {made!r} and {option} would create another: "
                f"{rename(kind)} (e.g. names.{kind} = \"{{var}}_{kind}_{{k}}\"), or drop "
                f"{option} to use the file's column")
        elif taken.get(made) == f"the column {option} creates":
            clashes.append(f"{option} is given twice: give it once")
        elif made in taken:
            clashes.append(f"{option} would create {made!r}, already {taken[made]}: "
                           f"{rename(kind)}")
        else:
            taken[made] = f"the column {option} creates"
    for key, column in added_columns(names, transforms).items():
        ours = f"panelprep's {_DESCRIBED[key]}"
        if column in present:
            clashes.append(f"{source} has a column {column!r} and {ours} is named {column!r} "
                           f"too: {rename(key)}")
        elif column in taken:
            clashes.append(f"{ours} is named {column!r}, already {taken[column]}: "
                           f"{rename(key)}")
        else:
            taken[column] = f"the name of {ours}"
    if clashes:
        raise InputError("column names clash (each column of the output files needs a name of "
                         "its own): " + "; ".join(clashes))
