"""The flow every command runs: load -> index -> checks -> gate (-> transforms -> write).

The CLI only parses options and calls these functions; the functions return
report objects that the renderers in ``panelprep.report`` turn into JSON,
text and HTML.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from panelprep._schema import SCHEMA_VERSION
from panelprep._version import __version__
from panelprep.checks import CHECKS, SAMPLE_CHECKS, AuditContext, Thresholds
from panelprep.checks.context import looks_numeric
from panelprep.checks.shape import counted, obs_summary
from panelprep.errors import ColumnError, InputError
from panelprep.findings import (
    FINDINGS_ORDER,
    SEVERITIES,
    SKIPPED_COLUMNS_ID,
    STEP_FINDING_ID,
    Finding,
    apply_severities,
    gate,
    gate_block,
    library_warnings_finding,
    ordered,
    recorded_warnings,
    severity_rank,
)
from panelprep.index import PanelIndex, build_index
from panelprep.io import (
    DEFAULT_READ,
    ReadOptions,
    column_names,
    detect_format,
    read_frame,
    release_arrow_memory,
    sha256_in_background,
)
from panelprep.runlog import RunLog
from panelprep.words import plural

# every flow takes a RunLog: called at each step start, it measures and tells the steps
Progress = RunLog


# the samples a report's blocks can describe
ESTIMATION_SAMPLE = "estimation"
FINAL_SAMPLE = "final"
_ESTIMATION_DEFINITION = "keyed rows, exact repeats collapsed, every selected variable present"


def sample_definition(sample: str, policies: Sequence[str] = (), written: bool = True) -> str:
    """One line saying what rows a sample name stands for (``written``: the gate passed, so
    the data files hold those rows)."""
    if sample == ESTIMATION_SAMPLE:
        return f"the estimation sample: {_ESTIMATION_DEFINITION}"
    after = (f"after the post-audit policies {', '.join(policies)}" if policies
             else "(no post-audit policy removed rows)")
    files = ("the rows the data files hold" if written
             else "the rows the data files would hold; the gate failed, so none was written")
    return f"the final sample: the estimation sample {after}; {files}"


@dataclass(eq=False)
class AuditReport:
    """What an audit found, with the verdict of the gate.

    ``to_dict()`` is the JSON report; ``context`` keeps the shared arrays so
    that a following preparation step reuses the index instead of
    rebuilding it.  ``sample`` names the sample that ``panel``,
    ``variables`` and the sample-dependent findings describe: the
    ``estimation`` sample of an audit, or the ``final`` sample of a
    preparation (after the post-audit ``policies`` that removed rows).
    """

    verdict: str
    fail_on: str
    findings: list[Finding]
    keys: dict[str, Any]
    input: dict[str, Any]
    panel: dict[str, Any]
    variables: dict[str, dict]
    context: AuditContext = field(repr=False)
    sample: str = ESTIMATION_SAMPLE
    policies: list[str] = field(default_factory=list)
    log: RunLog | None = field(default=None, repr=False)
    options: dict[str, Any] = field(default_factory=dict)

    def finding(self, finding_id: str) -> Finding | None:
        """The finding with this id that counts (one resolved by a policy only when alone)."""
        found = [f for f in self.findings if f.id == finding_id]
        return next((f for f in found if f.resolved_by is None), found[0] if found else None)

    def to_dict(self) -> dict[str, Any]:
        findings = ordered([f.to_dict() for f in self.findings])
        return {
            "schema_version": SCHEMA_VERSION,
            "tool": {"name": "panelprep", "version": __version__},
            "verdict": self.verdict,
            "fail_on": self.fail_on,
            "gate": gate_block(findings, self.fail_on),
            "keys": self.keys,
            "input": self.input,
            "panel": self.panel,
            "findings_order": FINDINGS_ORDER,
            "findings": findings,
            "variables": self.variables,
            "samples": {
                "panel": self.sample,
                "findings": self.sample,
                "variables": self.sample,
                "definition": sample_definition(self.sample, self.policies,
                                                written=self.verdict == "pass"),
                "policies": list(self.policies),
            },
            **({} if self.log is None else {"run": self.run_block()}),
        }

    def run_block(self) -> dict[str, Any]:
        """The ``run`` block as of now: start, duration, steps, the resolved options."""
        inferred = {} if self.options.get("panel.freq") else {"panel.freq": self.keys["freq"]}
        if self.options.get("input.path") and not self.options.get("input.format"):
            inferred["input.format"] = self.input.get("format")
        return self.log.block(self.options, inferred, self.input.get("sha256"))


def split_names(value: str | Sequence[str] | None) -> list[str] | None:
    """``"a,b"`` or ``["a", "b"]`` -> ``["a", "b"]``; None stays None."""
    if value is None:
        return None
    items = value.split(",") if isinstance(value, str) else list(value)
    return [item.strip() for item in items if item.strip()]


def choose_variables(
    frame: pd.DataFrame, entity: list[str], time: str, variables: list[str] | None,
    decimal_comma: bool = False,
) -> list[str]:
    """The variables to check: as given, or every numeric-looking non-key column."""
    keys = {*entity, time}
    if variables is not None:
        absent = [v for v in variables if v not in frame.columns]
        if absent:
            raise ColumnError(f"variable(s) {absent} not found; columns are {list(frame.columns)}")
        clash = [v for v in variables if v in keys]
        if clash:
            raise ColumnError(f"key column(s) {clash} cannot also be variables")
        return list(dict.fromkeys(variables))
    return [c for c in frame.columns if c not in keys and looks_numeric(frame[c], decimal_comma)]


def audit(
    frame: pd.DataFrame,
    entity: str | Sequence[str],
    time: str,
    vars: str | Sequence[str] | None = None,
    freq: str | None = None,
    fail_on: str = "error",
    thresholds: Thresholds | None = None,
    severities: dict[str, str] | None = None,
    decimal_comma: bool = False,
    missing_tokens: Sequence[str] = (),
    input_info: dict[str, Any] | None = None,
    index: PanelIndex | None = None,
    progress: Progress | None = None,
    prior_findings: Sequence[Finding] = (),
    origin: np.ndarray | None = None,
    release_columns: Callable[[list[str]], None] | None = None,
) -> AuditReport:
    """Run every structural check on a panel held in a DataFrame.

    Parameters
    ----------
    frame : the raw panel, one row per observation.
    entity : entity key column(s).
    time : time column (integer periods, dates or period labels).
    vars : variables to check; default every numeric non-key column.
    freq : period frequency (``year`` ... ``int``, or ``int:K`` for whole-number periods K
        apart); inferred when None.
    fail_on : lowest severity that fails the gate (``error`` or ``warning``).
    thresholds : limits of the checks (see ``Thresholds``).
    severities : severity per finding id, overriding the defaults.
    index : a ``PanelIndex`` already built for ``frame`` (reused, not rebuilt).
    prior_findings : findings of earlier steps (a schema contract) that the
        gate judges together with the checks'.
    origin : 0-based input position of each row of ``frame``, when earlier
        steps removed rows; examples then name the rows of the input file.
    release_columns : for a frame read for this run only: called with the
        variables once their float block is taken, to drop the frame's copies
        (``AuditContext.release_columns``).

    Returns
    -------
    AuditReport with ``verdict``, ``findings`` and ``to_dict()``.

    Examples
    --------
    >>> import pandas as pd, panelprep
    >>> frame = pd.DataFrame({"firm": ["a", "a", "b", "b"], "year": [1, 2, 1, 2],
    ...                       "sales": [1.0, 2.0, 3.0, 5.0]})
    >>> panelprep.audit(frame, entity="firm", time="year").verdict
    'pass'
    """
    if fail_on not in ("error", "warning"):
        raise InputError(f"--fail-on {fail_on!r} must be error or warning")
    _check_severities(severities or {})
    entity = split_names(entity) or []
    if not entity:
        raise InputError("no entity column given")
    chosen = split_names(vars)
    names = choose_variables(frame, entity, time, chosen, decimal_comma)
    progress = progress if progress is not None else RunLog()
    findings: list[Finding] = list(prior_findings)
    with recorded_warnings() as caught:
        if index is None:
            progress("index", f"indexing on ({', '.join(entity)}) x {time}", rows=len(frame))
            index = build_index(frame, entity, time, freq)
            release_arrow_memory()  # what factorising Arrow strings left in the pool
        context = AuditContext(
            frame=frame,
            index=index,
            variables=names,
            thresholds=thresholds or Thresholds(),
            decimal_comma=decimal_comma,
            missing_tokens=tuple(missing_tokens),
            origin=origin,
            release_columns=release_columns,
        )
        if chosen is None:
            skipped = _skipped_columns(frame, [*entity, time], names)
            if skipped is not None:
                findings.append(skipped)
        stated = stated_step_finding(index.axis)
        if stated is not None:
            findings.append(stated)
        for check in CHECKS:
            progress(f"check.{check.id}", f"check {check.id}")
            found = check.run(context)
            if found is not None:
                findings.append(found)
    findings = apply_severities(findings, severities or {})
    verdict = gate(findings, fail_on)
    # after the gate: a library's warning is said, never judged (see library_warnings_finding)
    findings += filter(None, [library_warnings_finding(caught)])
    thresholds = thresholds or context.thresholds
    options = {
        "panel.entity": entity, "panel.time": time, "panel.freq": freq, "audit.vars": chosen,
        "input.decimal_comma": decimal_comma, "input.missing_tokens": list(missing_tokens),
        "checks.fail_on": fail_on, "checks.severity": dict(severities or {}),
        **{f"checks.{k}": v for k, v in asdict(thresholds).items()},
    }
    return AuditReport(
        log=progress, options=options,
        verdict=verdict,
        fail_on=fail_on,
        findings=findings,
        keys={"entity": entity, "time": time, "freq": index.axis.name,
              "freq_inferred": index.axis.inferred},
        input=input_info or {"path": None, "sha256": None, "rows": len(frame)},
        panel=_panel_summary(context),
        variables=context.variation,
        context=context,
    )


def judge_final_sample(
    report: AuditReport,
    stages: Sequence[tuple[str, np.ndarray]],
    severities: dict[str, str] | None = None,
) -> AuditReport:
    """The audit judged again on the sample left after the post-audit policies.

    ``stages`` lists, in the order they ran, each post-audit policy that
    removed rows (a label such as ``clean.singletons = drop``) with the
    sample it left, a row mask over the audited frame.  The checks that
    depend on the sample (``SAMPLE_CHECKS``) run again on the context
    narrowed after each stage (shared arrays, no per-entity loops):

    * a finding of the estimation sample that is gone after a stage, or
      there at a lower severity (``panel-shape`` is always there), and stays
      so, is kept (after the others), marked ``resolved_by`` that stage's
      policy, and no longer counts for the gate;
    * every sample-dependent finding of the final sample is there with its
      values on the final sample, whether the estimation sample had it or
      not, and counts;
    * findings about the rows read (keys, repeats, values) stay as they are.

    ``panel``, ``variables``, the verdict and ``context`` are those of the
    final sample.  With no stage, the estimation sample is the final one.
    """
    if not stages:
        return replace(report, sample=FINAL_SAMPLE, policies=[])
    severities = severities or {}
    contexts = [report.context.narrowed(mask) for _, mask in stages]
    on_sample = {c.id for c in SAMPLE_CHECKS}
    seen = []
    for ctx in contexts:
        found = [c.run(ctx) for c in SAMPLE_CHECKS]
        seen.append({f.id: f for f in apply_severities([f for f in found if f], severities)})
    final = seen[-1]

    def eased(finding: Finding, found: dict[str, Finding]) -> bool:
        """Gone from a stage's findings, or there at a lower severity."""
        later = found.get(finding.id)
        return later is None or severity_rank(later.severity) < severity_rank(finding.severity)

    findings, resolved = [], []
    for finding in report.findings:
        if finding.id not in on_sample:
            findings.append(finding)
            continue
        if finding.id in final:
            findings.append(final[finding.id])
        if eased(finding, final):
            # the first stage from which the finding stays eased resolved it
            stage = len(seen)
            while stage > 0 and eased(finding, seen[stage - 1]):
                stage -= 1
            resolved.append(replace(finding, resolved_by=stages[stage][0]))
    known = {f.id for f in report.findings}
    # resolved findings last, so a look-up by id finds the one that counts first
    findings += [f for f_id, f in final.items() if f_id not in known] + resolved
    context = contexts[-1]
    return AuditReport(
        log=report.log, options=report.options,
        verdict=gate(findings, report.fail_on), fail_on=report.fail_on, findings=findings,
        keys=report.keys, input=report.input, panel=_panel_summary(context),
        variables=context.variation, context=context, sample=FINAL_SAMPLE,
        policies=[label for label, _ in stages],
    )


def _check_severities(severities: dict[str, str]) -> None:
    from panelprep.config import FINDING_IDS

    for finding_id, severity in severities.items():
        if finding_id not in FINDING_IDS:
            raise InputError(f"severity given for unknown finding id {finding_id!r}; ids are "
                             + ", ".join(FINDING_IDS))
        if severity not in SEVERITIES:
            raise InputError(f"severity {severity!r} for {finding_id} must be one of "
                             + ", ".join(SEVERITIES))


def _skipped_columns(frame: pd.DataFrame, keys: list[str], chosen: list[str]) -> Finding | None:
    """Non-key columns left out because they do not look numeric (no --vars given)."""
    skipped = [c for c in frame.columns if c not in keys and c not in chosen]
    if not skipped:
        return None
    comma = [c for c in skipped if looks_numeric(frame[c], decimal_comma=True)]
    if comma:
        they = "it is" if len(skipped) == 1 else "they are"
        message = (f"{plural(len(skipped), 'column')} not checked because {they} not numbers "
                   "as read; "
                   f"{', '.join(comma)} look like numbers with decimal commas "
                   "(try --decimal-comma, or name the variables with --vars)")
    else:
        empty = [c for c in skipped if frame[c].isna().all()]
        held = "hold no value at all" if len(empty) == len(skipped) else "hold text"
        if len(skipped) == 1:
            held = held.replace("hold", "it holds", 1)
        else:
            held = "they " + held
        message = (f"{plural(len(skipped), 'column')} not checked because {held}: "
                   f"{', '.join(skipped[:10])} (name variables with --vars to check them)")
    return Finding(id=SKIPPED_COLUMNS_ID, severity="warning" if comma else "info",
                   count=len(skipped), message=message,
                   examples=[{"column": c} for c in skipped])


def stated_step_finding(axis) -> Finding | None:
    """A stated step (``--freq int:K``) that is not the step the distinct periods show."""
    if not axis.step_stated or axis.data_step is None or axis.data_step == axis.step:
        return None
    shown, stated = axis.data_step, axis.step
    if shown % stated == 0:
        effect = (f"neighbouring values are {shown // stated} stated periods apart, so the "
                  "periods between them count as holes")
    else:
        effect = "values off the stated grid are reported as period-off-grid"
    return Finding(
        id=STEP_FINDING_ID, severity="warning", count=1,
        message=(f"the stated step {stated} (--freq int:{stated}) differs from the step the "
                 f"distinct periods show, {shown} (the greatest common divisor of their gaps); "
                 f"{effect}"),
        details={"stated_step": stated, "data_step": shown},
    )


def panel_tally(ctx: AuditContext) -> dict[str, Any]:
    """What ``panel_summary`` is built from: counts and per-value counts over entities."""
    ix = ctx.sample_index
    holes, _, _ = ctx.gaps
    return {
        "rows": int(ctx.sample.sum()),
        "rows_read": len(ctx.frame),
        "entities": int(ix.n_entities),
        "first_min": int(ix.first_period) if ix.n_entities else None,
        "last_max": int(ix.first_period + ix.n_periods - 1) if ix.n_entities else None,
        "obs": counted(ctx.periods_per_entity),
        "entities_with_gaps": int((holes > 0).sum()),
        "exact_duplicate_rows": int(ctx.repeat.sum()),
        "conflicting_duplicate_keys": len(ctx.conflicting_cells),
        "rows_without_key": int((~ctx.keyed).sum()),
    }


def panel_summary(tally: dict[str, Any]) -> dict[str, Any]:
    """The report's ``panel`` block from a :func:`panel_tally` (of one part or added up)."""
    has_rows = tally["entities"] > 0
    periods = tally["last_max"] - tally["first_min"] + 1 if has_rows else 0
    spread = obs_summary(tally["obs"]) if has_rows else {"min": 0, "median": 0.0, "max": 0}
    return {
        "rows": tally["rows"],
        "rows_read": tally["rows_read"],
        "entities": tally["entities"],
        "periods": periods,
        "balanced": bool(has_rows and set(tally["obs"]) == {periods}),
        "obs_per_entity": spread,
        "singleton_entities": int(tally["obs"].get(1, 0)),
        "entities_with_gaps": tally["entities_with_gaps"],
        "exact_duplicate_rows": tally["exact_duplicate_rows"],
        "conflicting_duplicate_keys": tally["conflicting_duplicate_keys"],
        "rows_without_key": tally["rows_without_key"],
    }


def _panel_summary(ctx: AuditContext) -> dict[str, Any]:
    return panel_summary(panel_tally(ctx))


def load(
    path: str | Path,
    entity: Sequence[str],
    time: str,
    vars: Sequence[str] | None,
    options: ReadOptions = DEFAULT_READ,
    extra: Sequence[str] = (),
) -> tuple[pd.DataFrame, dict[str, Any]]:
    """Read the columns a run needs and describe the input for provenance."""
    path = Path(path)
    names = column_names(path, options)
    for column in [*entity, time]:
        if column not in names:
            raise ColumnError(f"{path}: key column {column!r} not found; columns are {names}")
    columns = None if vars is None else list(dict.fromkeys([*entity, time, *vars, *extra]))
    digest = sha256_in_background(path)  # hashed while the columns are read
    frame = read_frame(path, columns, list(entity), time, options)
    if frame.empty:
        raise InputError(f"{path}: no data rows, only a header")
    info = {"path": str(path), "sha256": digest.result(), "rows": len(frame),
            "format": detect_format(path, options.input_format)}
    return frame, info


def audit_file(
    path: str | Path,
    entity: str | Sequence[str],
    time: str,
    vars: str | Sequence[str] | None = None,
    options: ReadOptions = DEFAULT_READ,
    progress: Progress | None = None,
    **audit_options: Any,
) -> AuditReport:
    """Read a data file and audit it (see ``audit``)."""
    entity = split_names(entity) or []
    variables = split_names(vars)
    progress = progress if progress is not None else RunLog()
    progress("read", f"reading {path}")
    frame, info = load(path, entity, time, variables, options)
    report = audit(
        frame, entity, time, variables,
        decimal_comma=options.decimal_comma,
        missing_tokens=options.missing_tokens,
        input_info=info,
        progress=progress,
        **audit_options,
    )
    report.options = {"input.path": str(Path(path).absolute()),
                      "input.format": options.input_format,
                      "input.delimiter": options.delimiter, **report.options}
    return report
