"""Findings: what a check found, as data that every report renders from.

A finding has a stable kebab-case id, a severity, a count, a one-line
message, up to ten examples (each a small dict, usually an entity and a
period) and free-form details.  Checks only produce findings; the gate
decides once, over all of them, whether the data passed.
"""

from __future__ import annotations

import contextlib
import warnings
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

SEVERITIES = ("info", "warning", "error")
# emitted by panelprep.contracts; named here so importing it needs no pandera
CONTRACT_FINDING_ID = "contract-check-failed"
# emitted by the audit itself when it picks the variables to check
SKIPPED_COLUMNS_ID = "columns-not-checked"
# emitted by the audit when a stated step (--freq int:K) is not the data's own
STEP_FINDING_ID = "period-step-stated"
# emitted by panelprep.prepare for a test of the evidence float64 could not carry out
UNCOMPUTABLE_ID = "evidence-not-computable"
# warnings raised by a library during a run, kept in the report instead of on stderr
LIBRARY_WARNINGS_ID = "library-warnings"
MAX_EXAMPLES = 10
# emitted by panelprep.compare (two vintages side by side); named here so the run
# file can set their severities without importing the comparison
COMPARE_FINDING_IDS = (
    "vintage-key-repeated", "vintage-key-missing", "vintage-columns-changed",
    "vintage-type-changed", "vintage-periods-gone", "vintage-periods-new",
    "vintage-entities-gone", "vintage-entities-new", "vintage-rows-removed",
    "vintage-rows-added", "vintage-entity-rekeyed", "vintage-values-restated",
    "vintage-restated-over-limit", "vintage-unit-changed", "vintage-values-now-missing",
    "vintage-values-filled", "vintage-shape-changed",
)


def severity_rank(severity: str) -> int:
    return SEVERITIES.index(severity)


@dataclass
class Finding:
    """One thing a check found.

    Attributes
    ----------
    id : stable kebab-case identifier, e.g. ``period-holes``.
    severity : ``info``, ``warning`` or ``error``.
    count : how many of the thing were found (rows, keys, entities, groups:
        the message says which).
    message : one line for a person.
    examples : at most ``MAX_EXAMPLES`` dicts naming where.
    details : anything else a report may show (JSON-serialisable).
    resolved_by : the cleaning policy that removed what was found (e.g.
        ``clean.singletons = drop``), or None.  A resolved finding is kept
        in the report, describes the sample before that policy, and does
        not count for the gate.
    """

    id: str
    severity: str
    count: int
    message: str
    examples: list[dict[str, Any]] = field(default_factory=list)
    details: dict[str, Any] = field(default_factory=dict)
    resolved_by: str | None = None

    def __post_init__(self) -> None:
        if self.severity not in SEVERITIES:
            raise ValueError(f"unknown severity {self.severity!r}")
        self.count = int(self.count)
        self.examples = list(self.examples)[:MAX_EXAMPLES]

    def to_dict(self) -> dict[str, Any]:
        out = {
            "id": self.id,
            "severity": self.severity,
            "count": self.count,
            "message": self.message,
            "examples": self.examples,
        }
        if self.details:
            out["details"] = self.details
        if self.resolved_by is not None:
            out["resolved_by"] = self.resolved_by
        return out


def apply_severities(findings: list[Finding], overrides: dict[str, str]) -> list[Finding]:
    """Findings with severities replaced where ``overrides`` names their id."""
    for finding_id, severity in overrides.items():
        if severity not in SEVERITIES:
            raise ValueError(f"severity for {finding_id!r} must be one of {SEVERITIES}")
    for finding in findings:
        finding.severity = overrides.get(finding.id, finding.severity)
    return findings


def gate(findings: list[Finding], fail_on: str = "error") -> str:
    """``fail`` when any finding not resolved by a policy is at or above ``fail_on``, else ``pass``."""
    threshold = severity_rank(fail_on)
    failed = any(severity_rank(f.severity) >= threshold for f in findings
                 if f.resolved_by is None)
    return "fail" if failed else "pass"


# the one order of findings in every report (JSON, text log, HTML)
FINDINGS_ORDER = ("findings that count first, worst first (error, warning, info), ties in the "
                  "order the checks ran; then the findings a policy resolved, in the same order")


def ordered(findings: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Finding dicts in ``FINDINGS_ORDER`` (a stable sort)."""
    return sorted(findings, key=lambda f: (bool(f.get("resolved_by")),
                                           -severity_rank(f["severity"])))


def gate_block(findings: list[dict[str, Any]], fail_on: str) -> dict[str, Any]:
    """The gate as data: threshold, verdict, the ids that failed it, counts by severity.

    ``counts`` are of the findings that count (not resolved by a policy);
    ``resolved`` is how many a policy resolved.
    """
    threshold = severity_rank(fail_on)
    counting = [f for f in findings if not f.get("resolved_by")]
    failed = [f["id"] for f in ordered(counting) if severity_rank(f["severity"]) >= threshold]
    return {
        "fail_on": fail_on,
        "verdict": "fail" if failed else "pass",
        "failed_by": list(dict.fromkeys(failed)),
        "counts": {s: sum(f["severity"] == s for f in counting) for s in reversed(SEVERITIES)},
        "resolved": len(findings) - len(counting),
    }


@contextlib.contextmanager
def recorded_warnings() -> Iterator[list[warnings.WarningMessage]]:
    """Warnings raised inside the block, recorded (once per place) instead of printed."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("default")
        yield caught


def library_warnings_finding(caught: list[warnings.WarningMessage]) -> Finding | None:
    """An info finding listing the distinct warnings recorded, or None.

    It never counts for the gate: every warning that can change a result is
    guarded in the code and reported by its own finding
    (``evidence-not-computable``, ``variance-beyond-float-range``); one seen here
    is an edge the code does not handle yet, said so the run is not silent.
    """
    seen = dict.fromkeys((w.category.__name__, str(w.message), Path(w.filename).name, w.lineno)
                         for w in caught)
    if not seen:
        return None
    examples = [{"warning": kind, "message": message, "where": f"{name}:{line}"}
                for kind, message, name, line in seen]
    first = examples[0]
    return Finding(
        id=LIBRARY_WARNINGS_ID, severity="info", count=len(seen),
        message=(f"{len(seen)} warning(s) raised by a library during the run, recorded here "
                 f"instead of on stderr (e.g. {first['warning']}: {first['message']} at "
                 f"{first['where']}); each is an edge panelprep does not handle by itself yet: "
                 "check the numbers it may touch, and please report it"),
        examples=examples)
