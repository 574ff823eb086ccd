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
