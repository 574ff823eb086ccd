"""Checks on the variables: text in numbers, missing values, variation within and across."""

from __future__ import annotations

import re

import numpy as np
import pandas as pd

from panelprep._groups import group_counts
from panelprep.checks.base import FIRST_VALUES, Check, check, examples_of, tallied
from panelprep.checks.context import AuditContext
from panelprep.checks.shape import entity_ranks
from panelprep.findings import MAX_EXAMPLES
from panelprep.words import plural, plural_word


def not_numeric_tally(ctx: AuditContext) -> dict:
    """Values that are not numbers, per variable (all listed): the count and the first
    ``FIRST_VALUES`` bad values with their input rows, in row order."""
    per_variable = {}
    for name in ctx.variables:
        problem = ctx.non_numeric.get(name)
        rows = problem.rows if problem is not None else np.zeros(0, dtype=np.int64)
        if len(rows) == 0:
            # (a column without bad values may have left the frame: its float block is taken)
            per_variable[name] = {"rows": 0, "firsts": [], "texts": {}}
            continue
        first = rows[:FIRST_VALUES]
        values = ctx.frame[name].iloc[first]
        texts = ctx.frame[name].iloc[rows].astype(str).to_numpy()
        codes, uniques = pd.factorize(texts)
        counts = np.bincount(codes, minlength=len(uniques))
        first_rows = ctx.input_rows(rows[np.unique(codes, return_index=True)[1]])
        per_variable[name] = {
            "rows": len(rows),
            "firsts": [((int(row),), str(value))
                       for row, value in zip(ctx.input_rows(first), values)],
            # every distinct text: rows holding it and its first row (merged by text)
            "texts": {str(text): {"count": int(c), "row_min": int(r)}
                      for text, c, r in zip(uniques, counts, first_rows)}}
    return {"decimal_comma": "yes" if ctx.decimal_comma else "", "per_variable": per_variable}


def not_numeric_finding(self: Check, tally: dict):
    bad = {name: t for name, t in tally["per_variable"].items() if t["rows"]}
    if not bad:
        return None
    # the distinct values among the first bad rows, at most 10 (NonNumeric.values)
    shown = {name: list(dict.fromkeys(v for _, v in t["firsts"]))[:10] for name, t in bad.items()}
    total = sum(t["rows"] for t in bad.values())
    examples = []
    for name, t in bad.items():
        # one example per distinct text: how many rows hold it (count) and the first (row)
        texts = sorted(t["texts"].items(), key=lambda item: item[1]["row_min"])[:MAX_EXAMPLES]
        examples += [{"column": name, "value": text, "count": seen["count"],
                      "row": seen["row_min"]} for text, seen in texts]
    details = {name: {"rows": t["rows"], "values": shown[name]} for name, t in bad.items()}
    names = ", ".join(f"{n} ({t['rows']})" for n, t in bad.items())
    every = [v for values in shown.values() for v in values]
    return self.finding(
        total,
        f"{plural(total, 'value')} that {plural_word(total, 'is')} not a number in {names}; e.g. "
        + ", ".join(repr(v) for values in shown.values() for v in values[:3])
        + f" ({'; '.join(_hints(every, bool(tally['decimal_comma'])))})",
        examples,
        details,
    )


not_numeric = tallied("values-not-numeric", "error",
                      "text, infinities or whole numbers beyond 2^53 in a variable "
                      "that should be numeric",
                      not_numeric_tally, not_numeric_finding)


_LONG_INTEGER = re.compile(r"^\s*[-+]?\d{16,}\s*$")
_COMMA_NUMBER = re.compile(r"^\s*[-+]?\d*,\d+\s*$")
_NOT_FINITE = re.compile(r"^\s*[-+]?(inf|infinity)\s*$", re.IGNORECASE)


def _beyond_float(value: str) -> bool:
    try:
        return np.isinf(float(value.replace(",", ".")))
    except ValueError:
        return False


def _hints(values: list[str], decimal_comma: bool) -> list[str]:
    """What to do about the kinds of bad value seen, most specific first."""
    hints = []
    if any(_LONG_INTEGER.match(v) for v in values):
        hints.append("whole numbers beyond 2^53 cannot be held exactly as float64")
    if any(_NOT_FINITE.match(v) for v in values):
        hints.append("infinite values are not usable numbers")
    elif any(_beyond_float(v) for v in values):
        hints.append("magnitudes beyond about 1.8e308 do not fit float64: rescale")
    if not decimal_comma and any(_COMMA_NUMBER.match(v) for v in values):
        hints.append("if ',' is the decimal mark, use --decimal-comma")
    hints.append("declare tokens that mean missing with --missing-token")
    return hints


def declared_missing_tally(ctx: AuditContext) -> dict:
    """Values read as missing because they were declared so, per variable (all listed)."""
    problems = ctx.non_numeric
    # the tokens as the message writes them (a text is kept as is by merge_tallies)
    return {"tokens": str(list(ctx.missing_tokens)),
            "per_variable": {name: problems[name].read_as_missing if name in problems else 0
                             for name in ctx.variables}}


def declared_missing_finding(self: Check, tally: dict):
    hits = {name: count for name, count in tally["per_variable"].items() if count}
    if not hits:
        return None
    total = sum(hits.values())
    return self.finding(
        total,
        f"{plural(total, 'value')} matching declared missing tokens {tally['tokens']} "
        f"{plural_word(total, 'was')} read as missing",
        [{"column": name, "rows": count} for name, count in hits.items()],
        {"per_variable": hits},
    )


declared_missing = tallied("values-declared-missing", "info", "texts read as missing because they were declared so",
                           declared_missing_tally, declared_missing_finding)


def nan_missing_tally(ctx: AuditContext) -> dict:
    """NaN values read as missing per variable (all listed); examples by variable, then row."""
    problems = ctx.non_numeric
    per_variable, examples = {}, []
    for j, name in enumerate(ctx.variables):
        rows = problems[name].nan_rows if name in problems else np.zeros(0, dtype=np.int64)
        per_variable[name] = len(rows)
        examples += [((j, int(row)), {"column": name, "row": int(row)})
                     for row in ctx.input_rows(rows[:MAX_EXAMPLES])]
    return {"per_variable": per_variable, "examples": examples[:MAX_EXAMPLES]}


def nan_missing_finding(self: Check, tally: dict):
    hits = {name: count for name, count in tally["per_variable"].items() if count}
    if not hits:
        return None
    total = sum(hits.values())
    names = ", ".join(f"{name} ({count})" for name, count in hits.items())
    return self.finding(
        total,
        f"{plural(total, 'NaN value')} read as missing in {names}; NaN is often the result of a failed "
        "computation (0/0) upstream rather than a value never observed: check where it comes "
        "from (--severity values-nan-missing=info when NaN is how the source writes missing)",
        examples_of(tally),
        {"per_variable": hits},
    )


nan_missing = tallied("values-nan-missing", "warning",
                      "NaN values (the text nan in CSV, NaN stored in a Parquet or Arrow float column) "
                      "read as missing",
                      nan_missing_tally, nan_missing_finding)


def decimal_rounded_tally(ctx: AuditContext) -> dict:
    """Decimals float64 does not hold exactly, per variable (all listed, with the column's
    type); examples by variable, then row."""
    per_variable, examples = {}, []
    for j, name in enumerate(ctx.variables):
        problem = ctx.non_numeric.get(name)
        rows = problem.rounded_rows if problem is not None else np.zeros(0, dtype=np.int64)
        per_variable[name] = {"rows": len(rows), "type": ""}
        if len(rows) == 0:
            continue
        # (a column holding rounded decimals keeps its values in the frame)
        per_variable[name]["type"] = str(ctx.frame[name].dtype.pyarrow_dtype)
        shown = rows[:MAX_EXAMPLES]
        for row, number in zip(shown, ctx.input_rows(shown)):
            examples.append(((j, int(number)), {
                "column": name, "row": int(number),
                "value": str(ctx.frame[name].iloc[int(row)]),
                "read_as": repr(float(ctx.values[int(row), j]))}))
    return {"per_variable": per_variable, "examples": examples[:MAX_EXAMPLES]}


def decimal_rounded_finding(self: Check, tally: dict):
    hits = {name: t for name, t in tally["per_variable"].items() if t["rows"]}
    if not hits:
        return None
    total = sum(t["rows"] for t in hits.values())
    examples = examples_of(tally)
    names = ", ".join(f"{name} ({t['rows']}, {t['type']})" for name, t in hits.items())
    first = examples[0]
    return self.finding(
        total,
        f"{total} decimal value(s) in {names} have more digits than float64 holds, so every "
        f"computation uses the nearest float64 (e.g. row {first['row']}: {first['value']} is "
        f"read as {first['read_as']}); round or rescale the column upstream if those digits "
        "matter",
        examples,
        {"per_variable": {name: t["rows"] for name, t in hits.items()}},
    )


decimal_rounded = tallied("values-decimal-rounded", "warning",
                          "decimals (Parquet or Arrow decimal columns) that float64 does not hold exactly",
                          decimal_rounded_tally, decimal_rounded_finding)


def listwise_tally(ctx: AuditContext) -> dict:
    """Missing cells per variable and what listwise deletion removes, with ranked examples."""
    if not ctx.variables:
        return {"variables": 0}
    # kept for the report's picture of missing cells, before the block may be released
    ctx.missing_by_period  # noqa: B018
    base, values = ctx.base, ctx.values
    # column by column: no copy of the block, one count of missing cells per row
    per_row = np.zeros(len(base), dtype=np.int32)
    per_variable = {}
    for j, name in enumerate(ctx.variables):
        absent = np.isnan(values[:, j])
        absent &= base
        per_variable[name] = int(np.count_nonzero(absent))
        per_row += absent
    # rows where a column is the only one missing: what dropping that column alone would keep
    alone = per_row == 1
    only_missing = {name: int(np.count_nonzero(np.isnan(values[:, j]) & alone))
                    for j, name in enumerate(ctx.variables)}
    codes = ctx.index.entity_codes
    n = ctx.index.n_entities
    before = group_counts(codes[base], n)
    after = group_counts(codes[ctx.sample], n)
    new_single = np.flatnonzero((before >= 2) & (after == 1))
    shown = new_single[:MAX_EXAMPLES]
    return {
        "variables": 1,
        "per_variable": per_variable,
        "only_missing": only_missing,
        "rows_lost": int(np.count_nonzero(per_row)),
        "rows_removed": int(base.sum() - ctx.sample.sum()),
        "entities_lost": int(((before > 0) & (after == 0)).sum()),
        "new_singletons": len(new_single),
        "new_singleton_keys": [(rank, {"entity": key}) for rank, key in
                               zip(entity_ranks(ctx.index, shown), ctx.index.entity_key(shown))],
    }


def _listwise(tally: dict) -> dict:
    return {"rows_removed": tally["rows_removed"], "entities_lost": tally["entities_lost"],
            "new_singletons": tally["new_singletons"],
            "new_singleton_keys": [e["entity"] for e in
                                   examples_of(tally, "new_singleton_keys")]}


def missing_values_finding(self: Check, tally: dict):
    if not tally["variables"] or tally["rows_lost"] == 0:
        return None
    rows_lost, per_variable = tally["rows_lost"], tally["per_variable"]
    only_missing = tally["only_missing"]
    lost = _listwise(tally)
    worst = sorted((n for n in per_variable if per_variable[n]), key=lambda n: -per_variable[n])
    return self.finding(
        rows_lost,
        f"{plural(rows_lost, 'row')} {'misses' if rows_lost == 1 else 'miss'} at least one "
        f"selected variable; listwise deletion removes {'it' if rows_lost == 1 else 'them'}, "
        f"{plural(lost['entities_lost'], 'entity')} entirely and makes "
        f"{plural(lost['new_singletons'], 'new singleton')}; most often missing: "
        + ", ".join(f"{n} ({per_variable[n]}, {only_missing[n]} alone)" for n in worst[:3]),
        [{"column": name, "missing": count} for name, count in per_variable.items() if count],
        {"per_variable": per_variable, "only_missing": only_missing, **lost},
    )


missing_values = tallied("values-missing", "info", "missing values per variable and what listwise deletion removes",
                         listwise_tally, missing_values_finding)


def new_singletons_finding(self: Check, tally: dict):
    if not tally["variables"] or tally["new_singletons"] == 0:
        return None
    lost = _listwise(tally)
    return self.finding(
        lost["new_singletons"],
        f"listwise deletion leaves {plural(lost['new_singletons'], 'entity')} with a single "
        "row that had two or more before",
        [{"entity": key} for key in lost["new_singleton_keys"]],
    )


new_singletons = tallied("sample-new-singletons", "warning", "entities that listwise deletion leaves with one row",
                         listwise_tally, new_singletons_finding)


@check("var-fixed-within", "warning", "variables with no variation within any entity")
def time_invariant(ctx: AuditContext, self: Check):
    names = [n for n, row in ctx.variation.items() if row["time_invariant"]]
    if not names:
        return None
    return self.finding(
        len(names),
        f"{plural(len(names), 'variable')} never {'changes' if len(names) == 1 else 'change'} "
        f"within an entity; a within transform wipes {'it' if len(names) == 1 else 'them'} "
        f"out: {', '.join(names)}",
        [{"variable": n} for n in names],
    )


@check("var-thin-within", "info", "variables whose within SD ratio (within SD / overall SD) is small")
def low_within(ctx: AuditContext, self: Check):
    limit = ctx.thresholds.low_within_ratio
    thin = []
    for name, row in ctx.variation.items():
        ratio = row["within_sd_ratio"]
        if row["time_invariant"] or ratio is None:
            continue
        if ratio < limit:
            thin.append({"variable": name, "within_sd_ratio": ratio})
    if not thin:
        return None
    return self.finding(
        len(thin),
        f"{plural(len(thin), 'variable')} {plural_word(len(thin), 'varies')} little within "
        "entities (within SD ratio = within SD / "
        f"overall SD < {limit:g}); within estimates of their slopes will be imprecise",
        thin,
    )


@check("var-fixed-per-period", "info", "variables constant within every period")
def period_invariant(ctx: AuditContext, self: Check):
    names = [n for n, row in ctx.variation.items() if row["period_invariant"]]
    if not names:
        return None
    return self.finding(
        len(names),
        f"{plural(len(names), 'variable')} {plural_word(len(names), 'is')} the same for every "
        f"entity in each period; time effects wipe {'it' if len(names) == 1 else 'them'} out: "
        f"{', '.join(names)}",
        [{"variable": n} for n in names],
    )


CHECKS = [
    not_numeric,
    declared_missing,
    nan_missing,
    decimal_rounded,
    missing_values,
    new_singletons,
    time_invariant,
    low_within,
    period_invariant,
]
# the checks whose findings depend on which rows the estimation sample holds
SAMPLE_CHECKS = [new_singletons, time_invariant, low_within, period_invariant]
