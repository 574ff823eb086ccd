"""The JSON Schemas: shipped, versioned, and met by every document panelprep writes.

Documents written by the other tests are validated at the end of the session
(``tests/conftest.py``); here fresh runs of each command are validated, so the
check never rests on what other tests happened to write.
"""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys
from pathlib import Path

import pyarrow.parquet as pq
import pytest
from conftest import schema_validator, written_documents
from jsonschema import Draft202012Validator

from panelprep._schema import SCHEMA_VERSION, SCHEMAS, load_schema, schema_text

ROOT = Path(__file__).resolve().parents[1]
FIXTURES = ROOT / "fixtures"
PANELPREP = Path(sys.executable).with_name("panelprep")


def _cli(*args, cwd=None) -> subprocess.CompletedProcess:
    return subprocess.run([str(PANELPREP), *map(str, args)], cwd=cwd,
                          capture_output=True, text=True, timeout=300, check=False)


def _errors(kind: str, document) -> list[str]:
    return [f"{'/'.join(map(str, e.path))}: {e.message[:200]}"
            for e in schema_validator(kind).iter_errors(document)]


@pytest.mark.parametrize("kind", sorted(SCHEMAS))
def test_every_schema_is_a_valid_draft_2020_12_schema(kind):
    schema = load_schema(kind)
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    Draft202012Validator.check_schema(schema)


def test_the_repository_copies_are_the_shipped_schemas():
    for name in SCHEMAS.values():
        assert (ROOT / "schemas" / "json" / name).read_text("utf-8") == schema_text(name)


def test_a_changed_schema_needs_a_new_schema_version():
    """Each schema's sha256 is recorded under the version it belongs to: editing a schema
    without a new ``SCHEMA_VERSION`` (and a new entry in lock.json) fails here."""
    lock = json.loads(schema_text("lock.json"))["versions"]
    assert SCHEMA_VERSION in lock, f"schema_version {SCHEMA_VERSION} has no entry in lock.json"
    now = {name: hashlib.sha256(schema_text(name).encode("utf-8")).hexdigest()
           for name in SCHEMAS.values()}
    changed = sorted(n for n in now if lock[SCHEMA_VERSION].get(n) != now[n])
    assert not changed, (f"{changed} changed since schema_version {SCHEMA_VERSION} was "
                         "recorded: bump SCHEMA_VERSION and add an entry to lock.json")
    # the version in the schemas is the one the code writes
    assert load_schema("common")["$defs"]["schema_version"]["const"] == SCHEMA_VERSION
    # no two versions share a schema text: a bump always comes with a change
    for version, hashes in lock.items():
        if version != SCHEMA_VERSION:
            assert hashes != lock[SCHEMA_VERSION], version


def test_the_lock_catches_an_edit(tmp_path):
    """The lock comparison is not vacuous: one changed byte changes the hash."""
    text = schema_text("audit.schema.json")
    lock = json.loads(schema_text("lock.json"))["versions"][SCHEMA_VERSION]
    edited = text.replace('"title"', '"title" ', 1)
    assert hashlib.sha256(edited.encode()).hexdigest() != lock["audit.schema.json"]


def test_the_package_ships_the_schemas():
    from importlib import resources

    folder = resources.files("panelprep").joinpath("schemas")
    assert {p.name for p in folder.iterdir() if p.name.endswith(".json")} >= \
        {*SCHEMAS.values(), "lock.json"}


def test_fresh_runs_write_only_valid_documents(tmp_path):
    data = FIXTURES / "clean_balanced.csv"
    report = tmp_path / "audit.json"
    assert _cli("audit", data, "--entity", "firm_id", "--time", "year", "--report",
                report).returncode == 0
    passing = tmp_path / "out"
    done = _cli("prepare", data, "--entity", "firm_id", "--time", "year", "--y", "sales",
                "--x", "capital,staff", "--out", passing, "--transform",
                "within,between,quasi,twoway")
    assert done.returncode == 0, done.stderr
    failing = tmp_path / "bad"
    done = _cli("prepare", FIXTURES / "conflicting_duplicates.csv", "--entity", "firm_id",
                "--time", "year", "--y", "sales", "--x", "capital", "--out", failing)
    assert done.returncode == 1, done.stderr
    found = list(written_documents(tmp_path))
    kinds = sorted(kind for _, kind, _ in found)
    # one audit report, two diagnostics (passing and failed), one provenance per Parquet file
    assert kinds.count("audit") == 1 and kinds.count("diagnostics") == 2
    assert kinds.count("provenance") == len(list(passing.glob("*.parquet"))) == 6
    for path, kind, document in found:
        assert document.get("schema_version") == SCHEMA_VERSION, path
        assert not _errors(kind, document), (path, _errors(kind, document))


def test_components_json_is_valid():
    done = _cli("components", FIXTURES / "clean_balanced.csv", "--entity", "firm_id", "--time",
                "year", "--y", "sales", "--x", "capital,staff", "--json")
    assert done.returncode == 0, done.stderr
    assert not _errors("components", json.loads(done.stdout))


def test_a_document_that_breaks_the_schema_is_refused(tmp_path):
    """The validation can fail: a finding without its id, a gate count below zero."""
    done = _cli("audit", FIXTURES / "clean_balanced.csv", "--entity", "firm_id", "--time",
                "year", "--json")
    document = json.loads(done.stdout)
    assert not _errors("audit", document)
    broken = json.loads(done.stdout)
    broken["gate"]["counts"]["error"] = -1
    assert _errors("audit", broken)
    broken = json.loads(done.stdout)
    broken["schema_version"] = "0.9"
    assert _errors("audit", broken)
    broken = json.loads(done.stdout)
    broken["run"]["started_at"] = "yesterday"
    assert _errors("audit", broken)


def test_parquet_provenance_is_read_from_the_file(tmp_path):
    out = tmp_path / "out"
    assert _cli("prepare", FIXTURES / "clean_balanced.csv", "--entity", "firm_id", "--time",
                "year", "--y", "sales", "--x", "capital,staff", "--out", out).returncode == 0
    meta = json.loads(pq.read_schema(out / "within.parquet").metadata[b"panelprep"])
    assert not _errors("provenance", meta)
