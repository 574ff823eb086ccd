"""The audit is judged on the sample that is written, and each within quantity has one name.

The command lines run once, through real processes, in a module fixture: the
demo (``panelprep demo``) and preparations of its data from its run file.
The expected numbers are recomputed from the written ``clean`` file with
pandas and numpy, never taken from panelprep's own output.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import panelprep

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
RESOLVED = "clean.singletons = drop"
# the demo keeps the firm's founding year as a regressor on purpose: its two
# warnings are accepted here so the gate on warnings judges the rest
ACCEPT_FOUNDED = "var-fixed-within=info,regressor-dropped-within=info"
WITHIN_NAMES = ("within_sd_ratio", "within_variance_share")
WITHIN_LABELS = ("within SD ratio", "within variance share")


def _command() -> list[str]:
    beside = Path(sys.executable).with_name("panelprep")
    found = str(beside) if beside.exists() else shutil.which("panelprep")
    return [found] if found else [sys.executable, "-c", "from panelprep.cli import main; main()"]


@dataclass
class Run:
    returncode: int
    stdout: str
    stderr: str
    out: Path

    @property
    def summary(self) -> dict:
        # a failed gate leaves --out alone and writes its diagnostics beside it
        folder = self.out if self.returncode == 0 else self.out.with_name(self.out.name + ".failed")
        return json.loads((folder / "diagnostics.json").read_text(encoding="utf-8"))

    def finding(self, finding_id: str) -> dict | None:
        return next((f for f in self.summary["findings"] if f["id"] == finding_id), None)


def _run(args: list, out: Path) -> Run:
    done = subprocess.run([*_command(), *map(str, args), "--quiet"], capture_output=True,
                          text=True, timeout=600, check=False)
    return Run(done.returncode, done.stdout, done.stderr, out)


def _unbalanced_csv(path: Path) -> None:
    """Five firms over four years; e is seen in two years only and is the one whose v varies.

    Balancing to complete entities removes e, and with it all the within
    variation of v: var-fixed-within appears only on the final sample.
    """
    rows = []
    sales = iter(np.linspace(3.0, 11.0, 18).round(3))
    for firm, v, years in (("a", 1.0, 4), ("b", 2.0, 4), ("c", 3.0, 4), ("d", 4.0, 4)):
        rows += [(firm, 2000 + t, next(sales), v, 1.5 * t + ord(firm) % 3) for t in range(years)]
    rows += [("e", 2000, next(sales), 5.0, 0.5), ("e", 2001, next(sales), 7.0, 2.5)]
    frame = pd.DataFrame(rows, columns=["firm", "year", "sales", "v", "w"])
    frame.to_csv(path, index=False)


@pytest.fixture(scope="module")
def runs(tmp_path_factory) -> dict[str, Run]:
    root = tmp_path_factory.mktemp("final")
    demo = _run(["demo", root / "demo"], root / "demo" / "out")
    assert demo.returncode == 0, demo.stderr
    run_file = root / "demo" / "run.toml"
    _unbalanced_csv(root / "unbalanced.csv")
    jobs = {
        "gate": ["prepare", "--config", run_file, "--out", root / "gate", "--fail-on", "warning",
                 "--severity", ACCEPT_FOUNDED],
        "gate-keep": ["prepare", "--config", run_file, "--out", root / "gate-keep",
                      "--fail-on", "warning", "--severity", ACCEPT_FOUNDED,
                      "--singletons", "keep"],
        "new-finding": ["prepare", root / "unbalanced.csv", "-e", "firm", "-t", "year",
                        "--y", "sales", "--x", "v,w", "--balance", "complete-entities",
                        "--fail-on", "warning", "--severity", "regressor-dropped-within=info",
                        "--out", root / "new-finding"],
    }
    with ThreadPoolExecutor(max_workers=3) as pool:
        futures = {name: pool.submit(_run, args, args[args.index("--out") + 1])
                   for name, args in jobs.items()}
        found = {name: future.result() for name, future in futures.items()}
    return {"demo": demo, **found}


class _Sections(HTMLParser):
    """Per section id: its lead text, and its tables (each a header and rows of cell texts).

    ``header`` and ``rows`` are those of the section's last table.
    """

    def __init__(self) -> None:
        super().__init__()
        self.sections: dict[str, dict] = {}
        self._section: str | None = None
        self._cell: list[str] | None = None
        self._row: list[str] | None = None
        self._lead = False

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "section":
            self._section = attrs.get("id")
            self.sections[self._section] = {"lead": "", "tables": [], "header": [], "rows": []}
        elif tag == "p" and attrs.get("class") == "lead":
            self._lead = True
        elif tag == "table" and self._section in self.sections:
            part = self.sections[self._section]
            part["header"], part["rows"] = [], []
            part["tables"].append({"header": part["header"], "rows": part["rows"]})
        elif tag == "tr":
            self._row = []
        elif tag in ("th", "td"):
            self._cell = []

    def handle_endtag(self, tag):
        part = self.sections.get(self._section)
        if tag in ("th", "td") and self._cell is not None and self._row is not None:
            self._row.append("".join(self._cell).strip())
            self._cell = None
        elif tag == "tr" and self._row is not None and part is not None:
            if not part["header"]:
                part["header"].extend(self._row)
            else:
                part["rows"].append(self._row)
            self._row = None
        elif tag == "p":
            self._lead = False
        elif tag == "section":
            self._section = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)
        if self._lead and self._section in self.sections:
            self.sections[self._section]["lead"] += data


def _html(run: Run) -> dict[str, dict]:
    parser = _Sections()
    parser.feed((run.out / "report.html").read_text(encoding="utf-8"))
    return parser.sections


def _within_by_hand(clean: pd.DataFrame, name: str) -> tuple[float, float]:
    """(within SD ratio, within variance share) of one column of the written file.

    Outside computation: pandas groupby for the entity means, numpy for the
    sums and SDs, with the ddofs the README states (overall ddof 1, between
    over the entity means ddof 1, within over n - N).
    """
    values = clean[name].to_numpy(dtype=float)
    means = clean.groupby("firm_id")[name].transform("mean").to_numpy()
    n, n_entities = len(values), clean["firm_id"].nunique()
    sd_within = np.sqrt(np.sum((values - means) ** 2) / (n - n_entities))
    sd_overall = np.std(values, ddof=1)
    sd_between = np.std(clean.groupby("firm_id")[name].mean().to_numpy(), ddof=1)
    return sd_within / sd_overall, sd_within**2 / (sd_within**2 + sd_between**2)


# ---------------------------------------------------------------- the gate


def test_a_resolved_singleton_does_not_fail_the_gate(runs):
    run = runs["gate"]
    assert run.returncode == 0, run.stdout + run.stderr
    assert run.summary["verdict"] == "pass"
    single = run.finding("entity-single-obs")
    assert single is not None and single["severity"] == "warning"
    assert single["resolved_by"] == RESOLVED
    # the entity left with one row by listwise deletion is the same one
    assert run.finding("sample-new-singletons")["resolved_by"] == RESOLVED
    assert (run.out / "clean.parquet").exists()


def test_resolved_findings_are_marked_in_every_rendering(runs):
    run = runs["gate"]
    text = (run.out / "diagnostics.txt").read_text(encoding="utf-8")
    line = next(x for x in text.splitlines() if "entity-single-obs" in x)
    assert f"resolved by {RESOLVED}" in line and "not counted by the gate" in line
    assert f"resolved by {RESOLVED}" in next(x for x in run.stdout.splitlines()
                                             if "entity-single-obs" in x)
    findings = _html(run)["findings"]["tables"][0]
    row = next(r for r in findings["rows"] if r[1] == "entity-single-obs")
    assert f"resolved by {RESOLVED}" in row[3]


def test_without_the_policy_the_singleton_still_fails_the_gate(runs):
    run = runs["gate-keep"]
    assert run.returncode == 1, run.stdout + run.stderr
    single = run.finding("entity-single-obs")
    assert single["severity"] == "warning" and "resolved_by" not in single
    assert not (run.out / "clean.parquet").exists()


def test_a_finding_that_appears_only_on_the_final_sample_counts(runs):
    # before balancing, firm e's v changes (5 -> 7); after it only a-d remain, each with one v
    run = runs["new-finding"]
    assert run.returncode == 1, run.stdout + run.stderr
    fixed = run.finding("var-fixed-within")
    assert fixed is not None and "resolved_by" not in fixed
    assert [e["variable"] for e in fixed["examples"]] == ["v"]
    assert run.summary["panel"]["entities"] == 4
    assert run.summary["samples"]["policies"] == ["clean.balance = complete-entities"]


def test_the_audit_alone_sees_no_fixed_variable_in_the_same_data(tmp_path):
    _unbalanced_csv(tmp_path / "unbalanced.csv")
    report = panelprep.audit_file(tmp_path / "unbalanced.csv", "firm", "year", vars="sales,v,w")
    assert report.finding("var-fixed-within") is None
    assert report.to_dict()["samples"]["panel"] == "estimation"


# ------------------------------------------------- which sample each block describes
# on the demo as shipped (gate on errors, clean.singletons = drop), which passed before too


def test_the_panel_block_counts_the_written_rows_and_entities(runs):
    run = runs["demo"]
    clean = pd.read_parquet(run.out / "clean.parquet")
    between = pd.read_parquet(run.out / "between.parquet")
    panel = run.summary["panel"]
    assert panel["rows"] == len(clean)
    assert panel["entities"] == clean["firm_id"].nunique() == len(between)
    assert panel["singleton_entities"] == int((clean.groupby("firm_id").size() == 1).sum())
    files = {f["name"]: f["rows"] for f in run.summary["files"]}
    assert files["clean.parquet"] == panel["rows"]
    shape = run.finding("panel-shape")
    assert shape["details"]["entities"] == panel["entities"]
    text = (run.out / "diagnostics.txt").read_text(encoding="utf-8")
    assert f"rows        {len(clean):,} of" in text
    first = _html(run)["panel"]["tables"][0]
    kv = {r[0]: r[1] for r in [first["header"], *first["rows"]] if len(r) == 2}
    assert kv["rows in the final sample"].startswith(f"{len(clean):,} of")
    assert kv["entities"] == f"{clean['firm_id'].nunique():,}"


def test_every_block_says_which_sample_it_describes(runs):
    run = runs["demo"]
    samples = run.summary["samples"]
    assert {samples[b] for b in ("panel", "findings", "variables")} == {"final"}
    assert samples["policies"] == [RESOLVED]
    assert RESOLVED in samples["definition"]
    text = (run.out / "diagnostics.txt").read_text(encoding="utf-8").splitlines()
    for heading in ("Panel (", "Findings (", "Variables (", "Where the variation lies ("):
        line = next(x for x in text if x.startswith(heading))
        assert "final sample" in line, line
    sections = _html(run)
    for sid in ("panel", "findings", "variation"):
        assert "final sample" in sections[sid]["lead"], sid


# ---------------------------------------------------- the two within quantities


def test_json_carries_both_within_quantities_on_the_written_sample(runs):
    run = runs["demo"]
    clean = pd.read_parquet(run.out / "clean.parquet")
    variables = run.summary["variables"]
    assert list(variables) == ["sales", "capital", "staff", "capital_lag1", "founded"]
    for name, row in variables.items():
        ratio, share = _within_by_hand(clean, name)
        assert row["within_sd_ratio"] == pytest.approx(ratio, rel=1e-9, abs=1e-12), name
        assert row["within_variance_share"] == pytest.approx(share, rel=1e-9, abs=1e-12), name
        assert row["n"] == len(clean)


def test_text_and_html_show_the_same_two_names_and_numbers(runs):
    run = runs["demo"]
    clean = pd.read_parquet(run.out / "clean.parquet")
    text = (run.out / "diagnostics.txt").read_text(encoding="utf-8")
    page = (run.out / "report.html").read_text(encoding="utf-8")
    for document in (text, page, run.stdout):
        assert "within share" not in document  # the old name that meant two things
    lines = text.splitlines()
    # the table of where the variation lies, after the table describing the variables
    start = next(i for i, x in enumerate(lines) if x.startswith("Where the variation lies ("))
    header = next(x for x in lines[start:] if x.strip().startswith("variable "))
    where = lines[lines.index(header):]
    variation = next(t for t in _html(run)["variation"]["tables"]
                     if WITHIN_LABELS[0] in t["header"])
    for label in WITHIN_LABELS:
        assert label in header
        assert label in variation["header"]
    text_columns = [header.index(label) + len(label) for label in WITHIN_LABELS]
    columns = [variation["header"].index(label) for label in WITHIN_LABELS]
    rows = {r[0]: r for r in variation["rows"]}
    for name in ("sales", "capital", "staff"):
        ratio, share = _within_by_hand(clean, name)
        shown = (f"{ratio:.3f}", f"{100 * share:.1f}%")
        line = next(x for x in where if x.strip().startswith(name + " "))
        # right-aligned: each number ends where its label ends
        assert [line[:end].split()[-1] for end in text_columns] == list(shown), name
        assert [rows[name][c] for c in columns] == list(shown), name


def test_the_thin_within_finding_reports_the_ratio_under_its_name():
    # fixtures/EXPECTED.md: capital in time_invariant.csv is thin within entities
    report = panelprep.audit_file(FIXTURES / "time_invariant.csv", "firm_id", "year")
    thin = report.finding("var-thin-within")
    example = next(e for e in thin.examples if e["variable"] == "capital")
    assert set(example) == {"variable", "within_sd_ratio"}
    assert example["within_sd_ratio"] == report.variables["capital"]["within_sd_ratio"]


# ------------------------------------------------------------ attribution


def test_each_resolved_finding_names_the_stage_that_resolved_it():
    from panelprep.pipeline import judge_final_sample

    # a: 2001-2004; b: 2001, 2003, 2004 (a hole); c: 2002 only (a singleton)
    frame = pd.DataFrame({
        "firm": ["a"] * 4 + ["b"] * 3 + ["c"],
        "year": [2001, 2002, 2003, 2004, 2001, 2003, 2004, 2002],
        "x": [1.0, 2.0, 4.0, 3.0, 5.0, 7.0, 6.0, 9.0],
    })
    report = panelprep.audit(frame, "firm", "year")
    assert report.finding("period-holes") and report.finding("entity-single-obs")
    firm = frame["firm"].to_numpy()
    first = report.context.sample & (firm != "b")
    second = first & (firm != "c")
    judged = judge_final_sample(report, [("first", first), ("second", second)])
    assert judged.finding("period-holes").resolved_by == "first"
    assert judged.finding("entity-single-obs").resolved_by == "second"
    assert judged.panel["entities"] == 1 and judged.panel["rows"] == 4
    assert judged.to_dict()["samples"]["policies"] == ["first", "second"]
    assert judged.verdict == "pass"


def test_a_warning_a_policy_eased_is_kept_resolved_beside_the_final_finding():
    # fixtures/hostile/mistyped_date.csv: one day typed centuries off stretches the day grid
    # to 182,628 periods (a panel-shape warning); without that row the grid is 10 days
    from panelprep.pipeline import judge_final_sample

    frame = pd.read_csv(FIXTURES / "hostile" / "mistyped_date.csv", dtype={"firm_id": str})
    report = panelprep.audit(frame, "firm_id", "day", vars="sales,capital", freq="day")
    assert report.finding("panel-shape").severity == "warning"
    typed_off = (frame["day"].str[:4].astype(int) < 2000).to_numpy()
    assert typed_off.sum() == 1
    judged = judge_final_sample(report, [("clean.balance = largest-block",
                                          report.context.sample & ~typed_off)])
    shapes = [f for f in judged.findings if f.id == "panel-shape"]
    assert [(f.severity, f.resolved_by) for f in shapes] == [
        ("info", None), ("warning", "clean.balance = largest-block")]
    assert "182,628 day periods" in shapes[1].message
    assert judged.finding("panel-shape") is shapes[0]
    assert judged.panel["periods"] == 10
    assert judged.to_dict()["findings"][-1]["resolved_by"] == "clean.balance = largest-block"


def test_the_demo_shows_coverage_and_ends_on_the_verdict(runs):
    run = runs["demo"]
    summary = run.summary
    panel = summary["panel"]
    shape = run.finding("panel-shape")["details"]
    heading = (f"Coverage of the grid ({shape['first_period']} to {shape['last_period']}, "
               f"{panel['periods']} periods)")
    text = (run.out / "diagnostics.txt").read_text(encoding="utf-8").splitlines()
    assert heading in run.stdout.splitlines() and heading in text
    counting = [f for f in summary["findings"] if not f.get("resolved_by")]
    tally = {s: sum(1 for f in counting if f["severity"] == s) for s in ("error", "warning", "info")}
    words = [f"{tally[s]} {w}{'' if tally[s] == 1 else 's'}"
             for s, w in (("error", "error"), ("warning", "warning"), ("info", "note"))]
    last = f"PASS: {', '.join(words)}; exit 0"
    assert run.returncode == 0
    assert run.stdout.rstrip("\n").splitlines()[-1] == last == text[-1]
