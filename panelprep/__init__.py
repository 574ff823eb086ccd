"""panelprep: audit, clean and transform entity-by-period panels before any model is fitted."""

from panelprep.errors import InputError
from panelprep.index import PanelIndex, build_index

__version__ = "0.1.0"

__all__ = ["InputError", "PanelIndex", "build_index", "__version__"]
