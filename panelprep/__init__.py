"""panelprep: audit, clean and transform entity-by-period panels before any model is fitted."""

from panelprep._version import __version__
from panelprep.errors import InputError
from panelprep.index import PanelIndex, build_index
from panelprep.pipeline import AuditReport, audit, audit_file

__all__ = [
    "AuditReport",
    "InputError",
    "PanelIndex",
    "__version__",
    "audit",
    "audit_file",
    "build_index",
]
