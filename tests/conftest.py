"""Shared fixtures: the Grunfeld investment panel and random unbalanced panels."""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pytest

# Property tests keep their example counts small so CI stays quick;
# PANELPREP_FUZZ_SCALE=50 multiplies every count for a longer local fuzz.
FUZZ_SCALE = max(1, int(os.environ.get("PANELPREP_FUZZ_SCALE", "1")))


# The suite's runs show no progress unless a test asks for it (tests/test_verdict.py
# does, with the variable removed): many tests read the one error line on stderr.  A user's
# run prints plain progress lines on a pipe by default.
os.environ["PANELPREP_PROGRESS"] = "none"


def examples(count: int) -> int:
    """A property test's example count, scaled for a longer local fuzz."""
    return count * FUZZ_SCALE


@pytest.fixture(scope="session")
def grunfeld() -> pd.DataFrame:
    """Grunfeld investment data as shipped with statsmodels, without 'American Steel'.

    10 firms x 20 years (1935-1954); columns invest, value, capital, firm, year.
    This is the 10-firm version used in the textbook worked examples.
    """
    from statsmodels.datasets import grunfeld as source

    frame = source.load_pandas().data
    frame = frame[frame["firm"] != "American Steel"].reset_index(drop=True)
    frame["year"] = frame["year"].astype(np.int64)
    return frame


@dataclass(frozen=True)
class Panel:
    """A generated panel: dense codes, counts and the regressor block."""

    entity: np.ndarray
    period: np.ndarray
    counts: np.ndarray
    n_entities: int
    n_periods: int
    X: np.ndarray

    @property
    def n(self) -> int:
        return len(self.entity)


def random_unbalanced_panel(
    seed: int,
    n_entities: int = 25,
    n_periods: int = 9,
    keep: float = 0.6,
    k: int = 2,
    singletons: int = 3,
) -> Panel:
    """Unbalanced panel with gaps, varying T_i and some single-row entities.

    Each entity keeps a random subset of the periods (probability ``keep``,
    at least one row); the last ``singletons`` entities keep exactly one row.
    Rows are shuffled so nothing relies on sorted input.
    """
    rng = np.random.default_rng(seed)
    entity = np.repeat(np.arange(n_entities), n_periods)
    period = np.tile(np.arange(n_periods), n_entities)
    mask = rng.random(len(entity)) < keep
    first = np.arange(n_entities) * n_periods + rng.integers(0, n_periods, n_entities)
    mask[first] = True
    lone = entity >= n_entities - singletons
    mask[lone] = False
    mask[first[n_entities - singletons :]] = True
    entity, period = entity[mask], period[mask]
    order = rng.permutation(len(entity))
    entity, period = entity[order], period[order]
    counts = np.bincount(entity, minlength=n_entities)
    X = rng.normal(size=(len(entity), k)) + 0.5 * entity[:, None] / n_entities
    X += 0.3 * period[:, None] / n_periods
    return Panel(
        entity=entity.astype(np.int64),
        period=period.astype(np.int64),
        counts=counts,
        n_entities=n_entities,
        n_periods=n_periods,
        X=np.asfortranarray(X),
    )


@pytest.fixture
def make_panel():
    """Factory for :func:`random_unbalanced_panel`."""
    return random_unbalanced_panel


# --- JSON Schemas: every document a run of the suite writes is validated ---------------


def schema_validator(kind: str):
    """A draft 2020-12 validator for a document kind of ``panelprep._schema.SCHEMAS``,
    with the shipped schemas as the registry its references resolve in."""
    from jsonschema import Draft202012Validator
    from referencing import Registry, Resource

    from panelprep._schema import SCHEMAS, load_schema

    resources = []
    for name in SCHEMAS:
        schema = load_schema(name)
        resources.append((schema["$id"], Resource.from_contents(schema)))
    return Draft202012Validator(load_schema(kind), registry=Registry().with_resources(resources),
                                format_checker=Draft202012Validator.FORMAT_CHECKER)


def document_kind(document) -> str | None:
    """Which schema a JSON document written by panelprep answers to (None: not ours)."""
    if not isinstance(document, dict) or document.get("tool", {}).get("name") != "panelprep":
        return None
    if "tolerance" in document and "old" in document:
        return "comparison"
    return "diagnostics" if "files" in document or "steps" in document else "audit"


def written_documents(folder):
    """(path, kind, document) for every panelprep JSON file and Parquet provenance under folder."""
    import json
    from pathlib import Path

    import pyarrow.parquet as pq

    for path in Path(folder).rglob("*"):
        if path.is_symlink() or not path.is_file():
            continue
        if path.suffix == ".json":
            try:
                document = json.loads(path.read_text(encoding="utf-8"))
            except (UnicodeDecodeError, ValueError):
                continue
            kind = document_kind(document)
            if kind is not None:
                yield path, kind, document
        elif path.suffix == ".parquet":
            try:
                metadata = pq.read_schema(path).metadata or {}
            except (OSError, ValueError):  # a test's deliberately broken file is not ours
                metadata = {}
            if b"panelprep" in metadata:
                yield path, "provenance", json.loads(metadata[b"panelprep"])


@pytest.fixture(scope="session", autouse=True)
def _every_written_document_matches_its_schema(tmp_path_factory):
    """At the end of the session: every report, diagnostics file and Parquet provenance
    the suite's runs wrote under the session's temporary folder validates."""
    yield
    validators = {}
    bad = []
    for path, kind, document in written_documents(tmp_path_factory.getbasetemp()):
        validator = validators.setdefault(kind, schema_validator(kind))
        errors = sorted(validator.iter_errors(document), key=lambda e: list(e.path))
        if errors:
            first = errors[0]
            bad.append(f"{path} ({kind}): {'/'.join(map(str, first.path))}: {first.message[:300]}")
    assert not bad, f"{len(bad)} written document(s) do not match their schema:\n" + "\n".join(bad[:20])
