"""The shape of a check: a small named object with an id, a default severity and a rule."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from panelprep.checks.context import AuditContext
from panelprep.findings import MAX_EXAMPLES, Finding


@dataclass(frozen=True)
class Check:
    """A structural check.

    ``rule`` looks at the shared context and returns what it found, or None
    when there is nothing to say.  ``severity`` is the default severity of
    its finding; a run file may override it by ``id``.

    A check whose finding is built from sums over entities and rows also
    has ``tally`` (the context -> a small dict of counts, maxima, per-value
    counts and ranked examples) and ``finish`` (the check and a tally ->
    the finding, or None); its ``rule`` is ``finish(tally(context))``.  The
    dask engine takes the tally of each partition, adds them up with
    :func:`merge_tallies` and calls the same ``finish``.
    """

    id: str
    severity: str
    summary: str
    rule: Callable[[AuditContext, Check], Finding | None]
    tally: Callable[[AuditContext], dict] | None = None
    finish: Callable[..., Finding | None] | None = None

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


def check(id: str, severity: str, summary: str, tally=None, finish=None):
    """Decorator turning a rule function into a ``Check``."""

    def wrap(rule: Callable[[AuditContext, Check], Finding | None]) -> Check:
        return Check(id=id, severity=severity, summary=summary, rule=rule, tally=tally,
                     finish=finish)

    return wrap


def tallied(id: str, severity: str, summary: str, tally: Callable[[AuditContext], dict],
            finish: Callable[..., Finding | None]) -> Check:
    """A ``Check`` whose rule is ``finish(check, tally(context))`` (see :class:`Check`)."""
    return Check(id=id, severity=severity, summary=summary,
                 rule=lambda context, self: finish(self, tally(context)), tally=tally,
                 finish=finish)


# the bad values a finding quotes are drawn from the first this many bad rows
FIRST_VALUES = 200


def row_ordered(examples: Sequence[dict]) -> list[tuple[tuple, dict]]:
    """Examples ranked by their input row (``row``), for :func:`merge_tallies`."""
    return [((example["row"],), example) for example in examples]


def examples_of(tally: dict, key: str = "examples") -> list[dict]:
    """The examples of a tally in rank order, at most ``MAX_EXAMPLES``."""
    return [example for _, example in tally[key]][:MAX_EXAMPLES]


def merge_tallies(tallies: Sequence[dict]) -> dict:
    """One tally from the tallies of disjoint parts of the rows (whole entities each).

    Keys add up by kind: numbers are summed, except keys ending in ``_max``
    (maximum) and ``_min`` (minimum) of parts that have any; a text (the
    same in every part that gives one, such as the grid's name) is kept;
    dicts are merged
    key by key the same way (per-value counts); ranked example lists
    (``(rank, example)`` pairs) are merged by rank and cut to
    ``MAX_EXAMPLES`` (``FIRST_VALUES`` for a list under ``firsts``).
    """
    out: dict[Any, Any] = {}
    keys = dict.fromkeys(key for tally in tallies for key in tally)
    for key in keys:
        values = [t[key] for t in tallies if key in t]
        first = values[0]
        if isinstance(first, dict):
            out[key] = merge_tallies(values)
        elif isinstance(first, list):
            merged = sorted((pair for value in values for pair in value), key=lambda p: p[0])
            out[key] = merged[:FIRST_VALUES if key == "firsts" else MAX_EXAMPLES]
        elif isinstance(first, str):
            out[key] = next((v for v in values if v), first)
        elif isinstance(key, str) and key.endswith(("_max", "_min")):
            present = [v for v in values if v is not None]
            pick = max if key.endswith("_max") else min
            out[key] = pick(present) if present else None
        else:
            out[key] = sum(values)
    return out
