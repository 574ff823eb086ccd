"""The version and the JSON Schemas of every JSON document panelprep writes.

The schemas (JSON Schema draft 2020-12) live in ``panelprep/schemas/`` and
ship with the package; ``schemas/json/`` in the repository links to them.
``SCHEMA_VERSION`` is written into every document as ``schema_version``;
``schemas/lock.json`` records, per version, the sha256 of each schema file,
so a schema changed without a new version fails a test
(``tests/test_schemas.py``).
"""

from __future__ import annotations

import json
from importlib import resources
from typing import Any

SCHEMA_VERSION = "1.1"

# document -> schema file
SCHEMAS = {
    "audit": "audit.schema.json",
    "diagnostics": "diagnostics.schema.json",
    "provenance": "provenance.schema.json",
    "log-line": "log-line.schema.json",
    "components": "components.schema.json",
    "comparison": "comparison.schema.json",
    "common": "common.schema.json",
}


def schema_text(file_name: str) -> str:
    """The text of a shipped schema file (or of ``lock.json``)."""
    return resources.files("panelprep").joinpath("schemas", file_name).read_text("utf-8")


def load_schema(document: str) -> dict[str, Any]:
    """The parsed schema of a document kind (a key of ``SCHEMAS``)."""
    return json.loads(schema_text(SCHEMAS[document]))
