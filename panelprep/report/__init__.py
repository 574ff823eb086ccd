"""Renderers: JSON, the plain-text log and the HTML page. Formatting only, no computation."""

from __future__ import annotations

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


def resolved_note(finding: dict[str, Any]) -> str:
    """The words a resolved finding carries in every rendering ('' when it is not resolved)."""
    policy = finding.get("resolved_by")
    if not policy:
        return ""
    return (f"resolved by {policy}: found on the estimation sample before that policy ran; "
            "not counted by the gate")
