"""The structural checks, one module per family, run in this order."""

from panelprep.checks import keys, shape, variables
from panelprep.checks.base import Check
from panelprep.checks.context import AuditContext, Thresholds

CHECKS: list[Check] = [*keys.CHECKS, *shape.CHECKS, *variables.CHECKS]
CHECK_IDS: tuple[str, ...] = tuple(c.id for c in CHECKS)

__all__ = ["CHECKS", "CHECK_IDS", "AuditContext", "Check", "Thresholds"]
