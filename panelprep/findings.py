"""Findings: what a check found, as data that every report renders from.

A finding has a stable kebab-case id, a severity, a count, a one-line
message, up to ten examples (each a small dict, usually an entity and a
period) and free-form details.  Checks only produce findings; the gate
decides once, over all of them, whether the data passed.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

SEVERITIES = ("info", "warning", "error")
# emitted by panelprep.contracts; named here so importing it needs no pandera
CONTRACT_FINDING_ID = "contract-check-failed"
# emitted by the audit itself when it picks the variables to check
SKIPPED_COLUMNS_ID = "columns-not-checked"
# emitted by the audit when a stated step (--freq int:K) is not the data's own
STEP_FINDING_ID = "period-step-stated"
MAX_EXAMPLES = 10


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
