"""Words and numbers for people: plurals, counts, p-values.

Every message and rendering writes a count through :func:`plural` ("1
entity", "3 entities"), never "entit(ies)"; p-values go through
:func:`p_text`, so an underflowing p-value reads "< 1e-16", never "0".
Imports nothing from the package, so any module may use it.
"""

from __future__ import annotations

import math

# the words whose plural is not the singular plus "s"
_IRREGULAR = {"entity": "entities", "entities": "entities", "is": "are", "has": "have",
              "was": "were", "this": "these", "repeats": "repeat", "varies": "vary",
              "changes": "change", "differs": "differ"}

# below this a p-value is beyond what float64 tells apart from 1 - p
P_FLOOR = 1e-16


def plural_word(n: int, word: str) -> str:
    """``word`` in the number ``n`` asks for: ``plural_word(2, "entity")`` is "entities"."""
    if n == 1:
        return word
    if word in _IRREGULAR:
        return _IRREGULAR[word]
    if word.endswith(("s", "x", "sh", "ch")):
        return word + "es"
    return word + "s"


def plural(n: int, word: str) -> str:
    """The count and its noun: "1 entity", "1,204 entities", "0 rows"."""
    return f"{n:,} {plural_word(n, word)}"


def p_text(p: float | None) -> str:
    """A p-value for a person: "0.032", "4.1e-07", "< 1e-16" when it underflows; "-" when absent.

    A p-value below ``P_FLOOR`` (1e-16) is shown as a bound: beyond it the
    tail area is smaller than float64 resolves next to 1, and a computed 0 is
    an underflow, not a certainty.
    """
    if p is None or (isinstance(p, float) and math.isnan(p)):
        return "-"
    if p < P_FLOOR:
        return "< 1e-16"
    if p >= 0.001:
        return f"{p:.3f}"
    return f"{p:.2g}"


def p_phrase(p: float | None, name: str = "p") -> str:
    """``name`` and its p-value as a phrase: "p = 0.032", "p < 1e-16"."""
    text = p_text(p)
    return f"{name} {text}" if text.startswith("<") else f"{name} = {text}"
