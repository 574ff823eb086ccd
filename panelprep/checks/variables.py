"""Checks on the variables: text in numbers, missing values, variation within and across."""

from __future__ import annotations

import re

import numpy as np
import pandas as pd

from panelprep._groups import group_counts
from panelprep.checks.base import Check, check
from panelprep.checks.context import AuditContext
from panelprep.findings import MAX_EXAMPLES
from panelprep.words import plural, plural_word


@check("values-not-numeric", "error",
       "text, infinities or whole numbers beyond 2^53 in a variable "
       "that should be numeric")
def not_numeric(ctx: AuditContext, self: Check):
    bad = {name: p for name, p in ctx.non_numeric.items() if len(p.rows)}
    if not bad:
        return None
    total = sum(len(p.rows) for p in bad.values())
    examples = []
    for name, problem in bad.items():
        # one example per distinct text: how many rows hold it (count) and the first (row)
        texts = ctx.frame[name].iloc[problem.rows].astype(str).to_numpy()
        codes, uniques = pd.factorize(texts)
        counts = np.bincount(codes, minlength=len(uniques))
        first = np.unique(codes, return_index=True)[1]
        rows = ctx.input_rows(problem.rows[first[:MAX_EXAMPLES]])
        examples += [{"column": name, "value": str(value), "count": int(count), "row": int(row)}
                     for value, count, row in zip(uniques[:MAX_EXAMPLES], counts, rows)]
    details = {name: {"rows": len(p.rows), "values": p.values} for name, p in bad.items()}
    names = ", ".join(f"{n} ({len(p.rows)})" for n, p in bad.items())
    return self.finding(
        total,
        f"{plural(total, 'value')} that {plural_word(total, 'is')} not a number in {names}; e.g. "
        + ", ".join(repr(v) for p in bad.values() for v in p.values[:3])
        + f" ({'; '.join(_hints([v for p in bad.values() for v in p.values], ctx.decimal_comma))})",
        examples,
        details,
    )


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


@check("values-declared-missing", "info", "texts read as missing because they were declared so")
def declared_missing(ctx: AuditContext, self: Check):
    hits = {name: p.read_as_missing for name, p in ctx.non_numeric.items() if p.read_as_missing}
    if not hits:
        return None
    total = sum(hits.values())
    return self.finding(
        total,
        f"{plural(total, 'value')} matching declared missing tokens {list(ctx.missing_tokens)} "
        f"{plural_word(total, 'was')} read as missing",
        [{"column": name, "rows": count} for name, count in hits.items()],
        {"per_variable": hits},
    )


@check("values-nan-missing", "warning",
       "NaN values (the text nan in CSV, NaN stored in a Parquet or Arrow float column) "
       "read as missing")
def nan_missing(ctx: AuditContext, self: Check):
    hits = {name: p.nan_rows for name, p in ctx.non_numeric.items() if len(p.nan_rows)}
    if not hits:
        return None
    total = sum(len(rows) for rows in hits.values())
    examples = [{"column": name, "row": int(row) + 1}
                for name, rows in hits.items() for row in rows[:MAX_EXAMPLES]][:MAX_EXAMPLES]
    names = ", ".join(f"{name} ({len(rows)})" for name, rows in hits.items())
    return self.finding(
        total,
        f"{plural(total, 'NaN value')} read as missing in {names}; NaN is often the result of a failed "
        "computation (0/0) upstream rather than a value never observed: check where it comes "
        "from (--severity values-nan-missing=info when NaN is how the source writes missing)",
        examples,
        {"per_variable": {name: len(rows) for name, rows in hits.items()}},
    )


@check("values-decimal-rounded", "warning",
       "decimals (Parquet or Arrow decimal columns) that float64 does not hold exactly")
def decimal_rounded(ctx: AuditContext, self: Check):
    hits = {name: p.rounded_rows for name, p in ctx.non_numeric.items() if len(p.rounded_rows)}
    if not hits:
        return None
    total = sum(len(rows) for rows in hits.values())
    examples = []
    for name, rows in hits.items():
        for row in rows[:MAX_EXAMPLES]:
            examples.append({"column": name, "row": int(ctx.input_rows([row])[0]),
                             "value": str(ctx.frame[name].iloc[int(row)]),
                             "read_as": repr(float(ctx.values[int(row), ctx.variables.index(name)]))})
    examples = examples[:MAX_EXAMPLES]
    names = ", ".join(f"{name} ({len(rows)}, {ctx.frame[name].dtype.pyarrow_dtype})"
                      for name, rows in hits.items())
    first = examples[0]
    return self.finding(
        total,
        f"{total} decimal value(s) in {names} have more digits than float64 holds, so every "
        f"computation uses the nearest float64 (e.g. row {first['row']}: {first['value']} is "
        f"read as {first['read_as']}); round or rescale the column upstream if those digits "
        "matter",
        examples,
        {"per_variable": {name: len(rows) for name, rows in hits.items()}},
    )


@check("values-missing", "info", "missing values per variable and what listwise deletion removes")
def missing_values(ctx: AuditContext, self: Check):
    if not ctx.variables:
        return None
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
    rows_lost = int(np.count_nonzero(per_row))
    if rows_lost == 0:
        return None
    lost = _listwise(ctx)
    # rows where a column is the only one missing: what dropping that column alone would keep
    alone = per_row == 1
    only_missing = {name: int(np.count_nonzero(np.isnan(values[:, j]) & alone))
                    for j, name in enumerate(ctx.variables)}
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


@check("sample-new-singletons", "warning", "entities that listwise deletion leaves with one row")
def new_singletons(ctx: AuditContext, self: Check):
    lost = _listwise(ctx)
    if lost["new_singletons"] == 0:
        return None
    return self.finding(
        lost["new_singletons"],
        f"listwise deletion leaves {plural(lost['new_singletons'], 'entity')} with a single "
        "row that had two or more before",
        [{"entity": key} for key in lost["new_singleton_keys"]],
    )


def _listwise(ctx: AuditContext) -> dict:
    codes = ctx.index.entity_codes
    n = ctx.index.n_entities
    before = group_counts(codes[ctx.base], n)
    after = group_counts(codes[ctx.sample], n)
    new_single = np.flatnonzero((before >= 2) & (after == 1))
    return {
        "rows_removed": int(ctx.base.sum() - ctx.sample.sum()),
        "entities_lost": int(((before > 0) & (after == 0)).sum()),
        "new_singletons": len(new_single),
        "new_singleton_keys": ctx.index.entity_key(new_single[:MAX_EXAMPLES]),
    }


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
