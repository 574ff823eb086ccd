"""The preparation flow: load -> clean (ledger) -> audit and gate -> sample ->
components -> transforms -> write, all into a folder that appears complete
or not at all.

Every step that removes rows records them in the ``Ledger``; the story of
steps (rows and entities before and after) goes into both diagnostics files.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from panelprep import transforms
from panelprep._groups import group_counts
from panelprep._version import __version__
from panelprep.checks import Thresholds
from panelprep.components import METHODS, VarianceComponents
from panelprep.errors import InputError
from panelprep.findings import Finding, gate
from panelprep.index import PanelIndex
from panelprep.io import OutputFolder, ReadOptions, sha256_file, write_table
from panelprep.ledger import Ledger, StepRecord, require_rows
from panelprep.pipeline import AuditReport, Progress, _silent, audit, load, split_names

TRANSFORMS = ("within", "between", "quasi", "twoway")
DEFAULT_TRANSFORMS = ("within", "between", "quasi")
OUTPUT_FORMATS = ("parquet", "csv")


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
    fail_on: str = "error"
    severities: dict[str, str] = field(default_factory=dict)
    thresholds: Thresholds = field(default_factory=Thresholds)
    twoway_tol: float = 1e-12

    def validate(self) -> None:
        unknown = [t for t in self.transforms if t not in TRANSFORMS]
        if unknown:
            raise InputError(f"--transform {unknown} not among {', '.join(TRANSFORMS)}")
        if self.method not in METHODS:
            raise InputError(f"--method {self.method!r} is not one of {', '.join(METHODS)}")
        if self.output_format not in OUTPUT_FORMATS:
            raise InputError(f"--format {self.output_format!r} must be parquet or csv")
        if not self.x:
            raise InputError("--x names no regressor")
        if self.y in self.x:
            raise InputError(f"{self.y!r} cannot be both --y and in --x")

    @property
    def variables(self) -> list[str]:
        return [self.y, *self.x]


@dataclass(eq=False)
class Preparation:
    """The result of ``prepare``: the audit, what was built, and where it went."""

    audit: AuditReport
    ledger: Ledger
    components: VarianceComponents | None
    tables: dict[str, pd.DataFrame]
    summary: dict[str, Any]

    @property
    def verdict(self) -> str:
        return self.audit.verdict

    def to_dict(self) -> dict[str, Any]:
        return self.summary


def prepare_frame(
    frame: pd.DataFrame,
    options: PrepareOptions,
    input_info: dict[str, Any] | None = None,
    read_options: ReadOptions = ReadOptions(),
    progress: Progress = _silent,
) -> Preparation:
    """Audit and transform a panel held in memory; nothing is written.

    Returns a ``Preparation`` whose ``tables`` hold ``clean``, each requested
    transform and ``dropped`` (the ledger), and whose ``summary`` is the
    diagnostics document.  When the gate fails, ``tables`` is empty.
    """
    options.validate()
    ledger = Ledger(rows_read=len(frame))
    report = audit(
        frame, options.entity, options.time, options.variables,
        freq=options.freq, fail_on=options.fail_on, thresholds=options.thresholds,
        severities=options.severities, decimal_comma=read_options.decimal_comma,
        missing_tokens=read_options.missing_tokens, input_info=input_info, progress=progress,
    )
    ctx = report.context
    index = ctx.index
    summary = report.to_dict()
    if report.verdict == "fail":
        summary["files"] = []
        summary["cautions"] = [_gate_caution(report)]
        return Preparation(report, ledger, None, {}, summary)

    progress("building the estimation sample")
    _record(ledger, index, ~ctx.keyed, "key-missing", "drop rows without a full key",
            np.ones(len(frame), bool))
    _record(ledger, index, ctx.repeat, "exact-repeat", "collapse exact repeated rows", ctx.keyed)
    _record(ledger, index, ~ctx.complete & ctx.base, "listwise-missing",
            f"listwise deletion over {', '.join(options.variables)}", ctx.base)
    sample = ctx.sample
    require_rows(int(sample.sum()), "listwise deletion")
    if len(ctx.conflicting_cells):
        raise InputError(
            "conflicting duplicate keys remain but the gate let them through; "
            "choose a duplicates policy or keep key-conflict an error"
        )
    ledger.verify(int(sample.sum()))

    sample_ix = ctx.sample_index
    codes = sample_ix.entity_codes
    counts = group_counts(codes, sample_ix.n_entities)
    values = ctx.sample_values
    y, X = values[:, 0], values[:, 1:]

    progress(f"variance components ({options.method})")
    components = VarianceComponents(method=options.method).fit(y, X, codes, counts, names=options.x)
    theta = components.theta_

    keys = frame[[*options.entity, options.time]].iloc[np.flatnonzero(sample)].reset_index(drop=True)
    tables: dict[str, pd.DataFrame] = {"clean": _with_keys(keys, options.variables, values)}
    info: dict[str, Any] = {}
    singleton_rows = counts[codes] == 1
    n_singletons = int((counts == 1).sum())
    for name in options.transforms:
        progress(f"transform {name}")
        if name == "within":
            keep = ~singleton_rows
            block = transforms.within(values, codes, counts)[keep]
            tables[name] = _with_keys(keys[keep].reset_index(drop=True), options.variables, block)
            info[name] = {
                "rows": int(keep.sum()),
                "entities_absorbed": int(sample_ix.n_entities - n_singletons),
                "singletons_dropped": n_singletons,
            }
        elif name == "between":
            means = transforms.between(values, codes, counts)
            table = sample_ix.entity_labels.copy()
            for j, column in enumerate(options.variables):
                table[column] = means[:, j]
            table["n_obs"] = counts
            tables[name] = table
            info[name] = {"rows": int(len(table))}
        elif name == "quasi":
            block = transforms.quasi(values, codes, counts, theta)
            table = _with_keys(keys, options.variables, block)
            table["const"] = 1.0 - theta[codes]
            table["theta"] = theta[codes]
            tables[name] = table
            info[name] = {"rows": int(len(table))}
        else:
            keep = ~singleton_rows
            sub = sample_ix.subset(keep)
            block, result = transforms.twoway(
                values[keep], sub.entity_codes, sub.period_codes, sub.n_entities, sub.n_periods,
                tol=options.twoway_tol,
            )
            tables[name] = _with_keys(keys[keep].reset_index(drop=True), options.variables, block)
            info[name] = {"rows": int(keep.sum()), "singletons_dropped": n_singletons,
                          **asdict(result)}

    findings = report.findings + [Finding(**f) for f in components.findings_]
    summary["findings"] = [f.to_dict() for f in findings]
    summary["verdict"] = gate(findings, options.fail_on)
    summary["sample"] = {
        "rows": int(sample.sum()),
        "entities": int(sample_ix.n_entities),
        "listwise_rows_removed": int((~ctx.complete & ctx.base).sum()),
        "listwise_entities_removed": int(
            ((group_counts(index.entity_codes[ctx.base], index.n_entities) > 0)
             & (group_counts(index.entity_codes[sample], index.n_entities) == 0)).sum()
        ),
        "y": options.y,
        "x": options.x,
    }
    summary["steps"] = [s.to_dict() for s in ledger.story]
    summary["dropped"] = {"rows": ledger.n_dropped, "by_reason": ledger.by_reason()}
    summary["components"] = components.to_dict()
    summary["transforms"] = info
    summary["cautions"] = _cautions(info, components, sample_ix)
    tables["dropped"] = ledger.to_frame(frame, [*options.entity, options.time])
    prep = Preparation(report, ledger, components, tables, summary)
    if summary["verdict"] == "fail":
        prep.tables = {}
    return prep


def _record(ledger: Ledger, index: PanelIndex, removed: np.ndarray, reason: str, step: str,
            before: np.ndarray) -> None:
    """Record a step that removes ``removed`` out of the rows in ``before``."""
    after = before & ~removed
    n_entities = index.n_entities
    codes = index.entity_codes
    ledger.drop(np.flatnonzero(removed & before), reason, step)
    ledger.story.append(StepRecord(
        step=step,
        rows_before=int(before.sum()),
        rows_after=int(after.sum()),
        entities_before=int((group_counts(codes[before & (codes >= 0)], n_entities) > 0).sum()),
        entities_after=int((group_counts(codes[after & (codes >= 0)], n_entities) > 0).sum()),
    ))


def _with_keys(keys: pd.DataFrame, names: list[str], block: np.ndarray) -> pd.DataFrame:
    table = keys.copy()
    for j, name in enumerate(names):
        table[name] = block[:, j]
    return table


def _gate_caution(report: AuditReport) -> str:
    worst = [f.id for f in report.findings if f.severity in ("error",) or
             (report.fail_on == "warning" and f.severity == "warning")]
    return (f"the gate failed ({', '.join(dict.fromkeys(worst))}); no data files were written. "
            "Fix the input, or state a cleaning policy, and run again.")


def _cautions(info: dict, components: VarianceComponents, index: PanelIndex) -> list[str]:
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
            f"OLS on the twoway file has also absorbed up to {index.n_periods} period effects: "
            "reduce the degrees of freedom by entities + periods - 1 (per connected block)."
        )
    if "quasi" in info:
        out.append(
            "OLS on the quasi file gives random-effects (feasible GLS) slopes; keep the const "
            "column as the regressor for the intercept and fit without an added constant."
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
    data: str | Path,
    out: str | Path,
    entity: str | Sequence[str],
    time: str,
    y: str,
    x: str | Sequence[str],
    transforms: str | Sequence[str] = DEFAULT_TRANSFORMS,
    method: str = "swamy-arora",
    output_format: str = "parquet",
    force: bool = False,
    freq: str | None = None,
    fail_on: str = "error",
    read_options: ReadOptions = ReadOptions(),
    progress: Progress = _silent,
    **extra: Any,
) -> Preparation:
    """Read ``data``, prepare it, and write every output into ``out``.

    Returns the ``Preparation``; ``verdict == "fail"`` means the gate failed
    and only the diagnostics were written.
    """
    options = PrepareOptions(
        entity=split_names(entity) or [], time=time, y=y, x=split_names(x) or [],
        freq=freq, transforms=split_names(transforms) or [], method=method,
        output_format=output_format, fail_on=fail_on, **extra,
    )
    options.validate()
    folder = OutputFolder(Path(out), [Path(data)], force=force)
    try:
        progress(f"reading {data}")
        frame, info = load(data, options.entity, time, options.variables, read_options)
        prep = prepare_frame(frame, options, info, read_options, progress)
        write_outputs(prep, folder, options, read_options, progress)
        folder.commit()
    except BaseException:
        folder.abandon()
        raise
    return prep


def write_outputs(prep: Preparation, folder: OutputFolder, options: PrepareOptions,
                  read_options: ReadOptions, progress: Progress = _silent) -> None:
    """Data files, then diagnostics.json and diagnostics.txt, into the temporary folder."""
    from panelprep.report.text import preparation_lines

    suffix = "parquet" if options.output_format == "parquet" else "csv"
    files = []
    base_meta = {
        "version": __version__,
        "input_sha256": prep.summary["input"].get("sha256"),
        "method": options.method,
        "components": prep.summary.get("components"),
        "options": {"entity": options.entity, "time": options.time, "y": options.y,
                    "x": options.x, "freq": options.freq, "transforms": options.transforms,
                    "fail_on": options.fail_on},
    }
    for name, table in prep.tables.items():
        fmt = "parquet" if name == "dropped" else options.output_format
        path = folder.path(f"{name}.{'parquet' if name == 'dropped' else suffix}")
        progress(f"writing {path.name}")
        meta = {"panelprep": json.dumps({**base_meta, "file": name,
                                         "transform": prep.summary.get("transforms", {}).get(name),
                                         "theta": (prep.summary.get("components") or {}).get("theta")},
                                        sort_keys=True, allow_nan=False)}
        write_table(table, path, fmt, meta)
        files.append({"name": path.name, "rows": int(len(table)), "sha256": sha256_file(path)})
    prep.summary["files"] = files
    text = json.dumps(prep.summary, indent=2, ensure_ascii=False, allow_nan=False)
    folder.path("diagnostics.json").write_text(text + "\n", encoding="utf-8")
    folder.path("diagnostics.txt").write_text("\n".join(preparation_lines(prep.summary)) + "\n",
                                              encoding="utf-8")


def estimate_file_components(
    data: str | Path, entity: str | Sequence[str], time: str, y: str, x: str | Sequence[str],
    method: str = "swamy-arora", freq: str | None = None,
    read_options: ReadOptions = ReadOptions(), progress: Progress = _silent,
) -> dict[str, Any]:
    """Variance components of a file's estimation sample, as a dict."""
    options = PrepareOptions(entity=split_names(entity) or [], time=time, y=y,
                             x=split_names(x) or [], freq=freq, method=method, transforms=[])
    options.validate()
    frame, info = load(data, options.entity, time, options.variables, read_options)
    prep = prepare_frame(frame, options, info, read_options, progress)
    if prep.components is None:
        raise InputError(f"{data}: the audit gate failed, so no components were estimated "
                         "(run panelprep audit to see why)")
    return prep.components.to_dict()
