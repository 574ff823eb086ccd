"""The shape of a check: a small named object with an id, a default severity and a rule."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

from panelprep.checks.context import AuditContext
from panelprep.findings import Finding


@dataclass(frozen=True)
class Check:
    """A structural check.

    ``rule`` looks at the shared context and returns what it found, or None
    when there is nothing to say.  ``severity`` is the default severity of
    its finding; a run file may override it by ``id``.
    """

    id: str
    severity: str
    summary: str
    rule: Callable[[AuditContext, Check], Finding | None]

    def run(self, context: AuditContext) -> Finding | None:
        return self.rule(context, self)

    def finding(self, count: int, message: str, examples=(), details=None, severity=None) -> Finding:
        return Finding(
            id=self.id,
            severity=severity or self.severity,
            count=count,
            message=message,
            examples=list(examples),
            details=details or {},
        )


def check(id: str, severity: str, summary: str):
    """Decorator turning a rule function into a ``Check``."""

    def wrap(rule: Callable[[AuditContext, Check], Finding | None]) -> Check:
        return Check(id=id, severity=severity, summary=summary, rule=rule)

    return wrap
