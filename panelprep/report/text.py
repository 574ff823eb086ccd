"""Plain-text renderings of reports: the stdout summary and diagnostics.txt.

A layout of our own: a verdict line, a short description of the panel, the
most common presence patterns, findings from worst to mildest, and the
variation table with each variable's spread split into between and within.
"""

from __future__ import annotations

from typing import Any

from panelprep.checks.shape import ABSENT, PRESENT
from panelprep.findings import severity_rank
from panelprep.report import (
    WITHIN_SD_RATIO,
    WITHIN_VARIANCE_SHARE,
    resolved_note,
    rows_words,
    sample_words,
)


def _num(value: Any, digits: int = 4) -> str:
    if value is None:
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}"
    if abs(value) >= 1e7 or (value != 0 and abs(value) < 1e-3):
        return f"{value:.{digits}g}"
    return f"{value:,.{digits}f}".rstrip("0").rstrip(".")


def _table(rows: list[list[str]], right: set[int] = frozenset()) -> list[str]:
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    lines = []
    for row in rows:
        cells = [c.rjust(w) if i in right else c.ljust(w) for i, (c, w) in enumerate(zip(row, widths))]
        lines.append("  " + "  ".join(cells).rstrip())
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
        + (f"  sha256 {source['sha256'][:16]}…" if source.get("sha256") else ""),
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
         + f"; periods per entity {obs['min']} / {_num(obs['median'])} / {obs['max']} (min / median / max)"],
        ["singletons", f"{panel['singleton_entities']:,}"],
        ["with holes", f"{panel['entities_with_gaps']:,} entities"],
        ["repeats", (f"{panel['exact_duplicate_rows']:,} exact repeated rows, "
                    f"{panel['conflicting_duplicate_keys']:,} conflicting keys")],
    ])
    patterns = details.get("patterns")
    if patterns:
        lines += ["", f"Presence over time ({PRESENT} observed, {ABSENT} absent), most common first"]
        lines += _table([[p["pattern"], f"{p['entities']:,} entities", f"{100 * p['share']:.1f}%"]
                         for p in patterns], right={1, 2})
    lines += ["", (f"Findings (worst first; sample checks on the {sample_words(report, 'findings')[0]} "
                   "sample, key and value checks on the rows read)")]
    # resolved findings last: they no longer count for the gate
    found = sorted(report["findings"],
                   key=lambda f: (bool(f.get("resolved_by")), -severity_rank(f["severity"])))
    if found:
        lines += _table([[f["severity"].upper(), f["id"], f"{f['count']:,}",
                          f["message"] + (f" [{resolved_note(f)}]" if f.get("resolved_by") else "")]
                         for f in found], right={2})
    else:
        lines.append("  none")
    lines += ["", (f"Variation ({sample_words(report, 'variables')[0]} sample; SDs: overall ddof 1, "
                   "between over entity means ddof 1, within with n - N; "
                   f"{WITHIN_SD_RATIO} = sd within / sd overall, {WITHIN_VARIANCE_SHARE} = "
                   "sd within^2 / (sd within^2 + sd between^2))")]
    header = ["variable", "n", "mean", "min", "max", "sd overall", "sd between", "sd within",
              WITHIN_SD_RATIO, WITHIN_VARIANCE_SHARE, "entities varying"]
    rows = [header]
    for name, v in report["variables"].items():
        ratio, share = v.get("within_sd_ratio"), v.get("within_variance_share")
        rows.append([
            name, _num(v["n"]), _num(v["mean"]), _num(v["min"]), _num(v["max"]), _num(v["sd_overall"]),
            _num(v["sd_between"]), _num(v["sd_within"]),
            "-" if ratio is None else f"{ratio:.3f}",
            "-" if share is None else f"{100 * share:.1f}%",
            "-" if v["varying_share"] is None else f"{100 * v['varying_share']:.0f}%",
        ])
    if len(rows) > 1:
        lines += _table(rows, right=set(range(1, len(header))))
    else:
        lines.append("  no numeric variables selected")
    return lines


def components_lines(components: dict[str, Any]) -> list[str]:
    """The variance components section."""
    theta = components.get("theta") or {}
    lines = [f"Variance components ({components['method']})"]
    lines += _table([
        ["entity effect variance (s2_u)", _num(components["sigma2_entity"], 6)],
        ["idiosyncratic variance (s2_e)", _num(components["sigma2_idiosyncratic"], 6)],
        ["entity share s2_u / (s2_u + s2_e)", _num(components["entity_share"], 4)],
        ["theta_i = 1 - sqrt(s2_e / (T_i s2_u + s2_e))",
         (f"{_num(theta.get('min'))} / {_num(theta.get('median'))} / {_num(theta.get('max'))}"
         " (min / median / max)")],
    ])
    if components.get("truncated_negative"):
        lines.append(f"  the estimate of s2_u was negative ({_num(components.get('raw_sigma2_entity'), 6)})"
                     " and was set to 0")
    for key, label in (("dropped_within", "left out of the within regression"),
                       ("dropped_between", "left out of the between regression")):
        if components.get(key):
            lines.append(f"  {label}: {', '.join(components[key])}")
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
    """diagnostics.txt: the whole preparation, top to bottom."""
    lines = ["panelprep preparation log", "=" * 25, ""]
    lines += audit_lines(summary)
    if summary.get("steps"):
        lines += ["", "Steps (in order)"]
        lines += _table([["step", "rows before", "rows after", "entities before", "entities after"]]
                        + [[s["step"], f"{s['rows_before']:,}", f"{s['rows_after']:,}",
                            f"{s['entities_before']:,}", f"{s['entities_after']:,}"]
                           for s in summary["steps"]], right={1, 2, 3, 4})
        lines.append(_dropped_line(summary))
    if summary.get("components"):
        lines += [""] + components_lines(summary["components"])
    if summary.get("transforms"):
        lines += ["", "Files built"]
        for name, info in summary["transforms"].items():
            extra = ", ".join(f"{k} {v}" for k, v in info.items()
                              if k not in ("rows", "regressors_left_out"))
            lines.append(f"  {name}: {info['rows']:,} rows" + (f" ({extra})" if extra else ""))
            lines += [f"    left out of {name}: {r['name']} ({r['why']})"
                      for r in info.get("regressors_left_out") or []]
    if summary.get("evidence"):
        lines += ["", "Evidence on the choice of estimator (not a verdict)"]
        lines += [f"  {line}" for line in summary["evidence"].get("reading", [])]
    if summary.get("files"):
        lines += ["", "Files written"]
        lines += _table([[f["name"], f"{f['rows']:,} rows", f["sha256"][:16] + "…"]
                         for f in summary["files"]], right={1})
    if summary.get("cautions"):
        lines += ["", "Before you fit a model"]
        lines += [f"  - {c}" for c in summary["cautions"]]
    return lines
