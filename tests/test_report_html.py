"""The HTML report and the data behind its pictures.

Outside checks: the presence map, the rows-per-entity distribution and the
within/between shares are recounted with plain pandas (``crosstab``,
``groupby``) on the fixture files, never with panelprep's own arrays.  The
page itself is checked as a person's browser would parse it, with the
standard library's ``html.parser``.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import re
import subprocess
import sys
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import panelprep
from panelprep.figures import AFTER, BEFORE, HOLE, PRESENT, missing_picture, picture_data
from panelprep.index import build_index
from panelprep.pipeline import load
from panelprep.prepare import PrepareOptions, prepare_frame
from panelprep.report.html import AUDIT_SECTIONS, PREPARATION_SECTIONS, render_html, write_html

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
PREP_PICTURES = ("picture-presence", "picture-flow", "picture-obs", "picture-missing",
                 "picture-share", "picture-theta")
AUDIT_PICTURES = ("picture-presence", "picture-flow", "picture-obs", "picture-missing",
                  "picture-share")
PREP_ONLY = ("story", "components", "evidence", "cautions", "files", "picture-theta")


class _Page(HTMLParser):
    """Ids, resource-bearing attributes and visible text of a page."""

    def __init__(self) -> None:
        super().__init__()
        self.ids: list[str] = []
        self.links: list[tuple[str, str, str]] = []
        self.text: list[str] = []
        self.tags: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        for name, value in attrs:
            if name == "id":
                self.ids.append(value)
            if name in ("src", "href", "xlink:href", "srcset", "action", "poster", "data"):
                self.links.append((tag, name, value or ""))

    def handle_data(self, data):
        self.text.append(data)


def _parse(page: str) -> _Page:
    parser = _Page()
    parser.feed(page)
    parser.close()
    return parser


def _preparation(name: str = "gaps.csv", **policies) -> tuple[dict, dict]:
    """A preparation summary of a fixture and its pictures, as prepare would pass them."""
    from panelprep.clean import Policies

    options = PrepareOptions(entity=["firm_id"], time="year", y="sales", x=["capital", "staff"],
                             policies=Policies(**policies))
    frame, info = load(FIXTURES / name, options.entity, options.time, options.variables)
    prep = prepare_frame(frame, options, info)
    summary = dict(prep.summary)
    summary["files"] = [{"name": f"{t}.parquet", "rows": len(prep.tables[t]), "sha256": "0" * 64}
                        for t in prep.tables]
    if not prep.tables:
        return summary, picture_data(prep.audit.context)
    sample = build_index(prep.tables["clean"], options.entity, options.time,
                         summary["keys"]["freq"])
    pictures = picture_data(sample, theta=prep.components.theta_, variation=summary["variables"],
                            missing=missing_picture(prep.audit.context))
    return summary, pictures


def _audit(name: str = "gaps.csv") -> tuple[dict, dict]:
    report = panelprep.audit_file(FIXTURES / name, "firm_id", "year")
    return report.to_dict(), picture_data(report.context)


@pytest.fixture(scope="module")
def prep_page() -> str:
    return render_html(*_preparation())


@pytest.fixture(scope="module")
def audit_page() -> str:
    return render_html(*_audit())


# ------------------------------------------------------------------ sections


def test_preparation_page_has_every_section_and_picture(prep_page):
    page = _parse(prep_page)
    for sid in (*PREPARATION_SECTIONS, *PREP_PICTURES):
        assert sid in page.ids, sid
    assert len(page.ids) == len(set(page.ids)), "element ids must be unique on the page"
    assert page.tags.count("svg") == len(PREP_PICTURES)
    text = " ".join(page.text)
    assert "Evidence, not a verdict." in text
    assert "These tests are evidence, not a verdict" in text


def test_our_own_tables_and_words_replace_the_old_layouts(prep_page):
    page = _parse(prep_page)
    for tid in ("table-spells", "table-bands", "table-describe", "table-where", "table-theta"):
        assert tid in page.ids, tid
    text = " ".join(page.text)
    for gone in ("Most common presence patterns", "entity effect variance",
                 "entity share s2_u", "sd overall", "■"):
        assert gone not in text, gone
    for words in ("before entry", "hole inside the span", "after exit", "observed",
                  "Where the variation lies", "Where the error variance sits",
                  "share of the error variance at entity level"):
        assert words in text, words
    # the closing line of the text log stands in the page's header too
    assert re.search(r"PASS: \d+ errors?, \d+ warnings?, \d+ notes?; exit 0", text)


def test_a_failing_finding_names_what_addresses_it():
    summary, pictures = _preparation("conflicting_duplicates.csv")
    text = " ".join(_parse(render_html(summary, pictures)).text)
    assert "Fails the gate. What addresses it: --duplicates keep-first, keep-last or mean" in text
    assert "FAIL: 1 error (key-conflict)" in text and "; exit 1" in text


def test_audit_page_has_only_the_audit_sections(audit_page):
    page = _parse(audit_page)
    for sid in (*AUDIT_SECTIONS, *AUDIT_PICTURES):
        assert sid in page.ids, sid
    for sid in PREP_ONLY:
        assert sid not in page.ids, sid
    assert page.tags.count("svg") == len(AUDIT_PICTURES)
    assert len(page.ids) == len(set(page.ids))


def test_failed_gate_preparation_has_story_cautions_and_no_components():
    summary, pictures = _preparation("conflicting_duplicates.csv")
    assert summary["verdict"] == "fail"
    assert pictures["theta"] is None
    page = _parse(render_html(summary, pictures))
    for sid in ("story", "findings", "panel", "variation", "cautions", "files"):
        assert sid in page.ids, sid
    for sid in ("components", "evidence", "picture-theta"):
        assert sid not in page.ids, sid
    assert "No data files were written." in " ".join(page.text)


# ------------------------------------------------------------------ self-contained


@pytest.mark.parametrize("which", ["prep_page", "audit_page"])
def test_page_references_nothing_on_the_network(which, request):
    page_text = request.getfixturevalue(which)
    page = _parse(page_text)
    for tag, name, value in page.links:
        assert value.startswith(("#", "data:image/png;base64,")), (tag, name, value[:80])
    for target in re.findall(r"url\(\s*['\"]?([^'\")]*)", page_text):
        assert target.startswith("#"), target
    assert "@import" not in page_text
    assert "<script" not in page_text and "<link" not in page_text
    # the only web addresses left are XML namespace names, which nothing fetches
    for match in re.finditer(r"https?://", page_text):
        before = page_text[max(0, match.start() - 20):match.start()]
        assert re.search(r'xmlns(:\w+)?="$', before), page_text[match.start() - 40:match.end() + 40]


def test_user_text_is_escaped():
    frame = pd.DataFrame({
        "firm": ["<b>x</b>", "<b>x</b>", "a&b", "a&b", "solo\"'"],
        "year": [2001, 2002, 2001, 2002, 2001],
        "<i>sales</i>": [1.0, 2.0, 3.0, 5.0, 4.0],
    })
    report = panelprep.audit(frame, "firm", "year",
                             input_info={"path": "in<put>.csv", "sha256": None, "rows": 5})
    summary = report.to_dict()
    page_text = render_html(summary, picture_data(report.context))
    assert "<b>x</b>" not in page_text and "<i>sales</i>" not in page_text
    assert "&lt;i&gt;sales&lt;/i&gt;" in page_text
    assert "in&lt;put&gt;.csv" in page_text
    assert "solo&quot;&#x27;" in page_text
    # the parsed page shows the original texts back to a reader
    text = " ".join(_parse(page_text).text)
    assert "<i>sales</i>" in text and "in<put>.csv" in text
    # an example of the singleton finding names the entity, escaped
    singles = next(f for f in summary["findings"] if f["id"] == "entity-single-obs")
    assert singles["examples"][0]["entity"] == "solo\"'"


# ------------------------------------------------------------------ determinism


def test_same_input_gives_the_same_page(tmp_path):
    summary, pictures = _preparation()
    first = render_html(summary, pictures)
    assert render_html(*_preparation()) == first
    # and from the JSON form of the same input, in a fresh interpreter with another hash seed
    source = tmp_path / "input.json"
    source.write_text(json.dumps([summary, pictures], allow_nan=False), encoding="utf-8")
    script = ("import json, sys, hashlib; from panelprep.report.html import render_html; "
              "s, p = json.load(open(sys.argv[1], encoding='utf-8')); "
              "print(hashlib.sha256(render_html(s, p).encode()).hexdigest())")
    out = subprocess.run([sys.executable, "-c", script, str(source)], capture_output=True,
                         text=True, check=True, env={**os.environ, "PYTHONHASHSEED": "2718"})
    assert out.stdout.strip() == hashlib.sha256(first.encode()).hexdigest()


def test_write_html_writes_the_page_atomically(tmp_path):
    summary, pictures = _audit()
    path = write_html(tmp_path / "report.html", summary, pictures)
    assert path.read_text(encoding="utf-8") == render_html(summary, pictures)
    assert [p.name for p in tmp_path.iterdir()] == ["report.html"]


# ------------------------------------------------------------------ edge cases


@pytest.mark.parametrize("rows", [
    {"firm": ["a"], "year": [2000], "v": [1.0]},                            # 1 entity, 1 period
    {"firm": ["a", "a", "a"], "year": [2000, 2001, 2003], "v": [1.0, 2.0, 2.0]},  # 1 entity
    {"firm": ["a", "b", "c"], "year": [2000, 2000, 2000], "v": [1.0, 2.0, 4.0]},  # 1 period
    {"firm": ["a", "b"], "year": [2000, 2001], "v": [np.nan, np.nan]},      # empty sample
])
def test_tiny_panels_render(rows):
    frame = pd.DataFrame(rows)
    report = panelprep.audit(frame, "firm", "year")
    pictures = picture_data(report.context)
    json.dumps(pictures, allow_nan=False)
    page = _parse(render_html(report.to_dict(), pictures))
    for sid in (*AUDIT_SECTIONS, *AUDIT_PICTURES):
        assert sid in page.ids


def test_empty_findings_and_none_values_render():
    summary, pictures = _audit()
    summary["findings"] = []
    summary["input"] = {"path": None, "sha256": None, "rows": None}
    summary["keys"]["freq"] = None
    for row in summary["variables"].values():
        row.update(dict.fromkeys(("mean", "sd_overall", "sd_between", "sd_within", "min", "max",
                                  "varying_share")))
    pictures["share"]["variables"] = {n: {"within": None, "between": None}
                                      for n in summary["variables"]}
    page_text = render_html(summary, pictures)
    page = _parse(page_text)
    assert "No findings." in " ".join(page.text)
    assert "None" not in " ".join(page.text)
    assert "picture-share" in page.ids


def test_gate_failed_after_the_components_still_tells_the_story():
    # dropping singletons leaves 3 entities, too few for the components: an error
    summary, pictures = _preparation("singletons.csv", singletons="drop")
    assert summary["verdict"] == "fail" and summary["components"]
    page_text = render_html(summary, pictures)
    page = _parse(page_text)
    for sid in ("story", "components", "evidence", "files"):
        assert sid in page.ids, sid
    dropped = summary["dropped"]["by_reason"]["singleton"]
    assert dropped > 0
    assert f"<code>singleton</code> {dropped}" in page_text
    assert '<span class="badge error">error</span><' in page_text


# ------------------------------------------------------------------ picture data


def _plain_presence(name: str) -> pd.DataFrame:
    """Entity x year cell states of a clean fixture, by pandas alone, rows by entry then exit.

    Observed where the entity has a row; before entry / after exit outside
    its first and last year; a hole inside.
    """
    raw = pd.read_csv(FIXTURES / name, dtype={"firm_id": str})
    years = range(raw["year"].min(), raw["year"].max() + 1)
    seen = pd.crosstab(raw["firm_id"], raw["year"]).reindex(columns=years, fill_value=0) > 0
    first = raw.groupby("firm_id")["year"].min()
    last = raw.groupby("firm_id")["year"].max()
    grid = np.array(list(years))[None, :]
    states = np.where(seen, PRESENT, np.where(grid < first.loc[seen.index].to_numpy()[:, None],
                                              BEFORE,
                                              np.where(grid > last.loc[seen.index]
                                                       .to_numpy()[:, None], AFTER, HOLE)))
    table = pd.DataFrame(states, index=seen.index, columns=list(years))
    order = pd.DataFrame({"first": first, "last": last}).loc[seen.index]
    order = order.assign(key=order.index).sort_values(["first", "last", "key"])
    return table.loc[order.index]


def test_presence_map_matches_a_pandas_crosstab():
    expected = _plain_presence("gaps.csv")
    presence = picture_data(panelprep.audit_file(FIXTURES / "gaps.csv", "firm_id", "year")
                            .context)["presence"]
    assert presence["entities"] == list(expected.index)
    assert presence["periods"] == [str(y) for y in expected.columns]
    assert presence["states"] == expected.to_numpy().tolist()
    assert {HOLE, PRESENT} <= set(expected.to_numpy().ravel().tolist())
    assert presence["legend"] == {"0": "before entry", "1": "observed",
                                  "2": "hole inside the span", "3": "after exit"}
    assert presence["entity_step"] == 1 and presence["period_block"] == 1
    assert "all 5 entities" in presence["rule"]


def test_presence_sampling_and_period_blocks_follow_the_stated_rule():
    expected = _plain_presence("gaps.csv")  # 5 entities x 8 years
    context = panelprep.audit_file(FIXTURES / "gaps.csv", "firm_id", "year").context
    presence = picture_data(context, max_entities=2, max_periods=3)["presence"]
    k = math.ceil(5 / 2)   # every k-th entity of the entry-exit order from the first
    m = math.ceil(8 / 3)   # blocks of m consecutive years
    assert presence["entity_step"] == k and presence["period_block"] == m
    assert presence["entities"] == list(expected.index[::k])
    blocks = np.arange(expected.shape[1]) // m

    def block_state(states: pd.Series) -> int:
        # observed if any year of the block is; else outside the span if the whole block is
        values = set(states.tolist())
        if PRESENT in values:
            return PRESENT
        return HOLE if HOLE in values else values.pop()

    grouped = expected.T.groupby(blocks).agg(block_state).T.iloc[::k]
    assert presence["states"] == grouped.to_numpy().tolist()
    assert presence["periods"] == ["2010–2012", "2013–2015", "2016–2017"]
    assert f"then key (k = {k})" in presence["rule"]
    assert f"blocks of {m} consecutive periods" in presence["rule"]


def test_rows_per_entity_match_pandas_groupby():
    raw = pd.read_csv(FIXTURES / "gaps.csv", dtype={"firm_id": str})
    sizes = raw.groupby("firm_id").size().value_counts().sort_index()
    obs = picture_data(panelprep.audit_file(FIXTURES / "gaps.csv", "firm_id", "year")
                       .context)["obs_per_entity"]
    assert obs["rows"] == {"values": sizes.index.tolist(), "entities": sizes.tolist()}
    assert obs["periods"] == obs["rows"]  # no repeated keys in this fixture


def test_within_between_share_matches_pandas():
    raw = pd.read_csv(FIXTURES / "gaps.csv", dtype={"firm_id": str})
    share = picture_data(panelprep.audit_file(FIXTURES / "gaps.csv", "firm_id", "year")
                         .context)["share"]["variables"]
    n, n_entities = len(raw), raw["firm_id"].nunique()
    for name in ("sales", "capital", "staff"):
        groups = raw.groupby("firm_id")[name]
        within_var = ((raw[name] - groups.transform("mean")) ** 2).sum() / (n - n_entities)
        between_var = groups.mean().var(ddof=1)
        expected = within_var / (within_var + between_var)
        assert share[name]["within"] == pytest.approx(expected, rel=1e-12)
        assert share[name]["between"] == pytest.approx(1 - expected, rel=1e-12)


def test_theta_distribution_and_alignment():
    summary, pictures = _preparation()
    theta = pictures["theta"]
    counts = pd.read_csv(FIXTURES / "gaps.csv", dtype={"firm_id": str}).groupby("firm_id").size()
    # theta of the shown rows, in the presence map's order (by entry, then exit)
    counts = counts.loc[pictures["presence"]["entities"]]
    c = summary["components"]
    # theta_i = 1 - sqrt(s2_e / (T_i s2_u + s2_e)) recomputed from the published components
    expected = 1 - np.sqrt(c["sigma2_idiosyncratic"]
                           / (counts.to_numpy() * c["sigma2_entity"] + c["sigma2_idiosyncratic"]))
    assert theta["shown"] == pytest.approx(expected.tolist(), rel=1e-12)
    assert sum(theta["entities"]) == len(counts)
    assert theta["median"] == pytest.approx(float(np.median(expected)), rel=1e-12)


def test_theta_of_the_wrong_length_is_refused():
    context = panelprep.audit_file(FIXTURES / "gaps.csv", "firm_id", "year").context
    with pytest.raises(ValueError, match="theta has 3 values for 5 entities"):
        picture_data(context, theta=np.zeros(3))
