"""The preparation flow: load -> clean (ledger) -> audit and gate -> sample ->
components -> transforms -> write, all into a folder that appears complete
or not at all.

Every step that removes rows records them in the ``Ledger``; the story of
steps (rows and entities before and after) goes into both diagnostics files.
"""

from __future__ import annotations

import json
import os
import threading
import time
from collections.abc import Iterator, Sequence
from concurrent.futures import Future
from dataclasses import asdict, dataclass, field, replace
from datetime import UTC, datetime
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa

from panelprep import cautions, transforms
from panelprep._groups import group_counts
from panelprep._linalg import column_factor, independent_columns, reference_scale
from panelprep._moments import ScaledMoments, standard_sample
from panelprep._paths import check_readable
from panelprep._scale import standardise
from panelprep._schema import SCHEMA_VERSION
from panelprep._version import __version__
from panelprep.checks import AuditContext, Thresholds
from panelprep.choices import METHODS, OUTPUT_FORMATS, PARQUET_COMPRESSIONS, TRANSFORMS
from panelprep.clean import (
    Policies,
    Removal,
    balance_removal,
    duplicate_removal,
    merge_means,
    normalise_ids,
    singleton_removal,
    window_removal,
)
from panelprep.components import VarianceComponents
from panelprep.config import (
    ChecksSection,
    CleanSection,
    CompareSection,
    ContractSection,
    DeriveSection,
    EngineSection,
    InputSection,
    ModelSection,
    NamesSection,
    OutputSection,
    PanelSection,
    RunFile,
)
from panelprep.errors import InputError
from panelprep.evidence import collect_evidence, uncomputable_tests
from panelprep.figures import missing_picture, picture_data
from panelprep.findings import (
    UNCOMPUTABLE_ID,
    Finding,
    apply_severities,
    gate,
    gate_block,
    library_warnings_finding,
    ordered,
    recorded_warnings,
)
from panelprep.index import PanelIndex, build_index
from panelprep.io import (
    DEFAULT_READ,
    DIAGNOSTIC_FILES,
    OutputFolder,
    ReadOptions,
    check_output_folder,
    column_names,
    release_arrow_memory,
    sha256_file,
    sha256_in_background,
    write_table,
)
from panelprep.lags import Shift, add_shifts, parse_shifts
from panelprep.ledger import Ledger, StepRecord, require_rows
from panelprep.names import (
    MEANINGS,
    ROLE_AUXILIARY,
    ROLE_INTERCEPT,
    ROLE_KEY,
    ROLE_REGRESSOR,
    ROLE_RESPONSE,
    ROLE_WEIGHT,
    ROW_CONVENTION,
    AddedNames,
    check_added_names,
)
from panelprep.pipeline import (
    AuditReport,
    Progress,
    audit,
    judge_final_sample,
    load,
    sample_definition,
    split_names,
)
from panelprep.runlog import RunLog, utc_stamp

DEFAULT_TRANSFORMS = ("within", "between", "quasi")


@dataclass
class PrepareOptions:
    """Everything that defines a preparation (the run file maps onto this)."""

    entity: list[str]
    time: str
    y: str
    x: list[str]
    freq: str | None = None
    transforms: list[str] = field(default_factory=lambda: list(DEFAULT_TRANSFORMS))
    method: str = "swamy-arora"
    output_format: str = "parquet"
    compression: str = "zstd"
    fail_on: str = "error"
    severities: dict[str, str] = field(default_factory=dict)
    thresholds: Thresholds = field(default_factory=Thresholds)
    twoway_tol: float = 1e-12
    policies: Policies = field(default_factory=Policies)
    shifts: list[Shift] = field(default_factory=list)
    contract: Any = None
    validate_outputs: bool = False
    evidence: bool = True
    names: AddedNames = field(default_factory=AddedNames)
    # the previous vintage to compare the input with (compare.PreviousVintage), or None
    previous: Any = None

    def validate(self) -> None:
        self.policies.validate()
        self.names.validate()
        unknown = [t for t in self.transforms if t not in TRANSFORMS]
        if unknown:
            raise InputError(f"--transform {unknown} not among {', '.join(TRANSFORMS)}")
        if self.method not in METHODS:
            raise InputError(f"--method {self.method!r} is not one of {', '.join(METHODS)}")
        if self.output_format not in OUTPUT_FORMATS:
            raise InputError(f"--format {self.output_format!r} must be parquet or csv")
        if self.compression not in PARQUET_COMPRESSIONS:
            raise InputError(f"--compression {self.compression!r} is not one of "
                             f"{', '.join(PARQUET_COMPRESSIONS)}")
        if not self.x:
            raise InputError("--x names no regressor")
        if self.y in self.x:
            raise InputError(f"{self.y!r} cannot be both --y and in --x")

    @property
    def variables(self) -> list[str]:
        return [self.y, *self.x]

    def check_names(self, input_columns: Sequence[str], source: str) -> None:
        """Refuse added or derived columns that share a name with another column.

        Runs on the header's names before the data is read (see
        ``panelprep.names.check_added_names``).
        """
        check_added_names(list(input_columns), self.names, self.transforms,
                          [(s.name, s.option, s.kind) for s in self.shifts], source)

    @property
    def columns_to_read(self) -> list[str]:
        """Model variables that come from the file, and the sources of lags and differences."""
        made = {shift.name for shift in self.shifts}
        sources = [shift.variable for shift in self.shifts]
        return list(dict.fromkeys([*(v for v in self.variables if v not in made), *sources]))


@dataclass(eq=False)
class Preparation:
    """The result of ``prepare``: the audit, what was built, and where it went.

    ``tables`` builds every output table on first use and keeps them;
    ``outputs`` holds the recipe, so a run that writes files builds, writes
    and frees one table at a time instead of holding them all.
    """

    audit: AuditReport
    ledger: Ledger
    components: VarianceComponents | None
    outputs: OutputTables | None
    summary: dict[str, Any]
    sample_index: PanelIndex | None = None
    written_to: Path | None = None
    # the evidence while it is computed beside the writes (run_preparation)
    evidence_job: _EvidenceJob | None = None
    # the input against its previous vintage (compare.Comparison), when one was given
    comparison: Any = None

    @cached_property
    def tables(self) -> dict[str, pd.DataFrame]:
        """Every output table by name (empty when the gate failed)."""
        if self.outputs is None:
            return {}
        return {name: self.outputs.build(name) for name in self.outputs.names}

    @property
    def verdict(self) -> str:
        """The gate over the audit's findings and those of the components."""
        return self.summary["verdict"]

    def to_dict(self) -> dict[str, Any]:
        return self.summary


def prepare_frame(
    frame: pd.DataFrame,
    options: PrepareOptions,
    input_info: dict[str, Any] | None = None,
    read_options: ReadOptions = DEFAULT_READ,
    progress: Progress | None = None,
    check_names: bool = True,
    record: RunFile | None = None,
    owns_frame: bool = False,
    defer_evidence: bool = False,
    comparison: Any = None,
) -> Preparation:
    """Clean, audit and transform a panel held in memory; nothing is written.

    Returns a ``Preparation`` whose ``tables`` hold ``clean``, each requested
    transform and ``dropped`` (the ledger), and whose ``summary`` is the
    diagnostics document.  When the gate fails, ``tables`` is empty.
    ``check_names`` refuses added columns whose names the frame already uses
    (off only where no table is built).  ``record`` is the run as a run
    file (``run_record``), for the ``run`` block of the summary.
    ``owns_frame`` says the frame was read for this run
    (``run_preparation``): its variable columns are then dropped, in place,
    once the sample block is taken.  A caller's frame is never changed.
    ``defer_evidence`` computes the evidence in a thread of its own
    (``Preparation.evidence_job``), for ``run_preparation`` to settle after
    writing the data files.  ``comparison`` (a ``compare.Comparison`` of
    this frame against its previous vintage) adds its findings to the gate
    and its report to the summary (``comparison``).  Warnings a library
    raises on the way are recorded in a ``library-warnings`` finding, never
    printed.

    Examples
    --------
    >>> import pandas as pd
    >>> from panelprep.prepare import PrepareOptions, prepare_frame
    >>> frame = pd.DataFrame({"firm": list("aabbcc"), "year": [1, 2] * 3,
    ...                       "sales": [1.0, 2.0, 3.0, 5.0, 4.0, 4.5],
    ...                       "capital": [2.0, 2.5, 1.0, 3.0, 2.0, 1.0]})
    >>> prep = prepare_frame(frame, PrepareOptions(entity=["firm"], time="year", y="sales",
    ...                                            x=["capital"]))
    >>> prep.verdict, sorted(prep.tables), len(prep.tables["within"])
    ('pass', ['between', 'clean', 'dropped', 'quasi', 'within'], 6)
    """
    with recorded_warnings() as caught:
        prep = _prepare_frame(frame, options, input_info, read_options, progress, check_names,
                              owns_frame, record, defer_evidence, comparison)
    said = library_warnings_finding(caught)
    if said is not None:
        prep.audit.findings.append(said)
        prep.summary["findings"].append(said.to_dict())
    return prep


def _prepare_frame(
    frame: pd.DataFrame, options: PrepareOptions, input_info: dict[str, Any] | None,
    read_options: ReadOptions, progress: Progress | None, check_names: bool, owns_frame: bool,
    record: RunFile | None, defer_evidence: bool = False, comparison: Any = None,
) -> Preparation:
    options.validate()
    progress = progress if progress is not None else RunLog()
    if check_names:
        options.check_names(list(frame.columns), "the data")
    policies = options.policies
    flow = _Flow(frame, Ledger(rows_read=len(frame)))
    contract_findings = []
    if options.contract is not None:
        from panelprep.contracts import check_contract

        progress("contract", "checking the schema contract", rows=len(frame))
        contract_findings = check_contract(frame, options.contract, where="input")
    if comparison is not None:
        contract_findings += comparison.findings

    if policies.normalise_ids != "none":
        progress("normalise-ids", f"normalise entity ids ({policies.normalise_ids})",
                 rows=len(flow.frame))
        before = _distinct_entities(flow.frame, options.entity)
        flow.frame, changed = normalise_ids(flow.frame, options.entity, policies.normalise_ids)
        flow.note("normalise-ids", f"normalise entity ids ({policies.normalise_ids})", before,
                  _distinct_entities(flow.frame, options.entity), f"{changed:,} ids changed")
    progress("index", "indexing", rows=len(flow.frame))
    flow.index = build_index(flow.frame, options.entity, options.time, options.freq)
    release_arrow_memory()  # what factorising Arrow strings left in the pool
    if policies.duplicates != "fail":
        progress("duplicates", f"duplicates policy {policies.duplicates}", rows=len(flow.frame))
        ctx = _context(flow, options, read_options)
        flow.apply(duplicate_removal(flow.frame, flow.index, ctx.repeat, policies.duplicates),
                   "duplicates")
        if policies.duplicates == "mean":
            ctx = _context(flow, options, read_options)
            flow.frame, removal = merge_means(flow.frame, flow.index, ctx.values, ctx.variables)
            flow.apply(removal, "duplicates-mean")
    if options.shifts:
        progress("derive", f"{len(options.shifts)} lags, leads or differences",
                 rows=len(flow.frame))
        flow.frame = add_shifts(flow.frame, flow.index, options.shifts,
                                read_options.decimal_comma, read_options.missing_tokens)
    # after the lags, so a lag at the window's first period may reach before it
    flow.apply(window_removal(flow.index, policies.window), "window")

    severities = dict(options.severities)
    if policies.duplicates == "fail":
        # a preparation never drops repeated rows unless a policy says so
        severities.setdefault("row-repeated", "error")
    report = audit(
        flow.frame, options.entity, options.time, options.variables,
        freq=options.freq, fail_on=options.fail_on, thresholds=options.thresholds,
        severities=severities, decimal_comma=read_options.decimal_comma,
        missing_tokens=read_options.missing_tokens, input_info=input_info,
        index=flow.index, progress=progress, prior_findings=contract_findings,
        origin=flow.origin,
        # a frame read for this run keeps its variables only in the audit's float block
        release_columns=((lambda names: _free_variable_columns([frame, flow.frame], names,
                                                               options))
                         if owns_frame else None),
    )
    audited = report.context
    progress("sample", "building the estimation sample", rows=len(flow.frame))
    keys, repeats, listwise_step = sample_steps(audited, options.variables)
    flow.drop(*keys)
    flow.drop(*repeats)
    before_listwise = flow.alive.copy() if options.shifts else None
    flow.drop(*listwise_step)
    emptied = (None if before_listwise is None
               else cautions.periods_lost(flow.index, before_listwise, flow.alive))
    # the post-audit policies, each with the sample it leaves, so that the
    # audit is judged on the rows the files will hold
    stages: list[tuple[str, np.ndarray]] = []
    if policies.balance != "keep":
        flow.narrow(balance_removal(flow.index, flow.alive, policies.balance, policies.window),
                    stages, f"clean.balance = {policies.balance}", "balance")
    if policies.singletons == "drop":
        flow.narrow(singleton_removal(flow.index, flow.alive, "twoway" in options.transforms),
                    stages, "clean.singletons = drop", "singletons")
    listwise = _listwise_summary(audited)
    if flow.alive.any():
        # an emptied sample keeps the estimation sample's report: it fails the
        # gate, or is refused below
        report = judge_final_sample(report, stages, severities)
    del audited
    ctx = report.context
    summary = report.to_dict()
    if comparison is not None:
        summary["comparison"] = comparison.report()
    if report.verdict == "fail":
        failed_summary(summary, report, flow.ledger.story, flow.ledger.by_reason(), progress,
                       record or run_record(options, read_options), options)
        return Preparation(report, flow.ledger, None, None, summary, comparison=comparison)

    if len(ctx.conflicting_cells):
        raise InputError(
            "conflicting duplicate keys remain but the gate let them through; "
            "choose a duplicates policy or keep key-conflict an error"
        )
    sample = flow.alive
    require_rows(int(sample.sum()), "cleaning")
    flow.ledger.verify(int(sample.sum()))

    # the context is the final sample's (judge_final_sample): its index and block are the files'
    sample_ix = ctx.sample_index
    codes = sample_ix.entity_codes
    counts = group_counts(codes, sample_ix.n_entities)
    values = ctx.sample_values
    ctx.release_values()
    y, X = values[:, 0], values[:, 1:]

    progress("components", f"variance components ({options.method})", rows=len(y))
    # standardised and summed per entity once: the components, the evidence and the
    # files' column decisions all read these
    standard = standard_sample(y, X, codes, counts, shared=ctx.sample_means)
    components = VarianceComponents(method=options.method).fit(
        y, X, codes, counts, names=options.x, sample=standard)
    keys = flow.frame[[*options.entity, options.time]].iloc[np.flatnonzero(sample)]
    outputs = OutputTables(
        keys=keys.reset_index(drop=True), index=sample_ix, values=values, counts=counts,
        theta=components.theta_, options=options, ledger=flow.ledger, raw=frame,
        rows=flow.origin[np.flatnonzero(sample)] + 1, progress=progress,
        norms=standard.centred_norms(),
    )

    # a severity given for a components finding counts like one given for a check
    judged = apply_severities(_components_findings(components, options), options.severities)
    findings = report.findings + judged
    if options.validate_outputs and options.contract is not None:
        from panelprep.contracts import check_contract

        # checked as written less the row column, indexed by input row so
        # examples name rows of the input
        clean = outputs.build("clean")
        clean = clean.drop(columns=[options.names.row]).set_index(
            pd.Index(clean[options.names.row], name=None))
        findings += check_contract(clean, options.contract, where="output clean")
    fitted_summary(summary, findings, options, {"rows": len(codes),
                                                "entities": int(sample_ix.n_entities),
                                                **listwise},
                   flow.ledger.story, flow.ledger.by_reason(), components, judged)
    closed_summary(summary, outputs.info, components, sample_ix.n_periods, standard, counts,
                   options, emptied)
    prep = Preparation(report, flow.ledger, components, outputs, summary, sample_ix,
                       comparison=comparison)
    if options.evidence:
        evidence = _EvidenceJob(
            lambda: collect_evidence(y, X, codes, counts, components, options.x,
                                     sample=standard, period_codes=sample_ix.period_codes),
            findings, options, rows=len(y))
        if defer_evidence and summary["verdict"] != "fail":
            # computed in a thread of its own while the data files are written
            # (run_preparation settles it before the diagnostics)
            prep.evidence_job = evidence.start()
        else:
            progress("evidence", _EvidenceJob.WHAT, rows=len(y))
            evidence.settle(prep, evidence.compute())
    summary["run"] = run_block(progress, record or run_record(options, read_options), summary,
                               options)
    if summary["verdict"] == "fail":
        _failed_after_gate(summary)
        prep.outputs = None
    return prep


def _failed_after_gate(summary: dict[str, Any]) -> None:
    """A run that failed after the gate (components, evidence, the contract on the outputs):
    its cautions about the files would be about files never written, and its sample's
    files are not written."""
    summary["cautions"] = [_gate_caution(summary["gate"]["failed_by"])]
    samples = summary["samples"]
    samples["definition"] = sample_definition(samples["panel"], samples["policies"],
                                              written=False)


class _EvidenceJob:
    """The evidence of a preparation: computed in line, or in a thread while files are written.

    ``settle`` adds it to the preparation as the in-line computation does:
    the ``evidence`` block, a warning for each test float64 could not carry
    out (which may fail the gate), and the caution on standard errors the
    tests support.  The tests only read the sample's arrays, which nothing
    writes to, so they can run beside the writing of the data files; on two
    cores that hides most of their time.
    """

    WHAT = "evidence on the entity effect and the error structure"

    def __init__(self, compute: Any, findings: list[Finding], options: PrepareOptions,
                 rows: int) -> None:
        self.compute = compute
        self.findings = findings
        self.options = options
        self.rows = rows
        self.future: Future | None = None
        self.started_at = ""
        self.began = 0.0
        self.seconds = 0.0

    def start(self) -> _EvidenceJob:
        self.future = Future()
        self.started_at = utc_stamp(datetime.now(UTC))
        self.began = began = time.perf_counter()

        def run() -> None:
            try:
                self.future.set_result(self.compute())
            except BaseException as err:  # noqa: BLE001 (raised again by result())
                self.future.set_exception(err)
            finally:
                self.seconds = time.perf_counter() - began

        threading.Thread(target=run, daemon=True).start()
        return self

    def wait(self, prep: Preparation, progress: Progress) -> None:
        """Join the thread, record its step (``run.steps``) and settle the evidence."""
        evidence = self.future.result()
        record = getattr(progress, "concurrent", None)
        if record is not None:
            record("evidence", self.WHAT, self.rows, self.started_at, self.began, self.seconds)
        self.settle(prep, evidence)

    def settle(self, prep: Preparation, evidence: dict[str, Any]) -> None:
        summary, options = prep.summary, self.options
        summary["evidence"] = evidence
        lost = _uncomputable_finding(evidence, options)
        if lost is not None:
            for finding in apply_severities([lost], options.severities):
                self.findings.append(finding)
                summary["findings"].append(finding.to_dict())
            summary["findings"] = ordered(summary["findings"])  # worst first, as everywhere
            summary["verdict"] = gate(self.findings, options.fail_on)
            summary["gate"] = gate_block(summary["findings"], options.fail_on)
        if evidence.get("standard_errors"):
            # what the error-structure tests of this run say, beside the general advice
            summary["cautions"].append(evidence["standard_errors"])
        if summary["verdict"] == "fail":
            prep.outputs = None


def sample_steps(audited: AuditContext, variables: list[str]
                 ) -> list[tuple[np.ndarray, str, str, str]]:
    """The steps from the rows read to the estimation sample: (rows removed, reason id,
    step, step id), in order."""
    return [
        (~audited.keyed, "key-missing", "drop rows without a full key", "sample-keys"),
        (audited.repeat, "exact-repeat", "collapse exact repeated rows", "sample-repeats"),
        (~audited.complete, "listwise-missing", f"listwise deletion over {', '.join(variables)}",
         "sample-listwise"),
    ]


def failed_summary(summary: dict[str, Any], report: AuditReport, story: list[StepRecord],
                   by_reason: dict[str, int], progress: Progress, record: RunFile,
                   options: PrepareOptions) -> None:
    """A summary whose gate failed: the steps and drops, no file, the caution, the run."""
    summary["steps"] = [s.to_dict() for s in story]
    summary["dropped"] = {"rows": sum(by_reason.values()), "by_reason": by_reason}
    summary["files"] = []
    summary["cautions"] = [_gate_caution(summary["gate"]["failed_by"])]
    summary["run"] = run_block(progress, record, summary, options)


def fitted_summary(summary: dict[str, Any], findings: list[Finding], options: PrepareOptions,
                   sample: dict[str, int], story: list[StepRecord], by_reason: dict[str, int],
                   components: VarianceComponents, judged: list[Finding]) -> None:
    """The findings (with the components', ``judged``), gate, sample, steps, drops and
    components."""
    summary["findings"] = ordered([f.to_dict() for f in findings])
    summary["verdict"] = gate(findings, options.fail_on)
    summary["gate"] = gate_block(summary["findings"], options.fail_on)
    summary["sample"] = {**sample, "y": options.y, "x": options.x}
    summary["steps"] = [s.to_dict() for s in story]
    summary["dropped"] = {"rows": sum(by_reason.values()), "by_reason": by_reason}
    # the components' findings as judged here, the same as in summary.findings
    summary["components"] = {**components.to_dict(), "findings": [f.to_dict() for f in judged]}


def closed_summary(summary: dict[str, Any], info: dict[str, Any],
                   components: VarianceComponents, n_periods: int, sample: ScaledMoments,
                   counts: np.ndarray, options: PrepareOptions,
                   emptied: Any = None) -> None:
    """What the transforms did and the cautions (``sample``: the components' scaled moments,
    ``counts``: rows per entity; ``emptied``: the periods listwise deletion emptied of a
    lagged variable, ``cautions.periods_lost``); the evidence adds its own when settled."""
    summary["transforms"] = info
    summary["cautions"] = [
        *_cautions(info, components, n_periods, options.names),
        *cautions.time_invariant_cautions(components, sample, counts, options.x),
        *cautions.lagged_response_cautions(options.shifts, options.y, options.x,
                                           options.transforms, counts),
        *([] if emptied is None else cautions.lag_period_cautions(
            options.shifts, options.x, options.y, summary["findings"], emptied)),
        *cautions.listwise_cautions(summary["findings"]),
    ]


def _uncomputable_finding(evidence: dict[str, Any], options: PrepareOptions) -> Finding | None:
    """A warning naming each test float64 arithmetic could not carry out, and its variables."""
    lost = uncomputable_tests(evidence)
    if not lost:
        return None
    variables = {"breusch_pagan": [options.y], "honda": [options.y]}
    named = [f"{test} ({', '.join(variables.get(test, [options.y, *options.x]))})"
             for test in lost]
    return Finding(
        id=UNCOMPUTABLE_ID, severity="warning", count=len(lost),
        message=(f"{len(lost)} test(s) of the evidence could not be computed in float64 and "
                 f"are left null: {', '.join(named)}; {next(iter(lost.values()))}"),
        examples=[{"test": test, "note": note} for test, note in lost.items()])


def _distinct_entities(frame: pd.DataFrame, entity: list[str]) -> int:
    """Distinct complete entity keys, counted before an index exists."""
    return len(frame[entity].dropna().drop_duplicates())


def _context(flow: _Flow, options: PrepareOptions, read_options: ReadOptions) -> AuditContext:
    """A context over the model variables already in the frame (lags come later)."""
    present = [v for v in options.variables if v in flow.frame.columns]
    return AuditContext(flow.frame, flow.index, present,
                        decimal_comma=read_options.decimal_comma,
                        missing_tokens=read_options.missing_tokens)


# Rows per piece of the within and quasi files: each piece is built, written and freed
# (a Parquet row group each), so no transformed (n, k) block is ever held whole.
PIECE_ROWS = 1 << 20

# Why a regressor is left out of a transformed file.
LEFT_OUT = {
    "no-within-variation": "constant within every entity: the within transform leaves zeros",
    "no-twoway-variation": "explained by entity and period effects: the two-way transform "
                           "leaves zeros",
    "no-diff-variation": "constant within every entity: its first differences are zeros",
    "collinear": "a linear combination of the columns before it in this file "
                 "(with the constant or intercept column where the file has one)",
}


@dataclass(eq=False)
class OutputTables:
    """Builds the clean table, each transform and the ledger table on demand.

    ``info`` says what each transform did; it is known before building,
    except what building finds: the two-way transform's iterations and
    precision, and the regressors each transform leaves out
    (``regressors_left_out``).  ``columns`` holds each built table's columns
    with their roles (``panelprep.names``).
    """

    keys: pd.DataFrame
    index: PanelIndex
    values: np.ndarray
    counts: np.ndarray
    theta: np.ndarray
    options: PrepareOptions
    ledger: Ledger
    raw: pd.DataFrame
    rows: np.ndarray
    progress: Progress
    # ||x - mean(x)|| of each regressor on the whole sample (StandardSample.centred_norms)
    norms: np.ndarray | None = None
    # the dask engine: each file's reference sizes and column decisions, taken on the whole
    # sample (see _design and _regressors)
    scales: dict[str, np.ndarray] | None = None
    decided: dict[str, tuple[np.ndarray, np.ndarray]] | None = None
    info: dict[str, Any] = field(init=False)
    columns: dict[str, list[dict[str, str]]] = field(init=False)

    def __post_init__(self) -> None:
        multi_rows = int((self.counts[self.index.entity_codes] > 1).sum())
        singletons = int((self.counts == 1).sum())
        plan = {
            "within": {"rows": multi_rows,
                       "entities_absorbed": int(self.index.n_entities - singletons),
                       "singletons_dropped": singletons},
            "between": {"rows": int(self.index.n_entities)},
            "quasi": {"rows": len(self.keys)},
            "twoway": {"rows": multi_rows, "singletons_dropped": singletons},
            "diff": {},
        }
        if "diff" in self.options.transforms:
            # the counts are known before the file is built (a sort, no values)
            found = transforms.first_difference(np.empty((len(self.keys), 0)),
                                                self.index.entity_codes, self.index.period_codes)
            plan["diff"] = {"rows": len(found.rows), "first_rows": found.first_rows,
                            "across_holes": found.across_holes}
        self.info = {name: plan[name] for name in self.options.transforms}
        self.columns = {}

    @property
    def names(self) -> list[str]:
        return ["clean", *self.options.transforms, "dropped"]

    def build(self, name: str) -> pd.DataFrame:
        """One output table as a DataFrame, built afresh."""
        return self.arrow(name).to_pandas()

    @cached_property
    def _key_table(self) -> pa.Table:
        rows = pa.table({self.options.names.row: pa.array(self.rows, type=pa.int64())})
        keys = pa.Table.from_pandas(self.keys, preserve_index=False)
        return pa.Table.from_arrays([*rows.columns, *keys.columns],
                                    names=[*rows.column_names, *keys.column_names])

    def arrow(self, name: str) -> pa.Table:
        """One output table as an Arrow table: key columns, then numpy columns without a copy."""
        return pa.concat_tables(self.pieces(name))

    def pieces(self, name: str) -> Iterator[pa.Table]:
        """One output table as Arrow tables of consecutive rows, built as they are read.

        The within and quasi files come in pieces of ``PIECE_ROWS`` rows, so
        writing them never holds an (n, k) transformed block; every other
        table is one piece.
        """
        if name in ("within", "quasi"):
            first = True
            for table in self._demeaned_pieces(name):
                if first:
                    self.columns[name] = self._roles(table.column_names)
                    first = False
                yield table
            return
        table = self._arrow(name)
        self.columns[name] = self._roles(table.column_names)
        yield table

    def _demeaned_pieces(self, name: str) -> Iterator[pa.Table]:
        codes, names = self.index.entity_codes, self.options.variables
        added = self.options.names
        self.progress(f"transform.{name}", f"transform {name}", rows=len(self.keys))
        block, multi, rows, design = self._transformed(name)
        kept = self._regressors(name, *design)
        n = block.shape[0]
        for start in range(0, max(n, 1), PIECE_ROWS):
            stop = min(start + PIECE_ROWS, n)
            if rows is None:
                keys = self._key_table.slice(start, stop - start)
            else:
                low = int(rows[start]) if stop > start else 0
                high = int(rows[stop - 1]) + 1 if stop > start else 0
                keys = self._key_table.slice(low, high - low).filter(
                    pa.array(multi[low:high]))
            table = _with_columns(keys, names, block.piece(start, stop), kept)
            if name == "quasi":
                theta = self.theta[codes[start:stop]]
                table = table.append_column(added.intercept, pa.array(1.0 - theta))
                table = table.append_column(added.theta, pa.array(theta))
            yield table

    def _roles(self, columns: list[str]) -> list[dict[str, str]]:
        opts, added = self.options, self.options.names
        roles = {**{c: ROLE_KEY for c in [*opts.entity, opts.time]}, opts.y: ROLE_RESPONSE,
                 **{c: ROLE_REGRESSOR for c in opts.x}, added.intercept: ROLE_INTERCEPT,
                 added.entity_rows: ROLE_WEIGHT}
        meanings = {getattr(added, field): text for field, text in MEANINGS.items()}
        return [{"name": c, "role": roles.get(c, ROLE_AUXILIARY),
                 **({"meaning": meanings[c]} if c in meanings else {})} for c in columns]

    def _arrow(self, name: str) -> pa.Table:
        codes, names, values = self.index.entity_codes, self.options.variables, self.values
        added = self.options.names
        if name == "clean":
            return _with_columns(self._key_table, names, values)
        if name == "dropped":
            frame = self.ledger.to_frame(self.raw, [*self.options.entity, self.options.time],
                                         added)
            return pa.Table.from_pandas(frame, preserve_index=False)
        self.progress(f"transform.{name}", f"transform {name}", rows=len(self.keys))
        multi = self.counts[codes] > 1
        if name == "between":
            labels = pa.Table.from_pandas(self.index.entity_labels, preserve_index=False)
            block, _, _, design = self._transformed(name)
            kept = self._regressors(name, *design)
            table = _with_columns(labels, names, block, kept)
            return table.append_column(added.entity_rows, pa.array(self.counts))
        if name == "diff":
            found = transforms.first_difference(values, codes, self.index.period_codes)
            differenced = np.zeros(len(codes), dtype=bool)
            differenced[found.rows] = True
            kept = self._regressors(name, *self._design(name, found.values, values, differenced,
                                                        np.ones(len(found.rows))),
                                    "no-diff-variation")
            return _with_columns(self._key_table.take(pa.array(found.rows)), names,
                                 found.values, kept)
        sub = self.index.subset(multi)
        block, result = transforms.twoway(
            values[multi], sub.entity_codes, sub.period_codes, sub.n_entities, sub.n_periods,
            tol=self.options.twoway_tol,
        )
        self.info["twoway"].update(asdict(result))
        kept = self._regressors(name, *self._design(name, block, values, multi, None),
                                "no-twoway-variation")
        return _with_columns(self._key_table.filter(pa.array(multi)), names, block, kept)

    def _transformed(self, name: str) -> tuple[Any, np.ndarray | None, np.ndarray | None,
                                               tuple]:
        """The block of the within, quasi or between file, its rows (within: the mask of
        rows of entities with two rows or more, and their positions unless that is all of
        them) and the arguments of ``_regressors`` that judge its columns."""
        codes, values = self.index.entity_codes, self.values
        if name == "within":
            multi = self.counts[codes] > 1
            rows = None if multi.all() else np.flatnonzero(multi)
            block = transforms.within_block(values, codes, self.counts, rows)
            return block, multi, rows, (*self._design(name, block, values, multi, None),
                                        "no-within-variation")
        if name == "quasi":
            block = transforms.quasi_block(values, codes, self.counts, self.theta)
            first = 1.0 - self.theta[codes]
            return block, None, None, (*self._design(name, block, values, None, first),
                                       "collinear")
        block = transforms.between(values, codes, self.counts)
        first = np.ones(len(block))
        return block, None, None, (*self._design(name, block, None, None, first), "collinear")

    def _design(self, name: str, block: Any, raw: np.ndarray | None, rows: np.ndarray | None,
                first: np.ndarray | None) -> tuple[list[np.ndarray], np.ndarray, bool, bool]:
        """The columns of a file's design (the constant or intercept column first, when it
        has one, then its regressors) and their reference sizes.

        A size is the norm of the untransformed column about its mean on the same rows,
        taken on scaled values: a level (x + 1e9) or a magnitude (1e200) must not change
        a decision.  ``scales`` (the dask engine) gives them for the whole sample.
        """
        k = block.shape[1] - 1
        columns = [block[:, j] for j in range(1, k + 1)]
        if first is not None:
            columns.insert(0, first)
        if self.scales is not None and name in self.scales:
            return columns, self.scales[name], first is not None, raw is not None
        source = block if raw is None else raw
        if raw is not None and self.norms is not None and (rows is None or rows.all()):
            scale = self.norms
        else:
            scale = np.array([_centred_norm(source[:, j] if raw is None or rows is None
                                            else source[rows, j]) for j in range(1, k + 1)])
        if first is not None:
            scale = np.concatenate([[np.sqrt(len(first))], scale])
        return columns, scale, first is not None, raw is not None

    def factor(self, name: str) -> np.ndarray:
        """A factor of the within, quasi or between file's design on these rows
        (``_linalg.column_factor``): the dask engine stacks the partitions' factors and
        decides the columns once (``decided``)."""
        _, _, _, (columns, scale, _, _, _) = self._transformed(name)
        return column_factor(columns, reference_scale(scale, len(columns)), gram_route=False)

    def _regressors(self, name: str, columns: list[np.ndarray], scale: np.ndarray,
                    has_first: bool, has_raw: bool, wiped: str) -> np.ndarray:
        """Which columns of the file (y, then x) it keeps; the rest are recorded.

        A regressor is left out when the transform left nothing of it
        (``wiped``, judged against the norm of the untransformed column on
        the same rows) or when it is a combination of the columns before it
        (the constant or intercept column, then the earlier regressors), so
        OLS on every regressor column is well defined.  ``decided`` (the dask
        engine) holds the decision taken on the whole sample.
        """
        if self.decided is not None and name in self.decided:
            independent, negligible = self.decided[name]
        else:
            independent, negligible = independent_columns(columns, scale)
        if has_first:
            independent, negligible = independent[1:], negligible[1:]
        left_out = []
        for j in np.flatnonzero(~independent):
            reason = wiped if negligible[j] and has_raw else "collinear"
            left_out.append({"name": self.options.x[j], "reason": reason,
                             "why": LEFT_OUT[reason]})
        self.info[name]["regressors_left_out"] = left_out
        return np.concatenate([[True], independent])


def _centred_norm(column: np.ndarray) -> float:
    """``||x - mean(x)||`` without overflow or underflow (see ``_scale.standardise``)."""
    standard = standardise(column)
    return float(standard.scale[0] * np.linalg.norm(standard.z[:, 0]))


def _listwise_summary(ctx: AuditContext) -> dict:
    """What listwise deletion removed from the audited (estimation-sample) context."""
    codes, n = ctx.index.entity_codes, ctx.index.n_entities
    before = group_counts(codes[ctx.base], n) > 0
    after = group_counts(codes[ctx.sample], n) > 0
    return {
        "listwise_rows_removed": int((~ctx.complete & ctx.base).sum()),
        "listwise_entities_removed": int((before & ~after).sum()),
    }


@dataclass(eq=False)
class _Flow:
    """The rows still alive, their input row numbers, and the ledger that records the rest.

    Steps before the audit shrink the frame itself (``apply``); steps after
    it only narrow ``alive`` over the audited frame (``drop``, ``narrow``),
    so the audit's arrays stay valid.
    """

    frame: pd.DataFrame
    ledger: Ledger
    index: PanelIndex | None = None
    origin: np.ndarray = field(init=False)
    alive: np.ndarray | None = None
    # the mask the last recorded step left (its entity count is the next step's before)
    _last_after: np.ndarray | None = field(default=None, init=False, repr=False)

    def __post_init__(self) -> None:
        self.origin = np.arange(len(self.frame))

    def note(self, step_id: str, step: str, entities_before: int, entities_after: int,
             note: str) -> None:
        """A step that changes values but removes no row."""
        rows = len(self.frame)
        self._last_after = None
        self.ledger.story.append(StepRecord(step_id, step, rows, rows, entities_before,
                                            entities_after, note))

    def apply(self, removal: Removal | None, step_id: str) -> None:
        """Before the audit: remove rows from the frame and the index."""
        if removal is None:
            return
        keep = ~removal.mask
        self._story(step_id, removal.step, np.ones(len(self.frame), dtype=bool), keep)
        self.ledger.drop(self.origin[removal.mask], removal.reason, step_id)
        self.frame = self.frame.iloc[np.flatnonzero(keep)].reset_index(drop=True)
        self.origin = self.origin[keep]
        self.index = self.index.subset(keep)

    def narrow(self, removal: Removal | None, stages: list[tuple[str, np.ndarray]],
               policy: str, step_id: str) -> None:
        """After the audit: a policy's removal narrows ``alive``; ``stages`` gets (policy, alive)."""
        if removal is not None:
            self.drop(removal.mask, removal.reason, removal.step, step_id)
            stages.append((policy, self.alive))

    def drop(self, removed: np.ndarray, reason: str, step: str, step_id: str) -> None:
        """Narrow ``alive`` (all rows at first) by ``removed``, recording the rows."""
        if self.alive is None:
            self.alive = np.ones(len(self.frame), dtype=bool)
        gone = removed & self.alive
        after = self.alive & ~gone
        self._story(step_id, step, self.alive, after)
        self.ledger.drop(self.origin[gone], reason, step_id)
        self.alive = after

    def _entities(self, mask: np.ndarray) -> int:
        codes = self.index.entity_codes[mask]
        return int((group_counts(codes[codes >= 0], self.index.n_entities) > 0).sum())

    def _story(self, step_id: str, step: str, before: np.ndarray, after: np.ndarray) -> None:
        rows_before, rows_after = int(before.sum()), int(after.sum())
        # a step's entities before are the previous step's after; a step that removes no
        # row keeps them
        last = self.ledger.story[-1] if self.ledger.story else None
        entities_before = (last.entities_after if last is not None
                           and last.rows_after == rows_before and self._last_after is before
                           else self._entities(before))
        entities_after = (entities_before if rows_after == rows_before
                          else self._entities(after))
        self._last_after = after
        self.ledger.story.append(StepRecord(
            id=step_id,
            step=step,
            rows_before=rows_before,
            rows_after=rows_after,
            entities_before=entities_before,
            entities_after=entities_after,
        ))


def _with_columns(keys: pa.Table, names: list[str], block: np.ndarray,
                  kept: np.ndarray | None = None) -> pa.Table:
    """Key columns followed by one column per name from a (rows, names) block.

    ``kept`` leaves out the columns it marks False.
    """
    block = np.asfortranarray(block)
    chosen = range(len(names)) if kept is None else np.flatnonzero(kept)
    arrays = [*keys.columns, *(pa.array(block[:, j]) for j in chosen)]
    return pa.Table.from_arrays(arrays, names=[*keys.column_names, *(names[j] for j in chosen)])


def _components_findings(components: VarianceComponents,
                         options: PrepareOptions) -> list[Finding]:
    """The components' findings; an unidentified component fails the gate when the components
    are used: by the quasi file (theta), or as the whole output (no file asked for, as the
    ``components`` command runs)."""
    found = [Finding(**f) for f in components.findings_]
    if options.transforms and "quasi" not in options.transforms:
        for finding in found:
            if finding.id == "components-underidentified":
                finding.severity = "warning"
                finding.message += "; no quasi file is asked for, so no file uses the components"
    return found


def _gate_caution(failed_by: list[str]) -> str:
    return (f"the gate failed ({', '.join(failed_by)}); no data files were written. "
            "Fix the input, or state a cleaning policy, and run again.")


def _cautions(info: dict, components: VarianceComponents, n_periods: int,
              names: AddedNames) -> list[str]:
    out = []
    if "within" in info:
        absorbed = info["within"]["entities_absorbed"]
        out.append(
            f"OLS on the within file estimates {absorbed} entity means implicitly: reduce its "
            f"residual degrees of freedom by {absorbed} (n - {absorbed} - k), or its standard "
            "errors are too small."
        )
    if "twoway" in info:
        out.append(
            f"OLS on the twoway file has also absorbed up to {n_periods} period effects: "
            "reduce the degrees of freedom by entities + periods - 1 (per connected block)."
        )
    if "diff" in info:
        diff = info["diff"]
        out.append(
            f"The diff file holds {diff['rows']:,} first differences: each entity's first row "
            f"({diff['first_rows']:,}) has none, and {diff['across_holes']:,} row(s) after a hole "
            "were left out rather than differenced across it. Fit it with a constant (a common "
            "trend); differenced errors are serially correlated even when the errors in levels "
            "are not."
        )
    if "quasi" in info:
        out.append(
            "OLS on the quasi file gives random-effects (feasible GLS) slopes when "
            f"{names.intercept} (1 - theta_i) takes the place of the constant: regress on it and "
            "the other regressors only, with no column of ones of your own beside it."
        )
    if info:
        out.append(
            "Each file holds only the regressors OLS can estimate on it: a regressor the "
            "transform wiped out or made collinear is left out of that file and listed under "
            "transforms.<file>.regressors_left_out; the file's column roles are in its "
            "metadata and in files[].columns."
        )
    out.append(
        "Errors may be serially correlated within entities: cluster standard errors by entity "
        "in every regression on these files."
    )
    if components.truncated_negative_:
        out.append(
            "The entity variance estimate was negative and was set to 0: theta is 0 and the "
            "quasi file equals the pooled data."
        )
    return out


def prepare(
    data: str | Path | pd.DataFrame,
    out: str | Path,
    entity: str | Sequence[str],
    time: str,
    y: str,
    x: str | Sequence[str],
    transforms: str | Sequence[str] = DEFAULT_TRANSFORMS,
    method: str = "swamy-arora",
    output_format: str = "parquet",
    force: bool = False,
    read_options: ReadOptions = DEFAULT_READ,
    progress: Progress | None = None,
    failed_out: str | Path | None = None,
    **options: Any,
) -> Preparation:
    """Prepare ``data`` (a file, or a DataFrame as ``audit`` takes) and write every output into ``out``.

    Keyword ``options`` are the remaining fields of ``PrepareOptions``
    (``freq``, ``fail_on``, ``policies``, ``shifts``, ``severities``, ...).
    Returns the ``Preparation``; ``verdict == "fail"`` means the gate failed:
    ``out`` was left as it was and only the diagnostics were written, into
    ``failed_out`` (default ``OUT.failed`` beside ``out``).  A DataFrame is
    used as it is (no file is read, ``input.path`` is null); ``prepare_frame``
    does the same without writing anything.

    Examples
    --------
    >>> import pandas as pd, tempfile
    >>> from panelprep.prepare import prepare
    >>> frame = pd.DataFrame({"firm": list("aabbcc"), "year": [1, 2] * 3,
    ...                       "sales": [1.0, 2.0, 3.0, 5.0, 4.0, 4.5],
    ...                       "capital": [2.0, 2.5, 1.0, 3.0, 2.0, 1.0]})
    >>> out = tempfile.mkdtemp() + "/prepared"
    >>> prep = prepare(frame, out, entity="firm", time="year", y="sales", x="capital")
    >>> prep.verdict, sorted(p.name for p in prep.written_to.iterdir())[:3]
    ('pass', ['between.parquet', 'clean.parquet', 'diagnostics.json'])
    """
    settings = PrepareOptions(
        entity=split_names(entity) or [], time=time, y=y, x=split_names(x) or [],
        transforms=split_names(transforms) or [], method=method,
        output_format=output_format, **options,
    )
    return run_preparation(data, out, settings, read_options, force, progress,
                           failed_out=failed_out)


def failed_folder(out: str | Path) -> Path:
    """Where a run into ``out`` puts its diagnostics when the gate fails: ``OUT.failed`` beside it."""
    out = Path(out).absolute()
    return out.with_name(f"{out.name}.failed")


def run_preparation(
    data: str | Path | pd.DataFrame, out: str | Path, options: PrepareOptions,
    read_options: ReadOptions = DEFAULT_READ, force: bool = False, progress: Progress | None = None,
    keep: Sequence[str | Path] = (), failed_out: str | Path | None = None,
    contract_path: str | Path | None = None,
) -> Preparation:
    """Read (or take a DataFrame), prepare and write into a folder that appears complete or
    not at all.

    ``keep`` names other files the run reads (the run file, the contract):
    like ``data``, an output folder that is or holds one is refused, so
    ``force`` can never delete them.  When the gate fails, ``out`` is left
    exactly as it was and the diagnostics go to ``failed_out`` (default
    ``failed_folder(out)``), which replaces an earlier failed run's folder
    there; ``Preparation.written_to`` says which folder was written.
    ``contract_path`` is the file ``options.contract`` was read from, for
    the record of the run (``run.options`` and ``run.toml``).
    """
    options.validate()
    given = isinstance(data, pd.DataFrame)
    if not given and not isinstance(data, (str, os.PathLike)):
        raise InputError(f"data must be a file path or a pandas DataFrame, not "
                         f"{type(data).__name__}")
    progress = progress if progress is not None else RunLog()
    record = run_record(options, read_options, None if given else data, out, force, failed_out,
                        contract_path)
    # before the folder and before any data is read: the header names suffice
    options.check_names(list(data.columns) if given else column_names(Path(data), read_options),
                        "the data" if given else str(data))
    previous = options.previous
    inputs = [*([] if given else [Path(data)]), *map(Path, keep),
              *([Path(previous.path)] if previous else [])]
    out = Path(out)
    folder, failed = output_folders(out, inputs, force, failed_out)
    try:
        if given:
            frame, info = data, {"path": None, "sha256": None, "rows": len(data)}
        else:
            progress("read", f"reading {data}")
            frame, info = load(data, options.entity, options.time, options.columns_to_read,
                               read_options)
        comparison = None if previous is None else _compare_previous(
            frame, info, options, read_options, progress)
        prep = prepare_frame(frame, options, info, read_options, progress, check_names=not given,
                             record=record, owns_frame=not given, defer_evidence=True,
                             comparison=comparison)
        del frame
        files: list[dict[str, Any]] = []
        if prep.verdict != "fail":
            # the data files are written while the evidence is computed; a test float64
            # cannot carry out may still fail the gate, and then they are abandoned
            with recorded_warnings() as caught:
                files = write_data_files(prep, folder, options, progress, record)
                if prep.evidence_job is not None:
                    prep.evidence_job.wait(prep, progress)
            said = library_warnings_finding(caught)
            if said is not None:
                prep.audit.findings.append(said)
                prep.summary["findings"].append(said.to_dict())
        if prep.verdict == "fail":
            # a failed gate never replaces or empties the output folder
            _failed_after_gate(prep.summary)  # again, for evidence computed beside the writes
            folder.abandon()
            folder = _failed_output(failed, inputs, out, failed_out is None)
            files = []
        write_diagnostics(prep, folder, options, progress, record, files)
        folder.commit()
    except BaseException:
        folder.abandon()
        raise
    prep.written_to = folder.target
    return prep


def _compare_previous(frame: pd.DataFrame, info: dict[str, Any], options: PrepareOptions,
                      read_options: ReadOptions, progress: Progress):
    """The input against the previous vintage ``options.previous`` (read with the same options)."""
    from panelprep.compare import compare_frames

    previous = options.previous
    wanted = previous.vars or [v for v in options.columns_to_read if v in frame.columns]
    absent = [v for v in wanted if v not in frame.columns]
    if absent:
        where = info["path"] or "the data"
        raise InputError(f"compare.vars {absent} are not read from {where}; compare "
                         "only variables the run reads (model.y, model.x, lag sources)")
    held = column_names(Path(previous.path), read_options)
    progress("read.previous", f"reading the previous vintage {previous.path}")
    old, old_info = load(previous.path, options.entity, options.time,
                         [v for v in wanted if v in held], read_options)
    # severities come from the run's checks.severity, applied with the audit's
    compare_options = replace(previous.options, fail_on=options.fail_on, severities={})
    return compare_frames(old, frame, options.entity, options.time, wanted, freq=options.freq,
                          options=compare_options, old_info=old_info, new_info=info,
                          decimal_comma=read_options.decimal_comma,
                          missing_tokens=read_options.missing_tokens, progress=progress)


def output_folders(out: Path, inputs: list[Path], force: bool,
                   failed_out: str | Path | None) -> tuple[OutputFolder, Path]:
    """The output folder (its temporary folder made) and where a failed gate's diagnostics
    go, both checked against the inputs before anything is read."""
    folder = OutputFolder(out, inputs, force=force)
    failed = failed_folder(out) if failed_out is None else Path(failed_out)
    try:
        if failed_out is not None or _name_fits(failed):
            # a default name too long for the file system is reported only if the gate fails
            check_output_folder(failed, inputs, replaceable=DIAGNOSTIC_FILES, protect=[out])
    except BaseException:
        folder.abandon()
        raise
    return folder, failed


def _name_fits(path: Path) -> bool:
    try:
        limit = os.pathconf(path.parent, "PC_NAME_MAX")
    except (OSError, ValueError):
        limit = 255
    return len(os.fsencode(path.name)) <= limit


def _failed_output(failed: Path, inputs: list[Path], out: Path, default: bool) -> OutputFolder:
    if default and not _name_fits(failed):
        raise InputError(f"the gate failed and {out} was left as it was, but its diagnostics "
                         f"cannot go to {failed.name[:40]}...: the name is too long; name a "
                         "folder with --failed-out (output.failed_dir)")
    return OutputFolder(failed, inputs, replaceable=DIAGNOSTIC_FILES, protect=[out])


def write_data_files(prep: Preparation, folder: OutputFolder, options: PrepareOptions,
                     progress: Progress | None = None,
                     record: RunFile | None = None) -> list[dict[str, Any]]:
    """The data files and run.toml into the temporary folder; their entries for ``files``.

    ``record`` is the run as a run file (``run_record``); without it one is
    made from ``options``.  Nothing is written when the gate failed.
    """
    progress = progress if progress is not None else RunLog()
    record = record if record is not None else run_record(options)
    suffix = "parquet" if options.output_format == "parquet" else "csv"
    files: list[dict[str, Any]] = []
    for name in prep.outputs.names if prep.outputs is not None else []:
        # built, written and freed one at a time: peak memory holds one table
        # the first piece is built here, so the file's columns are known for its metadata
        table = prep.tables[name] if "tables" in prep.__dict__ else _primed(
            prep.outputs.pieces(name))
        columns = prep.outputs.columns[name]
        fmt = "parquet" if name == "dropped" else options.output_format
        path = folder.path(f"{name}.{'parquet' if name == 'dropped' else suffix}")
        progress(f"write.{name}", f"writing {path.name}")
        meta = file_metadata(prep.summary, options, record, name, columns)
        rows = write_table(table, path, fmt, meta, compression=options.compression,
                           dictionary=[*options.entity, options.time])
        files.append({"name": path.name, "rows": rows,
                      "sha256": sha256_in_background(path), "columns": columns})
        del table
    if prep.comparison is not None and prep.outputs is not None:
        files.append(_write_restated(prep, folder, _base_metadata(prep.summary, options, record),
                                     options, progress))
    for entry in files:
        entry["sha256"] = entry["sha256"].result()
    if prep.outputs is not None:
        write_run_file(folder, record, progress)
    return files


def write_run_file(folder: OutputFolder, record: RunFile, progress: Progress) -> None:
    """run.toml: the run again; this file on the same input gives the same data files."""
    progress("write.run-file", "writing run.toml")
    _write_text(folder.path(RUN_FILE), _run_file_text(record, folder.target))


def _base_metadata(summary: dict[str, Any], options: PrepareOptions,
                   record: RunFile) -> dict[str, Any]:
    """The provenance every data file of a run shares."""
    return {
        "schema_version": SCHEMA_VERSION,
        "version": __version__,
        "input_sha256": summary["input"].get("sha256"),
        "method": options.method,
        "components": summary.get("components"),
        # what defines the content, without where files were: inputs go by sha256
        "options": {k: v for k, v in record.values().items() if k not in _LOCATION_KEYS},
        "fixed_settings": fixed_settings(options),
        "contract_sha256": _contract_sha256(record),
    }


def file_metadata(summary: dict[str, Any], options: PrepareOptions, record: RunFile,
                  name: str, columns: list[dict[str, str]]) -> dict[str, str]:
    """The key-value metadata of a data file (``panelprep``: the provenance JSON)."""
    return {"panelprep": json.dumps({
        **_base_metadata(summary, options, record), "file": name,
        "transform": name if name in TRANSFORMS else None,
        "transform_info": summary.get("transforms", {}).get(name),
        "theta": (summary.get("components") or {}).get("theta"),
        "columns": columns, "rows_counted": ROW_CONVENTION}, sort_keys=True, allow_nan=False)}


def write_diagnostics(prep: Preparation, folder: OutputFolder, options: PrepareOptions,
                      progress: Progress | None = None, record: RunFile | None = None,
                      files: list[dict[str, Any]] | None = None,
                      pictures: dict[str, Any] | None = None) -> None:
    """diagnostics.json, diagnostics.txt and report.html into the temporary folder.

    ``files`` are the entries of the data files written (none when the gate
    failed); ``pictures`` (default ``pictures_of(prep)``) the data behind the
    report's pictures.
    """
    from panelprep.report.html import render_html
    from panelprep.report.text import preparation_lines

    progress = progress if progress is not None else RunLog()
    record = record if record is not None else run_record(options)
    prep.summary["files"] = files or []
    prep.summary["run"] = run_block(progress, record, prep.summary, options)
    text = json.dumps(prep.summary, indent=2, ensure_ascii=False, allow_nan=False)
    _write_text(folder.path("diagnostics.json"), text + "\n")
    _write_text(folder.path("diagnostics.txt"), "\n".join(preparation_lines(prep.summary)) + "\n")
    progress("write.report", "writing report.html")
    _write_text(folder.path("report.html"), render_html(
        prep.summary, pictures_of(prep) if pictures is None else pictures))


def _write_restated(prep: Preparation, folder: OutputFolder, base_meta: dict[str, Any],
                    options: PrepareOptions, progress: Progress) -> dict[str, Any]:
    """restated.parquet: every cell of the input that differs from the previous vintage."""
    path = folder.path("restated.parquet")
    progress("write.restated", f"writing {path.name}", rows=prep.comparison.n_changed)
    table = prep.comparison.restated_table()
    provenance = prep.comparison.restated_provenance(
        **{k: v for k, v in base_meta.items() if k not in ("schema_version", "version")})
    meta = {"panelprep": json.dumps(provenance, sort_keys=True, allow_nan=False)}
    rows = write_table(table, path, "parquet", meta, compression=options.compression,
                       dictionary=[*options.entity, options.time])
    return {"name": path.name, "rows": rows, "sha256": sha256_in_background(path),
            "columns": provenance["columns"]}


def _free_variable_columns(frames: list[pd.DataFrame], variables: list[str],
                           options: PrepareOptions) -> None:
    """Drop the variable columns from frames the run owns, in place (about n x k x 8 bytes).

    A frame converted from Arrow holds its columns in Arrow's memory pool,
    which keeps freed memory until asked to return it.
    """
    keys = {*options.entity, options.time}
    for frame in {id(f): f for f in frames}.values():
        for name in [v for v in variables if v in frame.columns and v not in keys]:
            del frame[name]
    release_arrow_memory()


RUN_FILE = "run.toml"
# run-file keys that say where things are, not what the data files hold
_LOCATION_KEYS = ("input.path", "contract.schema", "output.dir", "output.failed_dir",
                  "output.force", "engine.cluster", "compare.previous")


def run_record(options: PrepareOptions, read_options: ReadOptions = DEFAULT_READ,
               data: str | Path | None = None, out: str | Path | None = None,
               force: bool = False, failed_out: str | Path | None = None,
               contract_path: str | Path | None = None,
               engine: EngineSection | None = None) -> RunFile:
    """The run as a run file: every option of the preparation, paths made absolute.

    Its ``values()`` are the resolved options recorded in ``diagnostics.json``
    (``run.options``) and, without the location keys, in every Parquet file's
    metadata; ``_run_file_text`` writes it as ``run.toml``.
    """
    def absolute(path: str | Path | None) -> Path | None:
        return None if path is None else Path(path).absolute()

    shifts = {kind: [f"{s.variable}:{s.k}" for s in options.shifts if s.kind == kind]
              for kind in ("lag", "lead", "diff")}
    policies, names, previous = options.policies, options.names, options.previous
    return RunFile(
        input=InputSection(path=absolute(data), format=read_options.input_format,
                           delimiter=read_options.delimiter,
                           decimal_comma=read_options.decimal_comma,
                           missing_tokens=list(read_options.missing_tokens)),
        panel=PanelSection(entity=list(options.entity), time=options.time, freq=options.freq),
        model=ModelSection(y=options.y, x=list(options.x)),
        contract=ContractSection(schema=absolute(contract_path),
                                 validate_outputs=options.validate_outputs),
        checks=ChecksSection(fail_on=options.fail_on,
                             low_within_ratio=options.thresholds.low_within_ratio,
                             constant_rtol=options.thresholds.constant_rtol,
                             severity=dict(options.severities)),
        clean=CleanSection(duplicates=policies.duplicates, normalise_ids=policies.normalise_ids,
                           singletons=policies.singletons, balance=policies.balance,
                           window=tuple(policies.window)),
        derive=DeriveSection(**shifts),
        output=OutputSection(dir=absolute(out), failed_dir=absolute(failed_out),
                             transforms=list(options.transforms), method=options.method,
                             format=options.output_format, compression=options.compression,
                             force=force, evidence=options.evidence),
        engine=engine or EngineSection(),
        names=NamesSection(**asdict(names)),
        compare=CompareSection() if previous is None else CompareSection(
            previous=absolute(previous.path), vars=previous.vars, rtol=previous.options.rtol,
            atol=previous.options.atol, max_restated_share=previous.options.max_restated_share),
    )


def fixed_settings(options: PrepareOptions) -> dict[str, Any]:
    """Settings a run file does not set, recorded beside the options."""
    limits = {f"checks.{k}": v for k, v in asdict(options.thresholds).items()
              if k not in ("low_within_ratio", "constant_rtol")}
    return {**limits, "output.twoway_tol": options.twoway_tol,
            "contract.given": options.contract is not None}


def run_block(log: RunLog, record: RunFile, summary: dict[str, Any],
              options: PrepareOptions) -> dict[str, Any]:
    """The ``run`` block: the log's steps and times with the resolved options."""
    inferred = {}
    if options.freq is None:
        inferred["panel.freq"] = summary["keys"]["freq"]
    if record.input.format is None and summary["input"].get("format"):
        inferred["input.format"] = summary["input"]["format"]
    return log.block(record.values(), inferred, summary["input"].get("sha256"),
                     fixed_settings(options))


def _contract_sha256(record: RunFile) -> str | None:
    schema = record.contract.schema
    return None if schema is None else sha256_file(schema)


def _run_file_text(record: RunFile, target: Path) -> str:
    """run.toml for the folder ``target``: paths relative to it; no output folder, so a
    rerun names a new one (this folder holds the run file and cannot be replaced by it)."""
    again = replace(record, output=replace(record.output, dir=None, failed_dir=None,
                                           force=False))
    header = [(f"panelprep run file written by the run that made this folder (panelprep "
              f"{__version__})."),
              ("The same input gives the same data files: panelprep prepare --config "
              "run.toml --out NEW_FOLDER")]
    if record.input.path is None:
        header.append("The data came from a DataFrame in Python, not a file: set input.path "
                      "to a file that holds it.")
    return again.to_toml(base=target, header=header)


def _primed(pieces: Iterator[pa.Table]) -> Iterator[pa.Table]:
    """``pieces`` with the first one already built; nothing holds a piece once it is passed on."""
    held = [next(pieces)]

    def passed_on() -> Iterator[pa.Table]:
        yield held.pop()
        yield from pieces

    return passed_on()


def _write_text(path: Path, text: str) -> None:
    """A text output; a failing write (a full disk) is one line naming the file."""
    try:
        path.write_text(text, encoding="utf-8")
    except OSError as err:
        raise InputError(f"cannot write {path.name}: {err.strerror or err}") from None


def pictures_of(prep: Preparation) -> dict[str, Any]:
    """The data behind the report's pictures, on the sample the files were written from."""
    # missing cells describe the rows read: the audit kept them before the block was released
    missing = missing_picture(prep.audit.context)
    if prep.sample_index is not None and prep.components is not None:
        return picture_data(prep.sample_index, theta=prep.components.theta_,
                            variation=prep.summary["variables"], missing=missing)
    return picture_data(prep.audit.context, missing=missing)


def run_from_file(run: RunFile, progress: Progress | None = None) -> Preparation:
    """Run the preparation a run file describes (after command-line overrides)."""
    contract = None
    if run.contract.schema:
        from panelprep.contracts import load_contract

        contract = load_contract(run.contract.schema)
    names = run.added_names()
    options = PrepareOptions(
        entity=list(run.panel.entity), time=run.panel.time, y=run.model.y, x=list(run.model.x),
        freq=run.panel.freq, transforms=list(run.output.transforms), method=run.output.method,
        output_format=run.output.format, compression=run.output.compression,
        fail_on=run.checks.fail_on,
        severities=dict(run.checks.severity), thresholds=run.thresholds(),
        policies=Policies(
            duplicates=run.clean.duplicates, normalise_ids=run.clean.normalise_ids,
            singletons=run.clean.singletons, balance=run.clean.balance, window=run.clean.window,
        ),
        shifts=[*parse_shifts("lag", run.derive.lag, names),
                *parse_shifts("lead", run.derive.lead, names),
                *parse_shifts("diff", run.derive.diff, names)],
        contract=contract, validate_outputs=run.contract.validate_outputs,
        evidence=run.output.evidence, names=names, previous=_previous_vintage(run),
    )
    keep = [p for p in (run.source, run.contract.schema) if p is not None]
    if run.engine.kind == "dask":
        from panelprep.partitioned import run_partitioned

        return run_partitioned(run.input.path, run.output.dir, options, run.read_options(),
                               run.engine, force=run.output.force, progress=progress, keep=keep,
                               failed_out=run.output.failed_dir)
    check_readable(Path(run.input.path))
    return run_preparation(run.input.path, run.output.dir, options, run.read_options(),
                           force=run.output.force, progress=progress,
                           keep=keep, failed_out=run.output.failed_dir,
                           contract_path=run.contract.schema)


def _previous_vintage(run: RunFile):
    if run.compare.previous is None:
        return None
    from panelprep.compare import CompareOptions, PreviousVintage

    options = CompareOptions(rtol=run.compare.rtol, atol=run.compare.atol,
                             max_restated_share=run.compare.max_restated_share)
    return PreviousVintage(path=Path(run.compare.previous), vars=run.compare.vars,
                           options=options)


def estimate_file_components(
    data: str | Path, entity: str | Sequence[str], time: str, y: str, x: str | Sequence[str],
    method: str = "swamy-arora", freq: str | None = None,
    read_options: ReadOptions = DEFAULT_READ, progress: Progress | None = None,
) -> Preparation:
    """Audit a file and estimate the variance components of its estimation sample.

    Nothing is written; ``components`` is None when the gate failed.
    """
    options = PrepareOptions(entity=split_names(entity) or [], time=time, y=y,
                             x=split_names(x) or [], freq=freq, method=method, transforms=[],
                             evidence=False)
    options.validate()
    frame, info = load(data, options.entity, time, options.columns_to_read, read_options)
    return prepare_frame(frame, options, info, read_options, progress, check_names=False)
