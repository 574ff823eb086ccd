"""The HTML report: one self-contained page a person opens in a browser.

Everything the page needs is inside it: the style sheet, and the pictures as
inline SVG written by :mod:`panelprep.report.svg` (plain elements, text in the
browser's own font).  The page references nothing on the network, and the
same input gives byte-identical output.  Every text that comes from the data
or the user (ids, column names, paths, messages) goes through
``html.escape``.

Sections carry stable ids: ``story``, ``findings``, ``panel``, ``variation``,
``components``, ``evidence``, ``cautions`` and ``files``; the pictures are
``picture-presence``, ``picture-flow``, ``picture-obs``, ``picture-missing``
(when there is a variable), ``picture-share`` and ``picture-theta``; the
panel section's coverage tables are ``table-spells`` and ``table-bands``, the
variation section's ``table-describe`` and ``table-where``.  An audit has no
``story``, ``components``, ``evidence``, ``picture-theta``, and has
``cautions``/``files`` only when its summary does.
"""

from __future__ import annotations

import html
import math
import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from panelprep.findings import SEVERITIES
from panelprep.io import write_file
from panelprep.report import (
    BETWEEN_VARIANCE_SHARE,
    WITHIN_SD_RATIO,
    WITHIN_VARIANCE_SHARE,
    describe_cells,
    failing_ids,
    hint_for,
    resolved_note,
    rows_words,
    runs_words,
    sample_words,
    spell_words,
    transform_details,
    unidentified_note,
)
from panelprep.report.text import verdict_line
from panelprep.words import p_text, plural

# Our palette: paper background, ink text, a deep teal for what is there and
# copper for its counterpart (between variation), plus one hue per severity.
PAPER = "#faf8f3"
INK = "#1c2330"
MUTED = "#5b6472"
RULE = "#e2ddd2"
TEAL = "#1f6f6b"
COPPER = "#c2703d"
ABSENT = "#ece6d9"
# the presence map's four cell states (figures.STATE_WORDS): before entry a cool
# grey, observed teal, a hole copper, after exit a warm grey
STATE_COLOURS = {0: "#e3e9ee", 1: TEAL, 2: COPPER, 3: "#efe4d2"}
SEVERITY_COLOURS = {"error": "#a8322d", "warning": "#a86a12", "info": "#3f6396"}

AUDIT_SECTIONS = ("findings", "panel", "variation")
PREPARATION_SECTIONS = ("story", "findings", "panel", "variation", "components", "evidence",
                        "cautions", "files")

_TESTS = (("breusch_pagan", "Breusch-Pagan LM"), ("honda", "Honda"), ("mundlak", "Mundlak"),
          ("hausman", "Hausman"), ("wooldridge", "Wooldridge serial correlation (F)"),
          ("born_breitung", "Born-Breitung LM serial correlation"),
          ("pesaran_cd", "Pesaran CD cross-sectional dependence"))

_CSS = f"""
:root {{
  --paper: {PAPER}; --ink: {INK}; --muted: {MUTED}; --rule: {RULE}; --teal: {TEAL};
  --copper: {COPPER}; --error: {SEVERITY_COLOURS["error"]};
  --warning: {SEVERITY_COLOURS["warning"]};
  --info: {SEVERITY_COLOURS["info"]}; --pass: #2f7d4f; --card: #ffffff;
}}
* {{ box-sizing: border-box; }}
html {{ background: var(--paper); }}
body {{
  margin: 0; color: var(--ink); font: 15px/1.55 system-ui, -apple-system, "Segoe UI", Roboto,
  "Helvetica Neue", Arial, sans-serif; -webkit-font-smoothing: antialiased;
}}
code, .mono, td.num {{ font-family: ui-monospace, "SFMono-Regular", Menlo, Consolas,
  "Liberation Mono", monospace; font-size: 0.88em; }}
td.num {{ text-align: right; white-space: pre; font-variant-numeric: tabular-nums; }}
header.top {{
  background: var(--ink); color: #f4f1ea; padding: 28px 0 22px;
  border-bottom: 5px solid var(--teal);
}}
.wrap {{ max-width: 1120px; margin: 0 auto; padding: 0 28px; }}
.brand {{ letter-spacing: .14em; text-transform: uppercase; font-size: 12px; color: #b9c3cf; }}
h1 {{ margin: 4px 0 14px; font-size: 28px; font-weight: 650; letter-spacing: -.01em; }}
.verdict {{
  display: inline-block; padding: 3px 14px; border-radius: 999px; font-weight: 700;
  letter-spacing: .08em; font-size: 14px; vertical-align: middle; margin-left: 12px;
}}
.verdict.pass {{ background: var(--pass); color: #fff; }}
.verdict.fail {{ background: var(--error); color: #fff; }}
dl.meta {{ display: grid; grid-template-columns: max-content 1fr; gap: 4px 18px; margin: 0;
  font-size: 14px; }}
dl.meta dt {{ color: #9fabb9; }}
dl.meta dd {{ margin: 0; overflow-wrap: anywhere; }}
nav.toc {{ position: sticky; top: 0; z-index: 2; background: rgba(250, 248, 243, .96);
  border-bottom: 1px solid var(--rule); backdrop-filter: blur(4px); }}
nav.toc .wrap {{ display: flex; flex-wrap: wrap; gap: 4px 20px; padding-top: 9px;
  padding-bottom: 9px; font-size: 13.5px; }}
nav.toc a {{ color: var(--teal); text-decoration: none; font-weight: 560; }}
nav.toc a:hover {{ text-decoration: underline; }}
main {{ padding: 10px 0 50px; }}
section {{ background: var(--card); border: 1px solid var(--rule); border-radius: 10px;
  padding: 20px 26px 22px; margin: 22px 0; }}
h2 {{ font-size: 19px; margin: 0 0 4px; font-weight: 650; }}
h2 + p.lead {{ margin-top: 0; }}
h3 {{ font-size: 15px; margin: 20px 0 6px; }}
p.lead, .note {{ color: var(--muted); }}
.note {{ font-size: 13.5px; }}
table {{ border-collapse: collapse; width: 100%; margin: 10px 0 4px; font-size: 14px; }}
th {{ text-align: left; font-weight: 600; color: var(--muted); font-size: 12.5px;
  text-transform: uppercase; letter-spacing: .04em; border-bottom: 2px solid var(--rule);
  padding: 6px 10px; }}
th.num {{ text-align: right; }}
td {{ padding: 6px 10px; border-bottom: 1px solid var(--rule); vertical-align: top; }}
tr:last-child td, table.kv tr:last-child th {{ border-bottom: none; }}
table.kv th {{ width: 38%; text-transform: none; letter-spacing: 0; font-size: 14px;
  color: var(--ink); font-weight: 500; border-bottom: 1px solid var(--rule); }}
.scroll {{ overflow-x: auto; }}
.badge {{ display: inline-block; min-width: 74px; text-align: center; padding: 2px 8px;
  border-radius: 4px; font-size: 11.5px; font-weight: 700; letter-spacing: .07em;
  text-transform: uppercase; color: #fff; }}
.badge.error {{ background: var(--error); }}
.badge.warning {{ background: var(--warning); }}
.badge.info {{ background: var(--info); }}
.counts {{ display: flex; flex-wrap: wrap; gap: 10px; margin: 8px 0 4px; }}
.count {{ border: 1px solid var(--rule); border-radius: 8px; padding: 6px 14px;
  font-size: 13.5px; }}
.count b {{ font-size: 18px; margin-right: 6px; }}
.count.error b {{ color: var(--error); }}
.count.warning b {{ color: var(--warning); }}
.count.info b {{ color: var(--info); }}
.count.resolved b {{ color: var(--pass); }}
details summary {{ cursor: pointer; color: var(--teal); font-size: 13px; }}
details ul {{ margin: 4px 0 0; padding-left: 18px; font-size: 13px; color: var(--muted); }}
.flow {{ display: flex; flex-wrap: wrap; align-items: stretch; gap: 12px; margin: 10px 0 6px; }}
.stat {{ flex: 1 1 180px; border-left: 4px solid var(--teal); background: #f3f7f6;
  padding: 8px 14px; border-radius: 0 8px 8px 0; }}
.stat.before {{ border-left-color: var(--copper); background: #fbf4ee; }}
.stat .big {{ font-size: 22px; font-weight: 650; display: block; }}
.stat .small {{ color: var(--muted); font-size: 13px; }}
.arrow {{ align-self: center; font-size: 24px; color: var(--muted); }}
.minus {{ color: var(--error); }}
.caution {{ border-left: 4px solid var(--warning); background: #fdf6ea; padding: 10px 16px;
  border-radius: 0 8px 8px 0; margin: 14px 0 4px; }}
ul.cautions {{ padding-left: 20px; margin: 8px 0 0; }}
ul.cautions li {{ margin: 6px 0; }}
ol.reading {{ padding-left: 22px; }}
ol.reading li {{ margin: 6px 0; }}
figure {{ margin: 18px 0 6px; }}
figure .plot svg {{ max-width: 100%; height: auto; display: block; }}
figure .plot {{ max-width: 980px; }}
figcaption {{ color: var(--muted); font-size: 13.5px; margin-top: 6px; }}
figcaption b {{ color: var(--ink); }}
.hint {{ color: var(--muted); font-size: 13px; margin: 4px 0 0; }}
.hint.fails {{ color: var(--error); }}
p.closing {{ margin: 10px 0 0; font-family: ui-monospace, Menlo, Consolas, monospace;
  font-size: 13.5px; color: #f4f1ea; }}
.nowrap {{ white-space: nowrap; }}
.empty {{ color: var(--muted); font-style: italic; }}
footer {{ color: var(--muted); font-size: 12.5px; padding: 0 0 40px; }}
@media print {{ nav.toc {{ display: none; }} section {{ break-inside: avoid; }} }}
"""


def _e(value: Any) -> str:
    """Escaped text of any value; None is shown as a dash."""
    return "–" if value is None else html.escape(str(value), quote=True)


def _num(value: Any, digits: int = 4) -> str:
    """A number for a person: thousands separators, at most ``digits`` decimals."""
    if value is None:
        return "–"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        if not math.isfinite(value):
            return _e(value)
        if value != 0 and (abs(value) >= 1e9 or abs(value) < 1e-3):
            return f"{value:.{digits}g}"
        return f"{value:,.{digits}f}".rstrip("0").rstrip(".")
    return _e(value)


def _plain(value: Any) -> str:
    """A value of the data (a year, a code, a mean): no thousands separators."""
    if isinstance(value, float) and math.isfinite(value) and not (
            value != 0 and (abs(value) >= 1e9 or abs(value) < 1e-3)):
        return f"{value:.4f}".rstrip("0").rstrip(".")
    return _num(value)


def _pct(share: float | None) -> str:
    return "–" if share is None else f"{100 * share:.1f}%"


def _ratio(ratio: float | None) -> str:
    return "–" if ratio is None else f"{ratio:.3f}"


def _table(header: list[str], rows: list[list[str]], numeric: set[int] = frozenset(),
           cls: str = "", tid: str = "") -> str:
    """A table from already escaped cells; columns in ``numeric`` align right."""
    head = "".join(f'<th class="num">{h}</th>' if i in numeric else f"<th>{h}</th>"
                   for i, h in enumerate(header))
    body = "".join(
        "<tr>" + "".join(f'<td class="num">{c}</td>' if i in numeric else f"<td>{c}</td>"
                         for i, c in enumerate(row)) + "</tr>"
        for row in rows
    )
    ident = f' id="{tid}"' if tid else ""
    return (f'<div class="scroll"><table{ident} class="{cls}"><thead><tr>{head}</tr></thead>'
            f"<tbody>{body}</tbody></table></div>")


def _kv(rows: list[tuple[str, str]]) -> str:
    body = "".join(f"<tr><th>{k}</th><td>{v}</td></tr>" for k, v in rows)
    return f'<div class="scroll"><table class="kv"><tbody>{body}</tbody></table></div>'


def _section(sid: str, title: str, body: str, lead: str = "") -> str:
    lead_html = f'<p class="lead">{lead}</p>' if lead else ""
    return f'<section id="{sid}"><h2>{title}</h2>{lead_html}{body}</section>'


def _figure(fid: str, svg: str, caption: str) -> str:
    return (f'<figure id="{fid}"><div class="plot">{svg}</div>'
            f"<figcaption>{caption}</figcaption></figure>")


def _is_preparation(summary: dict[str, Any]) -> bool:
    return "steps" in summary


# ---------------------------------------------------------------- pictures


def _palette():
    from panelprep.report.svg import Palette

    return Palette(ink=INK, muted=MUTED, rule=RULE, fill=TEAL, accent=COPPER, absent=ABSENT)


def _presence_svg(presence: dict[str, Any]) -> str:
    from panelprep.report import svg

    return svg.presence(presence, _palette(), "presence", "Presence map of entities by period",
                        STATE_COLOURS)


def _flow_svg(flow: dict[str, Any]) -> str:
    from panelprep.report import svg

    return svg.flow(flow, _palette(), "flow", "Entities present, entering and last seen per period")


def _missing_svg(missing: dict[str, Any]) -> str:
    from panelprep.report import svg

    return svg.missing_map(missing, _palette(), "missing", "Missing cells per variable by period")


def _obs_svg(obs: dict[str, Any]) -> str:
    from panelprep.report import svg

    rows = obs["rows"]
    return svg.distribution(rows["values"], rows["entities"], _palette(), "obs",
                            "Distribution of rows per entity", "rows per entity", discrete=True)


def _share_svg(share: dict[str, Any]) -> str:
    from panelprep.report import svg

    return svg.shares(share["variables"], _palette(), "share",
                      f"{WITHIN_VARIANCE_SHARE} and between share per variable",
                      "within entities", "between entities")


def _theta_svg(theta: dict[str, Any]) -> str:
    from panelprep.report import svg

    median = theta.get("median")
    return svg.distribution(theta["values"], theta["entities"], _palette(), "theta",
                            "Distribution of theta_i",
                            "theta_i (0: pooled data, 1: within transform)", discrete=False,
                            span=(0.0, 1.0), marker=median,
                            marker_label="" if median is None else f"median {median:.3f}")


# ---------------------------------------------------------------- sections


def _header(summary: dict[str, Any]) -> str:
    keys, source = summary.get("keys", {}), summary.get("input", {})
    verdict = str(summary.get("verdict", "")).lower()
    kind = "Preparation report" if _is_preparation(summary) else "Audit report"
    freq = keys.get("freq")
    if freq is not None:
        freq = f"{freq} ({'inferred' if keys.get('freq_inferred') else 'given'})"
    rows = [
        ("input", _e(source.get("path") or "(data frame in memory)")),
        ("rows read", _num(source.get("rows"))),
        ("sha256", f'<code>{_e(source.get("sha256"))}</code>'),
        ("key", _e(" + ".join(keys.get("entity", []))) + " over " + _e(keys.get("time"))),
        ("frequency", _e(freq)),
        ("gate", f"fails on {_e(summary.get('fail_on'))} and above"),
    ]
    tool = summary.get("tool", {})
    meta = "".join(f"<dt>{k}</dt><dd>{v}</dd>" for k, v in rows)
    return (
        '<header class="top"><div class="wrap">'
        f'<div class="brand">{_e(tool.get("name", "panelprep"))} '
        f'{_e(tool.get("version", ""))}</div>'
        f'<h1>{kind}<span class="verdict {_e(verdict)}">{_e(verdict.upper())}</span></h1>'
        f'<dl class="meta">{meta}</dl>'
        + (f'<p class="closing">{_e(verdict_line(summary))}</p>' if summary.get("findings")
           is not None and summary.get("verdict") else "")
        + "</div></header>"
    )


def _story(summary: dict[str, Any]) -> str:
    steps = summary.get("steps") or []
    source, sample = summary.get("input", {}), summary.get("sample")
    read_rows = source.get("rows")
    flow = (f'<div class="flow"><div class="stat before"><span class="big">{_num(read_rows)}</span>'
            '<span class="small">rows read</span></div>')
    if sample:
        flow += (f'<div class="arrow">→</div><div class="stat"><span class="big">'
                 f'{_num(sample.get("rows"))}</span><span class="small">rows and '
                 f'{_num(sample.get("entities"))} entities in the estimation sample</span></div>')
    flow += "</div>"
    if sample:
        flow += (f'<p class="note">Dependent variable <code>{_e(sample.get("y"))}</code>; '
                 "regressors " + ", ".join(f"<code>{_e(x)}</code>" for x in sample.get("x", []))
                 + ".</p>")
    if steps:
        rows = []
        for s in steps:
            change = s["rows_after"] - s["rows_before"]
            rows.append([
                _e(s["step"]), _num(s["rows_before"]), _num(s["rows_after"]),
                f'<span class="minus">{change:,}</span>' if change else "0",
                _num(s["entities_before"]), _num(s["entities_after"]), _e(s.get("note") or ""),
            ])
        table = _table(["step", "rows before", "rows after", "change", "entities before",
                        "entities after", "note"], rows, numeric={1, 2, 3, 4, 5})
    else:
        table = '<p class="empty">No step ran before the gate.</p>'
    dropped = summary.get("dropped") or {}
    reasons = dropped.get("by_reason") or {}
    if dropped:
        text = ", ".join(f"<code>{_e(k)}</code> {_num(v)}" for k, v in reasons.items()) or "none"
        ledger = next((f["name"] for f in summary.get("files") or []
                       if f["name"].startswith("dropped.")), "the dropped table")
        if summary.get("verdict") != "fail":
            table += (f'<p class="note">Rows dropped in all: <b>{_num(dropped.get("rows", 0))}</b> '
                      f"({text}); each is listed with its reason in <code>{_e(ledger)}</code>.</p>")
        else:
            table += (f'<p class="note">Rows the steps removed: <b>{_num(dropped.get("rows", 0))}'
                      f"</b> ({text}); the gate failed, so no data file and no ledger of dropped "
                      "rows was written.</p>")
    return _section("story", "What the run did", flow + table,
                    "Each step in order, with the rows and entities it kept.")


def _findings(summary: dict[str, Any]) -> str:
    # resolved findings last: they no longer count for the gate
    found = sorted(summary.get("findings") or [],
                   key=lambda f: (bool(f.get("resolved_by")),
                                  -SEVERITIES.index(f["severity"]) if f.get("severity") in SEVERITIES
                                  else 0))
    tally = {s: sum(1 for f in found if f.get("severity") == s and not f.get("resolved_by"))
             for s in reversed(SEVERITIES)}
    resolved = sum(1 for f in found if f.get("resolved_by"))
    counts = "".join(f'<div class="count {s}"><b>{n}</b>{s}</div>' for s, n in tally.items())
    if resolved:
        counts += f'<div class="count resolved"><b>{resolved}</b>resolved by a policy</div>'
    _, definition = sample_words(summary, "findings")
    lead = (f"Worst first. The gate fails on {_e(summary.get('fail_on'))} and above. Checks of "
            f"the sample describe {_e(definition)}; checks of keys and values describe the rows "
            "read.")
    if not found:
        return _section("findings", "Findings",
                        f'<div class="counts">{counts}</div><p class="empty">No findings.</p>',
                        lead)
    failing = set(failing_ids(summary))
    rows = []
    for f in found:
        severity = f.get("severity", "info")
        examples = f.get("examples") or []
        cell = _e(f.get("message"))
        if f.get("resolved_by"):
            cell += f'<p class="note resolved">{_e(resolved_note(f))}.</p>'
        hint = hint_for(f.get("id", ""))
        if hint and not f.get("resolved_by") and severity != "info":
            fails = f.get("id") in failing
            cell += (f'<p class="hint{" fails" if fails else ""}">'
                     f'{"Fails the gate. " if fails else ""}What addresses it: {_e(hint)}</p>')
        if examples:
            items = "".join(
                "<li>" + ", ".join(f"{_e(k)} <code>{_e(v)}</code>" for k, v in ex.items()) + "</li>"
                for ex in examples)
            cell += (f"<details><summary>{plural(len(examples), 'example')}</summary>"
                     f"<ul>{items}</ul></details>")
        rows.append([f'<span class="badge {_e(severity)}">{_e(severity)}</span>',
                     f"<code>{_e(f.get('id'))}</code>", _num(f.get("count")), cell])
    body = f'<div class="counts">{counts}</div>' + _table(
        ["severity", "finding", "count", "what was found"], rows, numeric={2})
    return _section("findings", "Findings", body, lead)


def _panel(summary: dict[str, Any], pictures: dict[str, Any]) -> str:
    panel = summary.get("panel") or {}
    shape = next((f for f in summary.get("findings") or [] if f.get("id") == "panel-shape"
                  and not f.get("resolved_by")), None)
    details = (shape or {}).get("details") or {}
    span = (f" ({_e(details.get('first_period'))} to {_e(details.get('last_period'))})"
            if details.get("first_period") is not None else "")
    obs = panel.get("obs_per_entity") or {}
    name, definition = sample_words(summary, "panel")
    rows = [
        ("sample described", _e(definition)),
        (f"rows in the {_e(name)} sample",
         _e(rows_words(summary))),
        ("entities", _num(panel.get("entities"))),
        ("periods", _num(panel.get("periods")) + span),
        ("shape", "balanced" if panel.get("balanced") else "unbalanced"),
        ("rows per entity (fewest / median / most)",
         f"{_num(obs.get('min'))} / {_num(obs.get('median'))} / {_num(obs.get('max'))}"),
        ("entities with a single row", _num(panel.get("singleton_entities"))),
        ("entities with holes in their series", _num(panel.get("entities_with_gaps"))),
        ("exact repeated rows", _num(panel.get("exact_duplicate_rows"))),
        ("conflicting duplicate keys", _num(panel.get("conflicting_duplicate_keys"))),
        ("rows without a full key", _num(panel.get("rows_without_key"))),
    ]
    body = _kv(rows) + _coverage(details)
    presence = pictures.get("presence") or {}
    captions = (
        ("presence", _presence_svg,
         ("<b>Presence map.</b> One row per entity, sorted by the period it enters, then the "
         "period it is last seen; one column per period. Teal: a row in the sample; copper: a "
         "hole inside the entity's span; the two greys: before its entry and after its exit. "
         f"{_e(presence.get('rule'))}")),
        ("flow", _flow_svg,
         ("<b>Entries and exits.</b> Entities present in each period (the most in one period of a "
         "column when periods are grouped), and below, how many enter the sample there and how "
         "many are seen there for the last time. Everyone present in the first period enters "
         "there and everyone present in the last is last seen there; those two counts are "
         "written, not drawn.")),
        ("missing", _missing_svg,
         ("<b>Missing cells.</b> One row per variable, one column per period of the rows read "
         "(keyed, exact repeats collapsed); the darker the cell, the larger the share of that "
         "period's rows missing the variable (square-root scale). Listwise deletion removes "
         "every such row from the sample.")),
        ("obs_per_entity", _obs_svg,
         "<b>Rows per entity.</b> How many entities have each number of rows in the sample."),
    )
    for key, draw, caption in captions:
        if pictures.get(key) is not None:
            name = "obs" if key == "obs_per_entity" else key
            body += _figure(f"picture-{name}", draw(pictures[key]), caption)
    return _section("panel", "The panel", body, f"{_e(definition[:1].upper() + definition[1:])}.")


def _coverage(details: dict[str, Any]) -> str:
    """The coverage tables: the largest spell groups and the bands of periods."""
    cover = details.get("coverage") or {}
    if not cover.get("spells"):
        return ""
    body = ("<h3>Coverage of the grid</h3>"
            f'<p class="note">{_num(cover.get("entities_full"))} entities are present in every '
            f'period; {_num(cover.get("from_first"))} from the first period and '
            f'{_num(cover.get("to_last"))} to the last. Entities grouped by the period they '
            "enter, the period they are last seen and their number of holes: the largest "
            f'{plural(len(cover["spells"]), "group")} of {_num(cover.get("spell_groups"))}.</p>')
    body += _table(["entities", "share", "spell"],
                   [[_num(sp.get("entities")), _pct(sp.get("share")), _e(spell_words(sp))]
                    for sp in cover["spells"]], numeric={0, 1}, tid="table-spells")
    runs = cover.get("runs") or {}
    if runs:
        body += f'<p class="note">Observed in {_e(runs_words(runs))}.</p>'
    bands = cover.get("bands") or []
    if bands:
        rows = []
        for b in bands:
            span = b["first"] if b["first"] == b["last"] else f"{b['first']}–{b['last']}"
            present = (_num(b["present_fewest"]) if b["present_fewest"] == b["present_most"]
                       else f"{_num(b['present_fewest'])}–{_num(b['present_most'])}")
            rows.append([_e(span), present, _num(b["entering"]), _num(b["last_seen"])])
        body += _table(["periods", "entities present (fewest–most)", "entering", "last seen"],
                       rows, numeric={1, 2, 3}, tid="table-bands")
    return body


def _variation(summary: dict[str, Any], pictures: dict[str, Any]) -> str:
    variables = summary.get("variables") or {}
    cells = dict(zip(variables, describe_cells(variables)))
    described, where = [], []
    for name, v in variables.items():
        notes = [label for key, label in (("time_invariant", "constant within entities"),
                                          ("period_invariant", "constant within periods"))
                 if v.get(key)]
        share = v.get("within_variance_share")
        described.append([f"<code>{_e(name)}</code>", _num(v.get("n")),
                          *(_e(c) for c in cells[name])])
        where.append([f"<code>{_e(name)}</code>", _pct(None if share is None else 1 - share),
                      _pct(share), _ratio(v.get("within_sd_ratio")),
                      _plain(v.get("sd_within")), _plain(v.get("sd_between")),
                      _pct(v.get("varying_share")), _e("; ".join(notes))])
    if described:
        body = ("<h3>The variables</h3>"
                + _table(["variable", "rows", "mean", "sd", "smallest", "largest"], described,
                         numeric={1, 2, 3, 4, 5}, tid="table-describe")
                + "<h3>Where the variation lies</h3>"
                + _table(["variable", BETWEEN_VARIANCE_SHARE, WITHIN_VARIANCE_SHARE,
                          WITHIN_SD_RATIO, "SD within entities", "SD of entity means",
                          "entities varying", "note"], where, numeric=set(range(1, 7)),
                         tid="table-where"))
    else:
        body = '<p class="empty">No numeric variables were selected.</p>'
    body += ('<p class="note">sd: over all rows, ddof 1. SD within entities: of the deviations '
             "from entity means, over n − N. SD of entity means: unweighted, ddof 1. "
             f"{WITHIN_SD_RATIO} = SD within entities / sd (the var-thin-within check compares it "
             f"with its threshold); {WITHIN_VARIANCE_SHARE} = within² / (within² + "
             f"entity means²) of those two SDs, {BETWEEN_VARIANCE_SHARE} = 1 − it.</p>")
    if pictures.get("share") is not None:
        body += _figure("picture-share", _share_svg(pictures["share"]),
                        f"<b>{WITHIN_VARIANCE_SHARE.capitalize()}.</b> How each variable's variance splits into "
                        "variation inside entities over time and variation across entity means. "
                        "A variable with little within variation is poorly identified by a "
                        "within (fixed-effects) fit.")
    _, definition = sample_words(summary, "variables")
    return _section("variation", "Variation", body,
                    "Each variable described, then how its variance splits between entities "
                    f"and within them, on {_e(definition)}.")


def _components(summary: dict[str, Any], pictures: dict[str, Any]) -> str:
    c = summary["components"]
    theta = c.get("theta") or {}
    rows = [
        ("method", f"<code>{_e(c.get('method'))}</code>"),
        ("rows and entities used",
         f"{_num(c.get('n_obs'))} rows, {_num(c.get('n_entities'))} entities"),
        ("at entity level: variance s2_u (SD)",
         f"{_num(c.get('sigma2_entity'), 6)} ({_num(c.get('sigma_entity'), 6)})"),
        ("row within entity: variance s2_e (SD)",
         f"{_num(c.get('sigma2_idiosyncratic'), 6)} ({_num(c.get('sigma_idiosyncratic'), 6)})"),
        ("share of the error variance at entity level, s2_u / (s2_u + s2_e)",
         _pct(c.get("entity_share"))),
    ]
    marks = [("lowest", "min"), ("10%", "p10"), ("25%", "p25"), ("median", "median"),
             ("75%", "p75"), ("90%", "p90"), ("highest", "max")]
    shown = [(label, theta[key]) for label, key in marks if theta.get(key) is not None]
    weights = ("<h3>Demeaning weight theta_i across entities</h3>"
               + _table([label for label, _ in shown], [[f"{v:.3f}" for _, v in shown]],
                        numeric=set(range(len(shown))), tid="table-theta")
               if shown else "")
    body = _kv(rows) + weights
    notes = []
    if unidentified_note(c):
        notes.append(unidentified_note(c))
    if c.get("truncated_negative"):
        notes.append(f"The estimate of s2_u was negative ({_num(c.get('raw_sigma2_entity'), 6)}) "
                     "and was set to 0.")
    for key, label in (("dropped_within", "Left out of the within regression"),
                       ("dropped_between", "Left out of the between regression"),
                       ("dropped_pooled", "Left out of the pooled regression")):
        if c.get(key):
            notes.append(f"{label}: " + ", ".join(f"<code>{_e(n)}</code>" for n in c[key]) + ".")
    if notes:
        body += "".join(f'<p class="note">{n}</p>' for n in notes)
    if pictures.get("theta") is not None:
        body += _figure("picture-theta", _theta_svg(pictures["theta"]),
                        "<b>theta_i per entity.</b> "
                        f"{_e(pictures['theta'].get('definition'))}; entities with more rows get a "
                        "theta closer to 1, so their quasi-demeaned rows are closer to within "
                        "deviations.")
    return _section("components", "Where the error variance sits", body,
                    "How much of the error variance sits at entity level and how much row by "
                    "row within entities, and the weight theta_i = 1 − sqrt(s2_e / (T_i s2_u + "
                    "s2_e)) with which the quasi file subtracts each entity's mean.")


def _evidence(summary: dict[str, Any]) -> str:
    ev = summary["evidence"]
    rows = []
    for key, label in _TESTS:
        t = ev.get(key)
        if not isinstance(t, dict):
            continue
        p_value = t.get("p_value")
        df = _num(t.get("df"))
        if t.get("df_denominator") is not None:
            df += f", {_num(t['df_denominator'])}"
        rows.append([f'<span class="nowrap">{label}</span>', _num(t.get("statistic")),
                     df, _e(p_text(p_value)),
                     _e(t.get("note") or t.get("basis") or "")])
    body = _table(["test", "statistic", "df", "p-value", "note"], rows, numeric={1, 2, 3})
    caution = ev.get("caution")
    reading = [line for line in ev.get("reading") or [] if line != caution]
    if reading:
        body += ("<h3>In plain words</h3><ol class=\"reading\">"
                 + "".join(f"<li>{_e(line)}</li>" for line in reading) + "</ol>")
    body += (f'<div class="caution"><b>Evidence, not a verdict.</b> '
             f"{_e(caution or 'These tests are evidence, not a verdict.')}</div>")
    return _section("evidence", "Evidence on the choice of estimator", body,
                    "Tests for entity effects and for their correlation with the regressors, "
                    "and for serial correlation and dependence across entities in the errors.")


def _cautions(summary: dict[str, Any]) -> str:
    items = summary.get("cautions") or []
    body = ('<ul class="cautions">' + "".join(f"<li>{_e(c)}</li>" for c in items) + "</ul>"
            if items else '<p class="empty">Nothing to add.</p>')
    return _section("cautions", "Before you fit a model", body)


def _files(summary: dict[str, Any]) -> str:
    body = ""
    built = summary.get("transforms") or {}
    if built:
        rows = [[f"<code>{_e(name)}</code>", _num(info.get("rows")),
                 _e(", ".join([*transform_details(info),
                               *(f"left out: {r['name']} ({r['why']})"
                                 for r in info.get("regressors_left_out") or [])]))]
                for name, info in built.items()]
        body += "<h3>Transforms built</h3>" + _table(["transform", "rows", "details"], rows,
                                                     numeric={1})
    files = summary.get("files") or []
    if files:
        rows = [[f"<code>{_e(f.get('name'))}</code>", _num(f.get("rows")),
                 f"<code>{_e(f.get('sha256'))}</code>"] for f in files]
        body += "<h3>Files in the output folder</h3>" + _table(["file", "rows", "sha256"], rows,
                                                               numeric={1})
        body += ('<p class="note">Beside them: diagnostics.json, diagnostics.txt and this page, '
                 "report.html.</p>")
    else:
        body += '<p class="empty">No data files were written.</p>'
    return _section("files", "Files written", body)


def render_html(summary: dict[str, Any], pictures: dict[str, Any]) -> str:
    """The whole report as one self-contained HTML page.

    Parameters
    ----------
    summary : dict
        ``AuditReport.to_dict()`` for an audit, or a preparation's summary
        (the diagnostics document, with ``steps``, ``components``,
        ``evidence``, ``cautions`` and ``files`` when it got that far).
    pictures : dict
        ``panelprep.figures.picture_data(...)`` of the same sample; a key
        that is absent or None leaves its picture out.

    Returns
    -------
    str
        The page.  No external resource is referenced and the same input
        gives the same text.
    """
    preparation = _is_preparation(summary)
    parts: list[tuple[str, str, str]] = []
    if preparation:
        parts.append(("story", "Run", _story(summary)))
    parts.append(("findings", "Findings", _findings(summary)))
    parts.append(("panel", "Panel", _panel(summary, pictures)))
    parts.append(("variation", "Variation", _variation(summary, pictures)))
    if summary.get("comparison"):
        from panelprep.report.comparison import comparison_section

        parts.append(("comparison", "Vintages", comparison_section(summary["comparison"])))
    if summary.get("components"):
        parts.append(("components", "Components", _components(summary, pictures)))
    if summary.get("evidence"):
        parts.append(("evidence", "Evidence", _evidence(summary)))
    if preparation or "cautions" in summary:
        parts.append(("cautions", "Cautions", _cautions(summary)))
    if preparation or "files" in summary:
        parts.append(("files", "Files", _files(summary)))
    nav = "".join(f'<a href="#{sid}">{label}</a>' for sid, label, _ in parts)
    tool = summary.get("tool", {})
    source = summary.get("input", {}).get("path") or "panel"
    title = f"{'Preparation' if preparation else 'Audit'} report · {source}"
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>"
        + _header(summary)
        + f'<nav class="toc"><div class="wrap">{nav}</div></nav>'
        + '<main><div class="wrap">' + "".join(body for _, _, body in parts) + "</div></main>"
        + f'<footer><div class="wrap">Written by {_e(tool.get("name", "panelprep"))} '
          f'{_e(tool.get("version", ""))}. Self-contained page: nothing is loaded from '
          "the network.</div></footer></body></html>\n"
    )


def write_html(path: str | os.PathLike[str], summary: dict[str, Any],
               pictures: dict[str, Any], inputs: Sequence[Path] = ()) -> Path:
    """Write ``render_html(summary, pictures)`` to ``path`` atomically (UTF-8); returns the path.

    ``path`` may not be one of ``inputs`` (compared by file identity); see
    ``panelprep.io.write_file``.
    """
    return write_file(Path(path), render_html(summary, pictures), inputs, "the HTML report")
