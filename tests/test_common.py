"""A shared battery every check and every report must pass.

Each check in ``panelprep.checks.CHECKS`` gets a clean fixture (it must stay
silent or say info only) and a broken one (it must flag it); every report is
strict JSON; every finding is well formed.  Adding a check without a broken
fixture here fails ``test_every_check_has_a_broken_fixture``.
"""

from __future__ import annotations

import importlib
import json
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import panelprep
from panelprep.checks import CHECK_IDS, CHECKS, AuditContext
from panelprep.findings import MAX_EXAMPLES, SEVERITIES
from panelprep.index import build_index
from panelprep.io import ReadOptions, read_frame
from panelprep.pipeline import audit, choose_variables

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
KEBAB = re.compile(r"^[a-z][a-z0-9]*(-[a-z0-9]+)*$")
TIME = {"off_grid_monthly.csv": "date", "quarters.csv": "quarter", "months.csv": "month"}

# check id -> (broken fixture, missing tokens to declare)
BROKEN = {
    "key-missing": ("missing_keys.csv", ()),
    "key-conflict": ("conflicting_duplicates.csv", ()),
    "row-repeated": ("exact_duplicates.csv", ()),
    "entity-id-lookalike": ("lookalike_ids.csv", ()),
    "period-holes": ("gaps.csv", ()),
    "period-off-grid": ("off_grid_monthly.csv", ()),
    "panel-shape": ("unbalanced.csv", ()),
    "entity-single-obs": ("singletons.csv", ()),
    "values-not-numeric": ("non_numeric.csv", ()),
    "values-declared-missing": ("non_numeric.csv", ("n/a", "-")),
    "values-nan-missing": ("messages/nan_values.csv", ()),
    # capital in decimal128(38, 2) with 22 significant digits (invented firms)
    "values-decimal-rounded": ("messages/decimal_wide.parquet", ()),
    "values-missing": ("missing_values.csv", ()),
    "sample-new-singletons": ("missing_values.csv", ()),
    "var-fixed-within": ("time_invariant.csv", ()),
    "var-thin-within": ("time_invariant.csv", ()),
    "var-fixed-per-period": ("time_invariant.csv", ()),
}
CLEAN = ["clean_balanced.csv", "months.csv", "semicolon_decimal_comma.csv"]


def context_for(name: str, tokens: tuple[str, ...] = ()) -> AuditContext:
    """The shared context of one fixture, built without running any check."""
    time = TIME.get(name, "year")
    options = ReadOptions(decimal_comma=name.startswith("semicolon"), missing_tokens=tokens)
    frame = read_frame(FIXTURES / name, None, ["firm_id"], time, options)
    names = choose_variables(frame, ["firm_id"], time, None, options.decimal_comma)
    return AuditContext(frame=frame, index=build_index(frame, "firm_id", time), variables=names,
                        decimal_comma=options.decimal_comma, missing_tokens=tokens)


def test_every_check_has_a_broken_fixture():
    assert set(BROKEN) == set(CHECK_IDS)
    assert len(CHECK_IDS) == len(set(CHECK_IDS))


@pytest.mark.parametrize("check", CHECKS, ids=CHECK_IDS)
def test_check_is_well_declared(check):
    assert KEBAB.fullmatch(check.id)
    assert check.severity in SEVERITIES
    assert check.summary and check.summary == check.summary.strip()


@pytest.mark.parametrize("clean", CLEAN)
@pytest.mark.parametrize("check", CHECKS, ids=CHECK_IDS)
def test_check_is_quiet_on_a_clean_fixture(check, clean):
    found = check.run(context_for(clean, ("n/a", "-")))
    assert found is None or found.severity == "info", found and found.message
    if found is not None:
        assert found.count == 0, found.message


@pytest.mark.parametrize("check", CHECKS, ids=CHECK_IDS)
def test_check_flags_its_broken_fixture(check):
    name, tokens = BROKEN[check.id]
    found = check.run(context_for(name, tokens))
    assert found is not None, f"{check.id} said nothing about {name}"
    assert found.id == check.id
    assert found.count > 0
    assert found.severity == check.severity


def fixture_reports():
    for path in sorted(FIXTURES.glob("*.csv")):
        options = ReadOptions(decimal_comma=path.name.startswith("semicolon"))
        time = TIME.get(path.name, "year")
        frame = read_frame(path, None, ["firm_id"], time, options)
        yield path.name, audit(frame, "firm_id", time, decimal_comma=options.decimal_comma)


EDGE_FRAMES = {
    "one-row": pd.DataFrame({"e": ["a"], "t": [1], "x": [1.0]}),
    "one-entity": pd.DataFrame({"e": ["a"] * 3, "t": [1, 2, 3], "x": [1.0, 2.0, 4.0]}),
    "nothing-left": pd.DataFrame({"e": ["a", "b"], "t": [1, 1], "x": [np.nan, np.nan]}),
    "no-time": pd.DataFrame({"e": ["a", "b"], "t": [None, None], "x": [1.0, 2.0]}),
    "no-rows": pd.DataFrame({"e": pd.Series([], dtype=str), "t": pd.Series([], dtype="int64"),
                             "x": pd.Series([], dtype=float)}),
    "constant": pd.DataFrame({"e": ["a", "a", "b", "b"], "t": [1, 2, 1, 2], "x": [0.0] * 4}),
    "infinite": pd.DataFrame({"e": ["a", "a", "b", "b"], "t": [1, 2, 1, 2],
                              "x": [1.0, np.inf, -np.inf, 2.0]}),
    "many-singletons": pd.DataFrame({"e": [f"e{i:02d}" for i in range(30)], "t": [1] * 30,
                                     "x": np.arange(30.0), "c": [7.0] * 30}),
}


def all_reports():
    yield from fixture_reports()
    for name, frame in EDGE_FRAMES.items():
        yield name, audit(frame, "e", "t")


def test_reports_are_strict_json_and_findings_well_formed():
    for name, report in all_reports():
        document = report.to_dict()
        text = json.dumps(document, allow_nan=False)  # no NaN or infinity anywhere
        assert json.loads(text) == document, name
        assert document["verdict"] in ("pass", "fail")
        for finding in document["findings"]:
            assert KEBAB.fullmatch(finding["id"]), (name, finding["id"])
            assert finding["id"] in CHECK_IDS
            assert finding["severity"] in SEVERITIES
            assert isinstance(finding["count"], int) and finding["count"] >= 0
            assert finding["message"] and "\n" not in finding["message"]
            assert len(finding["examples"]) <= MAX_EXAMPLES
            assert all(isinstance(e, dict) for e in finding["examples"])
        ids = [f["id"] for f in document["findings"]]
        assert len(ids) == len(set(ids)), name


def test_examples_are_capped_at_ten():
    report = audit(EDGE_FRAMES["many-singletons"], "e", "t")
    finding = report.finding("entity-single-obs")
    assert finding.count == 30 and len(finding.examples) == MAX_EXAMPLES


def test_nothing_left_to_estimate_fails_the_gate():
    for name in ("nothing-left", "no-time", "no-rows"):
        report = audit(EDGE_FRAMES[name], "e", "t")
        assert report.panel["rows"] == 0
        assert report.verdict == "fail", name


def test_every_public_name_imports():
    module = importlib.import_module("panelprep")
    assert module.__all__, "panelprep.__all__ is empty"
    for name in module.__all__:
        assert getattr(panelprep, name) is not None, name
    namespace: dict = {}
    exec("from panelprep import *", namespace)  # noqa: S102 - what a user would type
    assert set(module.__all__) <= set(namespace)
