"""The structural checks, one module per family, run in this order."""

from panelprep.checks import keys, shape, variables
from panelprep.checks.base import Check
from panelprep.checks.context import AuditContext, Thresholds

CHECKS: list[Check] = [*keys.CHECKS, *shape.CHECKS, *variables.CHECKS]
CHECK_IDS: tuple[str, ...] = tuple(c.id for c in CHECKS)
# run again on the sample left after the post-audit cleaning policies; the
# others describe the rows read, which those policies do not change
SAMPLE_CHECKS: list[Check] = [c for c in CHECKS if c in (*shape.SAMPLE_CHECKS,
                                                         *variables.SAMPLE_CHECKS)]

__all__ = ["CHECKS", "CHECK_IDS", "SAMPLE_CHECKS", "AuditContext", "Check", "Thresholds"]
