"""A comparison of two vintages as text, as an HTML section and page, and its picture.

Formatting only: everything shown comes from ``Comparison.to_dict()``.  The
picture is a grid of variables (rows) by periods (columns), each cell shaded
by the share of that variable's cells in that period the new vintage
restated: the report's own variables-by-periods map (``svg.missing_map``).
"""

from __future__ import annotations

from typing import Any

from panelprep.findings import severity_rank
from panelprep.report import text as plain

_MOST_PERIODS_SHOWN = 40


def _source(info: dict[str, Any]) -> str:
    shown = info.get("path") or "(data frame)"
    rows = info.get("rows")
    sha = info.get("sha256")
    return (f"{shown}  rows {rows:,}" if rows is not None else shown) + (
        f"  sha256 {sha[:16]}..." if sha else "")


def _share(value: float | None) -> str:
    return "-" if value is None else f"{100 * value:.2f}%"


def _where(change: dict[str, Any] | None) -> str:
    if not change:
        return "-"
    return (f"{plain._num(change['change'])} ({change['entity']} {change['period']}: "
            f"{plain._num(change['old'])} -> {plain._num(change['new'])})")


def comparison_lines(doc: dict[str, Any]) -> list[str]:
    """The comparison (``Comparison.to_dict()``) as lines of text: verdict, body, findings."""
    keys = doc["keys"]
    freq = keys["freq"] + (", inferred" if keys.get("freq_inferred") else ", given")
    lines = [
        f"verdict: {doc['verdict'].upper()}  (the gate fails on {doc['fail_on']} and above)",
        f"key:     {' + '.join(keys['entity'])} over {keys['time']} ({freq})",
        *comparison_body(doc),
        "",
        "Findings (worst first)",
    ]
    found = sorted(doc["findings"], key=lambda f: -severity_rank(f["severity"]))
    if found:
        lines += plain._table([[f["severity"].upper(), f["id"], f"{f['count']:,}", f["message"]]
                               for f in found], right={2})
    else:
        lines.append("  none: the vintages agree on every key and compared value")
    return lines


def comparison_body(doc: dict[str, Any]) -> list[str]:
    """The comparison's tables as lines of text (``Comparison.report()`` suffices)."""
    rows, ents, tol = doc["rows"], doc["entities"], doc["tolerance"]
    lines = [
        f"old:     {_source(doc['old'])}",
        f"new:     {_source(doc['new'])}",
        f"rule:    a cell is restated when |new - old| > {tol['atol']:g} + {tol['rtol']:g} x |old|"
        + (f"; at most {100 * tol['max_restated_share']:g}% of a variable's cells"
           if tol.get("max_restated_share") is not None else ""),
        "",
        "Vintages side by side (rows are distinct (entity, period) keys)",
    ]
    shape_old, shape_new = doc["shape"]["old"], doc["shape"]["new"]
    lines += plain._table([
        ["", "old", "new", "in both", "only old", "only new"],
        ["rows", f"{rows['old_cells']:,}", f"{rows['new_cells']:,}", f"{rows['both']:,}",
         f"{rows['removed']:,}", f"{rows['added']:,}"],
        ["entities", f"{ents['old']:,}", f"{ents['new']:,}", f"{ents['both']:,}",
         f"{ents['gone']:,}", f"{ents['appeared']:,}"],
        ["periods", f"{shape_old['periods']:,}", f"{shape_new['periods']:,}", "",
         f"{len(doc['periods']['gone']):,}", f"{len(doc['periods']['appeared']):,}"],
        ["span", f"{shape_old['first_period']} to {shape_old['last_period']}",
         f"{shape_new['first_period']} to {shape_new['last_period']}", "", "", ""],
        ["balanced", plain._num(shape_old["balanced"]), plain._num(shape_new["balanced"]),
         "", "", ""],
        ["with holes", f"{shape_old['entities_with_holes']:,}",
         f"{shape_new['entities_with_holes']:,}", "", "", ""],
        ["singletons", f"{shape_old['singleton_entities']:,}",
         f"{shape_new['singleton_entities']:,}", "", "", ""],
    ], right={1, 2, 3, 4, 5})
    moved = [p for p in doc["by_period"] if p["removed"] or p["added"]]
    lines += ["", "Rows removed and added by period (periods with a change)"]
    if moved:
        lines += plain._table(
            [["period", "rows old", "rows new", "removed", "added"]]
            + [[p["period"], f"{p['rows_old']:,}", f"{p['rows_new']:,}", f"{p['removed']:,}",
                f"{p['added']:,}"] for p in moved[:_MOST_PERIODS_SHOWN]], right={1, 2, 3, 4})
        if len(moved) > _MOST_PERIODS_SHOWN:
            lines.append(f"  ... and {len(moved) - _MOST_PERIODS_SHOWN} more periods "
                         "(all in the JSON report)")
    else:
        lines.append("  none")
    lines += ["", ("Cells by variable (compared: both vintages hold a value; restated includes "
              "unit changes)")]
    if doc["variables"]:
        lines += plain._table(
            [["variable", "compared", "restated", "share", "unit change", "now missing",
              "filled in", "largest change (entity period: old -> new)", "largest relative"]]
            + [[name, f"{v['compared']:,}", f"{v['restated']:,}", _share(v["restated_share"]),
                f"{v['unit_change_cells']:,}", f"{v['became_missing']:,}",
                f"{v['filled_in']:,}", _where(v["largest_abs_change"]),
                _where(v["largest_rel_change"])]
               for name, v in doc["variables"].items()], right={1, 2, 3, 4, 5, 6})
    else:
        lines.append("  no variable compared")
    if doc["rekeyed"]:
        lines += ["", "Likely re-keyed entities (history matches over the periods both hold)"]
        lines += plain._table([["old id", "new id", "periods matching", "periods both hold"]]
                              + [[r["old_entity"], r["new_entity"], f"{r['periods_matched']:,}",
                                  f"{r['periods_both']:,}"] for r in doc["rekeyed"]],
                              right={2, 3})
    if doc["unit_changes"]:
        lines += ["", "Likely unit changes (new / old a power of ten for most cells)"]
        lines += plain._table([["variable", "in", "factor", "cells", "of compared"]]
                              + [[u["variable"], f"{u['scope']} {u['where']}",
                                  f"x{u['factor']:g}", f"{u['cells']:,}", f"{u['compared']:,}"]
                                 for u in doc["unit_changes"]], right={2, 3, 4})
    return lines


def comparison_section(doc: dict[str, Any]) -> str:
    """The ``comparison`` section of an HTML report."""
    from panelprep.report import html as page
    from panelprep.report import svg

    rows, ents = doc["rows"], doc["entities"]
    tol = doc["tolerance"]
    overview = page._table(
        ["", "old", "new", "in both", "only old", "only new"],
        [["rows", page._num(rows["old_cells"]), page._num(rows["new_cells"]),
          page._num(rows["both"]), page._num(rows["removed"]), page._num(rows["added"])],
         ["entities", page._num(ents["old"]), page._num(ents["new"]), page._num(ents["both"]),
          page._num(ents["gone"]), page._num(ents["appeared"])],
         ["periods", page._num(doc["shape"]["old"]["periods"]),
          page._num(doc["shape"]["new"]["periods"]), "",
          page._e(", ".join(doc["periods"]["gone"]) or "none"),
          page._e(", ".join(doc["periods"]["appeared"]) or "none")]],
        numeric={1, 2, 3})
    variables = page._table(
        ["variable", "compared", "restated", "share", "unit change", "now missing", "filled in",
         "largest change", "largest relative change"],
        [[f"<code>{page._e(name)}</code>", page._num(v["compared"]), page._num(v["restated"]),
          page._e(_share(v["restated_share"])), page._num(v["unit_change_cells"]),
          page._num(v["became_missing"]), page._num(v["filled_in"]),
          page._e(_where(v["largest_abs_change"])), page._e(_where(v["largest_rel_change"]))]
         for name, v in doc["variables"].items()], numeric={1, 2, 3, 4, 5, 6})
    body = "<h3>Side by side</h3>" + overview + "<h3>Cells by variable</h3>" + variables
    picture = svg.missing_map(doc["picture"], page._palette(), "restated",
                              "Restated share by period and variable",
                              none_label="nothing restated",
                              most_label="{share} of the period's cells restated (the most)")
    body += page._figure("picture-restated", picture,
                         "Share of each variable's cells in each period that the new vintage "
                         "restated (unit changes included); darker is more.")
    if doc["rekeyed"]:
        body += "<h3>Likely re-keyed entities</h3>" + page._table(
            ["old id", "new id", "periods matching", "periods both hold"],
            [[f"<code>{page._e(r['old_entity'])}</code>", f"<code>{page._e(r['new_entity'])}</code>",
              page._num(r["periods_matched"]), page._num(r["periods_both"])]
             for r in doc["rekeyed"]], numeric={2, 3})
    if doc["unit_changes"]:
        body += "<h3>Likely unit changes</h3>" + page._table(
            ["variable", "in", "factor", "cells", "of compared"],
            [[f"<code>{page._e(u['variable'])}</code>", page._e(f"{u['scope']} {u['where']}"),
              page._e(f"x{u['factor']:g}"), page._num(u["cells"]), page._num(u["compared"])]
             for u in doc["unit_changes"]], numeric={3, 4})
    lead = (f"The new vintage against <code>{page._e(doc['old'].get('path') or 'the old')}</code>"
            f"; a cell is restated when |new &minus; old| &gt; {tol['atol']:g} + "
            f"{tol['rtol']:g} &times; |old|.")
    return page._section("comparison", "Against the previous vintage", body, lead)


def _findings_html(doc: dict[str, Any]) -> str:
    from panelprep.report import html as page

    found = sorted(doc["findings"], key=lambda f: -severity_rank(f["severity"]))
    rows = [[f'<span class="badge {page._e(f["severity"])}">{page._e(f["severity"])}</span>',
             f"<code>{page._e(f['id'])}</code>", page._num(f["count"]), page._e(f["message"])]
            for f in found]
    body = (page._table(["severity", "finding", "count", "what was found"], rows, numeric={2})
            if rows else '<p class="empty">No findings: the vintages agree.</p>')
    return page._section("findings", "Findings", body,
                         f"Worst first. The gate fails on {page._e(doc['fail_on'])} and above.")


def render_comparison_html(doc: dict[str, Any]) -> str:
    """A self-contained page for ``panelprep compare``: header, findings, the comparison."""
    from panelprep.report import html as page

    header = {"input": doc["new"], "keys": doc["keys"], "verdict": doc["verdict"],
              "fail_on": doc["fail_on"], "tool": doc["tool"], "findings": doc["findings"]}
    findings = _findings_html(doc)
    title = f"Comparison report · {doc['new'].get('path') or 'panel'}"
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{page._e(title)}</title><style>{page._CSS}</style></head><body>"
        + page._header(header).replace("Audit report", "Comparison report", 1)
        + '<nav class="toc"><div class="wrap"><a href="#findings">Findings</a>'
          '<a href="#comparison">Comparison</a></div></nav>'
        + '<main><div class="wrap">' + findings + comparison_section(doc) + "</div></main>"
        + f'<footer><div class="wrap">Written by panelprep {page._e(doc["tool"]["version"])}. '
          "Self-contained page: nothing is loaded from the network.</div></footer></body></html>\n"
    )
