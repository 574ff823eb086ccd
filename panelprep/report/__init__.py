"""Renderers: JSON, the plain-text log and the HTML page. Formatting only, no computation."""

from __future__ import annotations

import math
from typing import Any

# One label per quantity, the same in the text log and the HTML page; the
# JSON key of each is its label with underscores (see ``variation.within_measures``).
WITHIN_SD_RATIO = "within SD ratio"
WITHIN_VARIANCE_SHARE = "within variance share"

_ESTIMATION = "the estimation sample: keyed rows, exact repeats collapsed, every selected variable present"


def sample_words(report: dict[str, Any], block: str) -> tuple[str, str]:
    """(sample name, its definition) for a report's ``panel``, ``findings`` or ``variables``."""
    samples = report.get("samples") or {}
    return samples.get(block, "estimation"), samples.get("definition", _ESTIMATION)


def rows_words(report: dict[str, Any]) -> str:
    """The sample's rows against the rows read, one wording for the text log and the HTML page.

    "Rows read" is always ``input.rows`` (what the header of each report
    says); the audited frame (``panel.rows_read``) is named apart when steps
    before the audit (id normalisation, window, duplicates) removed rows.
    """
    panel, read = report.get("panel") or {}, (report.get("input") or {}).get("rows")
    audited = panel.get("rows_read")
    shown = [("-" if n is None else f"{n:,}") for n in (panel.get("rows"), read)]
    words = f"{shown[0]} of {shown[1]} read"
    if audited is not None and read is not None and audited != read:
        words += f" ({audited:,} audited after the steps before the audit)"
    return words


def resolved_note(finding: dict[str, Any]) -> str:
    """The words a resolved finding carries in every rendering ('' when it is not resolved)."""
    policy = finding.get("resolved_by")
    if not policy:
        return ""
    return (f"resolved by {policy}: found on the estimation sample before that policy ran; "
            "not counted by the gate")


BETWEEN_VARIANCE_SHARE = "between variance share"

# What addresses each finding: the command-line option and, in brackets, the
# run-file key; one line per finding id, the same in the text log and the HTML.
HINTS = {
    "key-missing": "fix the keys at the source; rows without a full key are left out of the "
                   "sample (--severity key-missing=warning [checks.severity] to go on without them)",
    "key-conflict": "--duplicates keep-first, keep-last or mean [clean.duplicates]",
    "row-repeated": "--duplicates drop-exact [clean.duplicates]",
    "entity-id-lookalike": "--normalise-ids trim or trim-fold [clean.normalise_ids]",
    "period-holes": "--balance complete-entities or largest-block [clean.balance], or "
                    "--severity period-holes=info [checks.severity] when holes are expected",
    "period-off-grid": "--freq [panel.freq] names the grid; or correct the time values",
    "period-step-stated": ("--freq int:K [panel.freq] with the data's step (in the message), or "
                           "no --freq to infer it; keep it when the waves are meant to have holes"),
    "panel-shape": "--window FIRST,LAST [clean.window] for a mistyped date far out; "
                   "--balance [clean.balance] for an unbalanced panel",
    "entity-single-obs": "--singletons drop [clean.singletons]",
    "sample-new-singletons": "--singletons drop [clean.singletons]",
    "values-not-numeric": "--missing-token [input.missing_tokens] or --decimal-comma "
                          "[input.decimal_comma]",
    "values-decimal-rounded": "round or rescale the column upstream if the lost digits matter",
    "values-nan-missing": "--severity values-nan-missing=info [checks.severity] when NaN is "
                          "how the source writes missing",
    "values-missing": "--vars / --x [model.x] to leave out a variable that is mostly missing",
    "var-fixed-within": "leave it out of --x [model.x] for within fits; between and quasi "
                        "files keep it",
    "var-thin-within": "[checks.low_within_ratio] sets the threshold",
    "var-fixed-per-period": "leave it out of --x [model.x] for the twoway file",
    "columns-not-checked": "--vars names the columns to check; --decimal-comma "
                           "[input.decimal_comma] for numbers written 1,5",
    "contract-check-failed": "fix the input, or the contract named by --contract "
                             "[contract.schema]",
    "components-underidentified": "more entities or periods in the sample (--window "
                                  "[clean.window], --balance [clean.balance])",
    "entity-variance-negative": "--method [output.method] picks another estimator",
    "regressor-dropped-within": "leave the regressor out of --x [model.x] for within fits",
    "regressor-dropped-between": "leave the regressor out of --x [model.x]",
    "regressor-dropped-pooled": "leave the regressor out of --x [model.x]",
    "variance-beyond-float-range": "rescale the response (divide by a power of ten)",
    # comparisons of two vintages (panelprep compare, or [compare] in a run file)
    "vintage-key-repeated": "--duplicates [clean.duplicates] settles repeats in the input; "
                            "the comparison takes the first row of each key",
    "vintage-key-missing": "fix the keys at the source; rows without a full key are not compared "
                           "(--severity [checks.severity])",
    "vintage-columns-changed": "--vars [compare.vars] names the variables to compare",
    "vintage-type-changed": "--vars [compare.vars] to leave the column out; or deliver it in "
                            "one form",
    "vintage-periods-gone": "--window FIRST,LAST [clean.window] when a shorter history is "
                            "expected; --severity vintage-periods-gone=info [checks.severity]",
    "vintage-periods-new": "--severity [checks.severity] to gate on new periods",
    "vintage-entities-gone": "see vintage-entity-rekeyed; --severity [checks.severity]",
    "vintage-entities-new": "--severity [checks.severity] to gate on new entities",
    "vintage-rows-removed": "--severity vintage-rows-removed=info [checks.severity] when a "
                            "vendor trims history",
    "vintage-rows-added": "--severity [checks.severity] to gate on added rows",
    "vintage-entity-rekeyed": "map the old ids to the new before comparing; "
                              "--severity [checks.severity]",
    "vintage-values-restated": "--atol / --rtol [compare.atol, compare.rtol] so that rounding "
                               "is not a restatement; restated.parquet lists every cell",
    "vintage-restated-over-limit": "--max-restated-share [compare.max_restated_share] sets the "
                                   "limit",
    "vintage-unit-changed": "rescale the variable to one unit before comparing; "
                            "--severity vintage-unit-changed=error [checks.severity] to stop on it",
    "vintage-values-now-missing": "--severity [checks.severity] to gate on withheld values",
    "vintage-values-filled": "--severity [checks.severity] to gate on values filled in",
    "vintage-shape-changed": "--balance [clean.balance] to make the panel balanced again",
}


def hint_for(finding_id: str) -> str:
    """What addresses a finding id ('' when nothing but the data can)."""
    return HINTS.get(finding_id, "")


def _fails(severity: str, fail_on: str) -> bool:
    return severity == "error" or (fail_on == "warning" and severity == "warning")


def failing_ids(report: dict[str, Any]) -> list[str]:
    """Ids of the findings that fail the gate, in report order, once each."""
    fail_on = report.get("fail_on", "error")
    return list(dict.fromkeys(f["id"] for f in report.get("findings") or []
                              if not f.get("resolved_by") and _fails(f["severity"], fail_on)))


def unresolved_counts(report: dict[str, Any]) -> dict[str, Any]:
    """Findings counting for the gate per severity, and their ids (``ids``)."""
    out: dict[str, Any] = {"error": 0, "warning": 0, "info": 0,
                           "ids": {"error": [], "warning": [], "info": []}}
    for f in report.get("findings") or []:
        if f.get("resolved_by") or f.get("severity") not in out["ids"]:
            continue
        out[f["severity"]] += 1
        out["ids"][f["severity"]].append(f["id"])
    return out


def spell_words(spell: dict[str, Any]) -> str:
    """A spell group in words: "enters 2010, present to the end (2024), no holes"."""
    entry = (f"present from the start ({spell['entry']})" if spell.get("from_first")
             else f"enters {spell['entry']}")
    leave = (f"to the end ({spell['exit']})" if spell.get("to_last")
             else f"last seen {spell['exit']}")
    holes = spell["holes"]
    gaps = "no holes" if holes == 0 else ("1 hole" if holes == 1 else f"{holes:,} holes")
    return f"{entry}, {leave}, {gaps}"


def transform_details(info: dict[str, Any]) -> list[str]:
    """What building a transformed file did, in words (``transforms.<file>`` of the summary)."""
    out = []
    for key, value in info.items():
        if key in ("rows", "regressors_left_out"):
            continue
        if key == "converged":
            out.append("converged" if value else "did not converge")
        elif key == "precision":
            out.append(f"largest remaining mean {value:.1e} of the column's scale")
        elif key == "iterations":
            out.append(f"{value:,} iteration" + ("" if value == 1 else "s"))
        elif key == "n_components":
            out.append(f"{value:,} connected block" + ("" if value == 1 else "s"))
        elif key == "method":
            out.append(f"solved by {value}")
        elif isinstance(value, int) and not isinstance(value, bool):
            out.append(f"{key.replace('_', ' ')} {value:,}")
        else:
            out.append(f"{key.replace('_', ' ')} {value}")
    return out


def _decimals(scale: float, significant: int = 4) -> int | None:
    """Decimals giving a value of this scale ``significant`` digits; None: powers of ten."""
    if scale == 0 or not math.isfinite(scale):
        return 2
    if scale >= 1e7 or scale < 1e-4:
        return None
    return min(max(significant - 1 - math.floor(math.log10(scale)), 0), 6)


def _value(value: float | None, decimals: int | None, whole: bool = False) -> str:
    """A value of the data: no thousands separators (a year stays 2018), fixed decimals."""
    if value is None:
        return "-"
    if not math.isfinite(value):
        return str(value)
    if whole and value == round(value) and abs(value) < 1e15:
        return f"{value:.0f}"
    if decimals is None:
        return f"{value:.3e}"
    return f"{value:.{decimals}f}"


def align_point(cells: list[str]) -> list[str]:
    """Cells padded with spaces so their decimal points (or ends, for whole numbers) line up."""
    def parts(cell: str) -> tuple[str, str]:
        if cell[:1].isdigit() or (cell[:1] == "-" and cell[1:2].isdigit()):
            mantissa, dot, rest = cell.partition(".")
            return mantissa, dot + rest
        return cell, ""

    split = [parts(c) for c in cells]
    left = max((len(a) for a, _ in split), default=0)
    right = max((len(b) for _, b in split), default=0)
    return [a.rjust(left) + b.ljust(right) for a, b in split]


def describe_cells(variables: dict[str, dict]) -> list[list[str]]:
    """Mean, sd, smallest and largest of each variable, as aligned text cells.

    Each variable gets the decimals that give its sd (or, with no spread, its
    largest magnitude) four significant digits; the smallest and largest of a
    whole-valued variable are whole numbers.  No thousands separators: a
    year or a code reads as written.  Each column is then padded so the
    decimal points line up.
    """
    rows = []
    for v in variables.values():
        scale = v.get("sd_overall") or max(abs(v.get("min") or 0), abs(v.get("max") or 0))
        places = _decimals(scale)
        whole = all(x is None or x == round(x) for x in (v.get("min"), v.get("max")))
        rows.append([_value(v.get("mean"), places), _value(v.get("sd_overall"), places),
                     _value(v.get("min"), places, whole), _value(v.get("max"), places, whole)])
    columns = [align_point([row[j] for row in rows]) for j in range(4)]
    return [[column[i] for column in columns] for i in range(len(rows))]


def runs_words(runs: dict[str, int], most: int = 3) -> str:
    """Entities by number of observed runs, the first ``most`` counts apart, the rest together."""
    items = sorted((int(k), v) for k, v in runs.items())
    parts = [f"{k:,} run{'' if k == 1 else 's'}: {v:,} entit{'y' if v == 1 else 'ies'}"
             for k, v in items[:most]]
    rest = items[most:]
    if rest:
        total = sum(v for _, v in rest)
        parts.append(f"{rest[0][0]:,} or more runs: {total:,} entit{'y' if total == 1 else 'ies'}")
    return ", ".join(parts)


def unidentified_note(components: dict[str, Any]) -> str:
    """The words that say the components are not estimates ('' when they are identified)."""
    found = next((f for f in components.get("findings") or []
                  if f.get("id") == "components-underidentified"), None)
    if found is None:
        return ""
    return (f"Not identified on this sample (components-underidentified: {found['message']}): "
            "these numbers are not estimates to use.")
