"""Plain-text renderings of reports: the stdout summary and diagnostics.txt.

A layout of our own, plain ASCII in every block panelprep writes: a verdict
line, a short description of the panel, how the entities cover the period
grid (spell groups, bands of periods, runs), the findings from worst to
mildest under a header row with what addresses each, the variables
described, where their variation lies, and a closing verdict line with the
counts and the exit code.  Counts carry thousands separators; values of the
data (years, codes, means) never do.
"""

from __future__ import annotations

import math
from typing import Any

from panelprep.findings import severity_rank
from panelprep.report import (
    BETWEEN_VARIANCE_SHARE,
    WITHIN_SD_RATIO,
    WITHIN_VARIANCE_SHARE,
    align_point,
    describe_cells,
    failing_ids,
    hint_for,
    resolved_note,
    rows_words,
    runs_words,
    sample_words,
    spell_words,
    transform_details,
    unidentified_note,
    unresolved_counts,
)
from panelprep.words import plural


def _num(value: Any, digits: int = 4) -> str:
    """A single number: counts with separators, other values with ``digits`` significant digits."""
    if value is None:
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}"
    if not math.isfinite(value):
        return str(value)
    if value != 0 and (abs(value) >= 1e7 or abs(value) < 1e-3):
        return f"{value:.{digits}g}"
    return f"{value:.{digits}f}".rstrip("0").rstrip(".")


def _table(rows: list[list[str]], right: set[int] = frozenset()) -> list[str]:
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    lines = []
    for row in rows:
        cells = [c.rjust(w) if i in right else c.ljust(w) for i, (c, w) in enumerate(zip(row, widths))]
        lines.append("  " + "  ".join(cells).rstrip())
    return lines


def _pct(share: float | None) -> str:
    return "-" if share is None else f"{100 * share:.1f}%"


def coverage_lines(details: dict[str, Any], periods: int, entities: int) -> list[str]:
    """How entities cover the grid: spell groups, bands of periods, runs; bounded width."""
    cover = details.get("coverage")
    if not cover or not cover.get("spells"):
        return []
    first, last = details.get("first_period"), details.get("last_period")
    lines = ["", f"Coverage of the grid ({first} to {last}, {plural(periods, 'period')})",
             (f"  {plural(cover['entities_full'], 'entity')} present in every period; "
             f"{cover['from_first']:,} from the first period, {cover['to_last']:,} to the last"),
             (f"  largest of {plural(cover['spell_groups'], 'spell group')} "
             "(same entry, exit and number of holes):")]
    rows = [["entities", "share", "spell"]]
    rows += [[f"{s['entities']:,}", _pct(s["share"]), spell_words(s)] for s in cover["spells"]]
    lines += ["  " + line for line in _table(rows, right={0, 1})]
    runs = cover.get("runs") or {}
    if runs:
        lines.append("  observed in " + runs_words(runs))
    bands = cover.get("bands") or []
    if bands:
        width = bands[0]["periods"]
        lines.append(f"  entities by band of {plural(width, 'period')}"
                     if width > 1 else "  entities by period")
        rows = [["periods", "present (fewest-most)", "entering", "last seen"]]
        for b in bands:
            span = b["first"] if b["first"] == b["last"] else f"{b['first']}-{b['last']}"
            present = (f"{b['present_fewest']:,}" if b["present_fewest"] == b["present_most"]
                       else f"{b['present_fewest']:,}-{b['present_most']:,}")
            rows.append([span, present, f"{b['entering']:,}", f"{b['last_seen']:,}"])
        lines += ["  " + line for line in _table(rows, right={1, 2, 3})]
    return lines


def findings_lines(report: dict[str, Any]) -> list[str]:
    """The findings table (with a header row) and what addresses each finding that counts."""
    lines = [(f"Findings (worst first; sample checks on the {sample_words(report, 'findings')[0]} "
              "sample, key and value checks on the rows read)")]
    # resolved findings last: they no longer count for the gate
    found = sorted(report["findings"],
                   key=lambda f: (bool(f.get("resolved_by")), -severity_rank(f["severity"])))
    if not found:
        return lines + ["  none"]
    rows = [["severity", "finding", "count", "what was found"]]
    rows += [[f["severity"].upper(), f["id"], f"{f['count']:,}",
              f["message"] + (f" [{resolved_note(f)}]" if f.get("resolved_by") else "")]
             for f in found]
    lines += _table(rows, right={2})
    failing = set(failing_ids(report))
    to_address = [f for f in found if not f.get("resolved_by") and f["severity"] != "info"
                  and hint_for(f["id"])]
    if to_address:
        lines += ["", "What addresses them"]
        lines += _table([[f["id"], "fails the gate" if f["id"] in failing else "does not fail",
                          hint_for(f["id"])] for f in {
                              f["id"]: f for f in to_address}.values()])
    return lines


def variable_lines(report: dict[str, Any]) -> list[str]:
    """Two tables: each variable described, then where its variation lies."""
    sample = sample_words(report, "variables")[0]
    variables = report["variables"]
    if not variables:
        return [f"Variables ({sample} sample)", "  no numeric variables selected"]
    described = [[name, f"{v['n']:,}", *cells]
                 for (name, v), cells in zip(variables.items(), describe_cells(variables))]
    lines = [f"Variables ({sample} sample; sd with ddof 1)"]
    lines += _table([["variable", "rows", "mean", "sd", "smallest", "largest"], *described],
                    right={1, 2, 3, 4, 5})
    lines += ["", f"Where the variation lies ({sample} sample)",
              (f"  {WITHIN_VARIANCE_SHARE} = s_w^2 / (s_w^2 + s_b^2), {BETWEEN_VARIANCE_SHARE} "
               f"= 1 - it; {WITHIN_SD_RATIO} = s_w / sd"),
              ("  s_w: SD of deviations from entity means (n - N); s_b: SD of the entity means "
              "(ddof 1)")]
    header = ["variable", BETWEEN_VARIANCE_SHARE, WITHIN_VARIANCE_SHARE, WITHIN_SD_RATIO,
              "entities varying", "note"]
    rows = [header]
    for name, v in variables.items():
        ratio, share = v.get("within_sd_ratio"), v.get("within_variance_share")
        notes = [label for key, label in (("time_invariant", "constant within entities"),
                                          ("period_invariant", "constant within periods"))
                 if v.get(key)]
        rows.append([name, "-" if share is None else _pct(1 - share), _pct(share),
                     "-" if ratio is None else f"{ratio:.3f}",
                     "-" if v["varying_share"] is None else f"{100 * v['varying_share']:.0f}%",
                     "; ".join(notes)])
    lines += _table(rows, right={1, 2, 3, 4})
    return lines


def audit_lines(report: dict[str, Any]) -> list[str]:
    """The audit part of a report (``AuditReport.to_dict()``) as lines of text."""
    keys, panel, source = report["keys"], report["panel"], report["input"]
    shape = next((f for f in report["findings"]
                  if f["id"] == "panel-shape" and not f.get("resolved_by")), None)
    details = shape.get("details", {}) if shape else {}
    freq = keys["freq"] + (", inferred" if keys.get("freq_inferred") else ", given")
    lines = [
        f"verdict: {report['verdict'].upper()}  (the gate fails on {report['fail_on']} and above)",
        f"input:   {source.get('path') or '(data frame)'}  rows {source['rows']:,}"
        + (f"  sha256 {source['sha256'][:16]}..." if source.get("sha256") else ""),
        f"key:     {' + '.join(keys['entity'])} over {keys['time']} ({freq})",
        "",
        f"Panel ({sample_words(report, 'panel')[1]})",
    ]
    span = (f"{details.get('first_period')} to {details.get('last_period')}"
            if details.get("first_period") else "-")
    obs = panel["obs_per_entity"]
    lines += _table([
        ["rows", rows_words(report)],
        ["entities", f"{panel['entities']:,}"],
        ["periods", f"{panel['periods']:,} ({span})"],
        ["shape", ("balanced" if panel["balanced"] else "unbalanced")
         + f"; periods per entity {obs['min']} / {_num(obs['median'])} / {obs['max']} "
         "(fewest / median / most)"],
        ["singletons", plural(panel["singleton_entities"], "entity")],
        ["with holes", plural(panel["entities_with_gaps"], "entity")],
        ["repeats", (f"{plural(panel['exact_duplicate_rows'], 'exact repeated row')}, "
                     f"{plural(panel['conflicting_duplicate_keys'], 'conflicting key')}")],
    ])
    lines += coverage_lines(details, panel["periods"], panel["entities"])
    lines += [""] + findings_lines(report)
    lines += [""] + variable_lines(report)
    return lines


def verdict_line(report: dict[str, Any]) -> str:
    """The closing line: ``FAIL: 2 errors (key-conflict, row-repeated), 4 warnings; exit 1``.

    Counts are of the findings that count for the gate (a finding resolved
    by a policy does not); the ids are those that fail it.
    """
    counts = unresolved_counts(report)
    failing = failing_ids(report)
    parts = []
    for severity in ("error", "warning", "info"):
        part = plural(counts[severity], severity if severity != "info" else "note")
        ids = [i for i in failing if i in counts["ids"][severity]]
        parts.append(part + (f" ({', '.join(ids)})" if ids else ""))
    verdict = report["verdict"].upper()
    code = 0 if report["verdict"] == "pass" else 1
    return f"{verdict}: {', '.join(parts)}; exit {code}"


def closing_lines(report: dict[str, Any], written: list[tuple[str, str]] = ()) -> list[str]:
    """Where each output went (``(what, path)`` pairs), then the verdict line, last."""
    lines = [""] + [f"wrote {what}: {path}" for what, path in written]
    return lines + [verdict_line(report)]


def components_lines(components: dict[str, Any]) -> list[str]:
    """Where the error variance sits, and the demeaning weight per entity."""
    theta = components.get("theta") or {}
    s2u, s2e = components.get("sigma2_entity"), components.get("sigma2_idiosyncratic")
    lines = [(f"Error variance, split by level ({components['method']}; "
             f"{plural(components.get('n_obs', 0), 'row')}, "
             f"{plural(components.get('n_entities', 0), 'entity')})")]
    level = [["level", "variance", "SD"],
             ["entity (s2_u)", _num(s2u, 6), _num(components.get("sigma_entity"), 6)],
             ["row within entity (s2_e)", _num(s2e, 6),
              _num(components.get("sigma_idiosyncratic"), 6)]]
    for j in (1, 2):
        column = align_point([row[j] for row in level[1:]])
        for row, cell in zip(level[1:], column):
            row[j] = cell
    lines += _table(level, right={1, 2})
    lines.append(f"  {_pct(components['entity_share'])} of the error variance sits at entity "
                 "level, s2_u / (s2_u + s2_e)")
    if unidentified_note(components):
        lines.append(f"  {unidentified_note(components)}")
    if components.get("truncated_negative"):
        lines.append(f"  the estimate of s2_u was negative ({_num(components.get('raw_sigma2_entity'), 6)})"
                     " and was set to 0")
    for key, label in (("dropped_within", "left out of the within regression"),
                       ("dropped_between", "left out of the between regression")):
        if components.get(key):
            lines.append(f"  {label}: {', '.join(components[key])}")
    lines += ["", "Demeaning weight per entity, theta_i = 1 - sqrt(s2_e / (T_i s2_u + s2_e)):",
              ("  the quasi file subtracts theta_i times the entity mean (0: pooled rows, "
              "1: within deviations)")]
    marks = [("lowest", "min"), ("10%", "p10"), ("25%", "p25"), ("median", "median"),
             ("75%", "p75"), ("90%", "p90"), ("highest", "max")]
    shown = [(label, theta[key]) for label, key in marks if theta.get(key) is not None]
    if shown:
        lines += _table([[label for label, _ in shown],
                         [f"{value:.3f}" for _, value in shown]], right=set(range(len(shown))))
    return lines


def _dropped_line(summary: dict[str, Any]) -> str:
    """Rows removed by the steps, and whether the ledger file holding them was written."""
    dropped = summary.get("dropped", {})
    reasons = ", ".join(f"{k}: {v:,}" for k, v in dropped.get("by_reason", {}).items()) or "none"
    ledger = next((f["name"] for f in summary.get("files", []) if f["name"].startswith("dropped.")),
                  None)
    if ledger is not None:
        return f"  rows dropped in all: {dropped.get('rows', 0):,} ({reasons}); each is listed in {ledger}"
    if summary.get("verdict") == "fail":
        return (f"  rows the steps removed: {dropped.get('rows', 0):,} ({reasons}); the gate "
                "failed, so no data file and no ledger of dropped rows was written")
    return f"  rows dropped in all: {dropped.get('rows', 0):,} ({reasons}); each is in the dropped table"


def preparation_lines(summary: dict[str, Any]) -> list[str]:
    """diagnostics.txt: the whole preparation, top to bottom, the verdict line last."""
    lines = ["panelprep preparation log", "=" * 25, ""]
    lines += audit_lines(summary)
    if summary.get("steps"):
        lines += ["", "Steps (in order)"]
        lines += _table([["step", "rows before", "rows after", "entities before", "entities after"]]
                        + [[s["step"], f"{s['rows_before']:,}", f"{s['rows_after']:,}",
                            f"{s['entities_before']:,}", f"{s['entities_after']:,}"]
                           for s in summary["steps"]], right={1, 2, 3, 4})
        lines.append(_dropped_line(summary))
    if summary.get("comparison"):
        from panelprep.report.comparison import comparison_body

        lines += ["", "Against the previous vintage (findings vintage-* above)"]
        lines += [f"  {line}" if line else "" for line in comparison_body(summary["comparison"])]
    if summary.get("components"):
        lines += [""] + components_lines(summary["components"])
    if summary.get("transforms"):
        lines += ["", "Files built" + (" (none written: the gate failed)"
                                       if summary.get("verdict") == "fail" else "")]
        for name, info in summary["transforms"].items():
            extra = ", ".join(transform_details(info))
            lines.append(f"  {name}: {plural(info['rows'], 'row')}" + (f" ({extra})" if extra else ""))
            lines += [f"    left out of {name}: {r['name']} ({r['why']})"
                      for r in info.get("regressors_left_out") or []]
    if summary.get("evidence"):
        lines += ["", "Evidence on the choice of estimator and on the errors (not a verdict)"]
        lines += [f"  {line}" for line in summary["evidence"].get("reading", [])]
    if summary.get("files"):
        lines += ["", "Files written"]
        lines += _table([[f["name"], plural(f["rows"], "row"), f["sha256"][:16] + "..."]
                         for f in summary["files"]], right={1})
    lines += cautions_lines(summary)
    lines += ["", verdict_line(summary)]
    return lines


def cautions_lines(summary: dict[str, Any]) -> list[str]:
    """The cautions of a preparation (with its numbers), for the log and the summary."""
    if not summary.get("cautions"):
        return []
    return ["", "Before you fit a model", *(f"  - {c}" for c in summary["cautions"])]

