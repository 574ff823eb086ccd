"""panelprep: audit, clean and transform entity-by-period panels before any model is fitted.

The public names load on first use (PEP 562), so ``import panelprep`` and the
command line start without pandas, pyarrow or scipy until a command needs them.
"""

from __future__ import annotations

from importlib import import_module
from typing import TYPE_CHECKING, Any

from panelprep._version import __version__
from panelprep.errors import InputError

if TYPE_CHECKING:
    from panelprep.index import PanelIndex, build_index
    from panelprep.pipeline import AuditReport, audit, audit_file

_LAZY = {
    "AuditReport": "panelprep.pipeline",
    "audit": "panelprep.pipeline",
    "audit_file": "panelprep.pipeline",
    "PanelIndex": "panelprep.index",
    "build_index": "panelprep.index",
}

__all__ = [
    "AuditReport",
    "InputError",
    "PanelIndex",
    "__version__",
    "audit",
    "audit_file",
    "build_index",
]


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        value = getattr(import_module(_LAZY[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'panelprep' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted([*globals(), *_LAZY])
