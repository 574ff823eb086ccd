"""Command line: parse options, call the pipeline, map failures to exit codes.

Exit codes are the contract for ETL gates: 0 the data passed, 1 the data
failed the gate, 2 the command could not run (one line on stderr, never a
traceback), 3 an internal error (a bug: one line on stderr naming the file
where the traceback was saved).
"""

from __future__ import annotations

import json
import os
import sys
import warnings
from pathlib import Path
from typing import TYPE_CHECKING, Annotated

import typer
import typer.core

from panelprep.errors import InputError

if TYPE_CHECKING:
    from panelprep.io import ReadOptions

# Nothing heavy is imported at start-up (pandas, pyarrow, numpy, scipy come in
# with the command that needs them), so --help, --version and a failing
# argument check answer at once.

EXIT_PASS, EXIT_FAIL, EXIT_UNUSABLE, EXIT_INTERNAL = 0, 1, 2, 3
EXIT_INTERRUPTED = 130  # 128 + SIGINT, as shells report a run stopped by Ctrl-C
EXIT_CODES = ("Exit codes: 0 the data passed the gate; 1 the gate failed (a finding at or above "
              "--fail-on); 2 bad input or usage (one line on stderr); 3 internal error (a bug: "
              "the traceback is saved to a file named on stderr); 130 interrupted.")

_NO_BREAK = "\u2011"  # a non-breaking hyphen, only while the help text is wrapped


class _WholeWordHelp(typer.Context.formatter_class):
    """Help wrapped at spaces only: ``period-holes`` or ``drop-exact`` never split at a line end."""

    def write_dl(self, rows, *args, **kwargs) -> None:
        start = len(self.buffer)
        super().write_dl([(term, text.replace("-", _NO_BREAK)) for term, text in rows],
                         *args, **kwargs)
        self.buffer[start:] = [part.replace(_NO_BREAK, "-") for part in self.buffer[start:]]


class _Context(typer.Context):
    formatter_class = _WholeWordHelp


class _Command(typer.core.TyperCommand):
    context_class = _Context


class _Group(typer.core.TyperGroup):
    context_class = _Context


app = typer.Typer(
    cls=_Group,
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    # plain help: rendering it with rich costs about 0.3 s of start-up
    rich_markup_mode=None,
    help="Audit, clean and transform entity-by-period panels before any model is fitted.",
    epilog=EXIT_CODES,
)

EntityOpt = Annotated[str, typer.Option("--entity", "-e", help="Entity key column(s), comma-separated.")]
TimeOpt = Annotated[str, typer.Option("--time", "-t", help="Time column.")]
FreqOpt = Annotated[str | None, typer.Option(
    "--freq", help="Period frequency: year, quarter, month, week, day, int, or int:K for "
    "whole-number periods K apart (waves 80 and 90: int:10); inferred if omitted.")]
FormatOpt = Annotated[str | None, typer.Option(
    "--input-format", help="csv, parquet or arrow (default: by extension).")]
DelimOpt = Annotated[str | None, typer.Option(
    "--delimiter", help="CSV delimiter (default: sniffed from the header).")]
DecimalOpt = Annotated[bool, typer.Option("--decimal-comma", help="CSV numbers use ',' as decimal mark.")]
TokenOpt = Annotated[str | None, typer.Option(
    "--missing-token", help="Comma-separated texts to read as missing in numeric variables, e.g. 'n/a,-'.")]
QuietOpt = Annotated[bool, typer.Option("--quiet", "-q", help="No progress on stderr (--progress none).")]
ProgressOpt = Annotated[str, typer.Option(
    "--progress", envvar="PANELPREP_PROGRESS",
    help="Progress on stderr: auto (a bar on a terminal, plain otherwise), bar, plain "
         "(timestamped lines with step, elapsed seconds, rows) or none.")]
LogJsonOpt = Annotated[bool, typer.Option(
    "--log-json", help="Write one JSON line per step (and one at the end) to stderr, "
                       "instead of progress and human lines.")]
JsonOpt = Annotated[bool, typer.Option(
    "--json", help="Print the verdict document (the JSON report) on stdout and nothing else; "
                   "the summary goes to stderr.")]
FailOpt = Annotated[str, typer.Option("--fail-on", help="Lowest severity that fails the gate: error or warning.")]


def _show_version(value: bool) -> None:
    if value:
        from panelprep._version import __version__

        typer.echo(f"panelprep {__version__}")
        raise typer.Exit(EXIT_PASS)


@app.callback()
def root(
    version: Annotated[bool, typer.Option("--version", callback=_show_version, is_eager=True,
                                          help="Print the version and exit.")] = False,
) -> None:
    """Audit, clean and transform entity-by-period panels before any model is fitted."""


def _read_options(input_format, delimiter, decimal_comma, missing_token) -> ReadOptions:
    from panelprep import pipeline
    from panelprep.io import ReadOptions

    if delimiter == "\\t":
        delimiter = "\t"
    return ReadOptions(
        input_format=input_format,
        delimiter=delimiter,
        decimal_comma=decimal_comma,
        missing_tokens=tuple(pipeline.split_names(missing_token) or ()),
    )


def _check_data(path: Path | None, session: _Session | None = None) -> None:
    """Refuse a missing or unreadable data file before the flow's heavy imports."""
    from panelprep._paths import check_readable

    if path is not None:
        try:
            check_readable(path)
        except InputError as err:
            if session is None:
                _unusable(str(err))
            session.fail(str(err))


def _dataset_like(path: Path | None) -> bool:
    """A folder or a glob pattern: an input only the dask engine reads."""
    return path is not None and (path.is_dir() or bool(set(str(path)) & set("*?[")))


def _unusable(message: str) -> None:
    typer.echo(f"panelprep: error: {message}", err=True)
    raise typer.Exit(EXIT_UNUSABLE)


class _Session:
    """Where a command's output goes: the run log on stderr, the summary, the JSON document.

    With ``--json`` stdout holds only the verdict document and the summary
    goes to stderr (unless ``--quiet``); with ``--log-json`` stderr holds
    only JSON lines (steps, then the end or the error).
    """

    active: _Session | None = None

    def __init__(self, progress: str, quiet: bool, log_json: bool = False,
                 as_json: bool = False) -> None:
        from panelprep.runlog import PROGRESS_MODES, stderr_log

        if progress not in PROGRESS_MODES:
            _unusable(f"--progress {progress!r} must be one of {', '.join(PROGRESS_MODES)}")
        self.log_json, self.as_json, self.quiet = log_json, as_json, quiet
        self.log = stderr_log(progress, quiet, log_json, sys.argv)
        _Session.active = self

    def summary(self, lines: list[str]) -> None:
        """The human summary: stdout, or stderr when stdout holds the document."""
        self.log.settle()
        if not self.as_json:
            typer.echo("\n".join(lines))
        elif not (self.quiet or self.log_json):
            typer.echo("\n".join(lines), err=True)

    def note(self, line: str) -> None:
        """A human line for stderr (not under --log-json, where the end event says it)."""
        self.log.settle()
        if not self.log_json:
            typer.echo(line, err=True)

    def document(self, document: dict) -> None:
        if self.as_json:
            typer.echo(json.dumps(document, indent=2, ensure_ascii=False, allow_nan=False))

    def fail(self, message: str, code: int = EXIT_UNUSABLE) -> None:
        """Stop with one line on stderr (a JSON error event under --log-json)."""
        _Session.active = None
        if self.log_json:
            self.log.finish(exit_code=code, message=message)
        else:
            self.log.finish()
            typer.echo(f"panelprep: error: {message}", err=True)
        raise typer.Exit(code)

    def end(self, verdict: str, failed_by: list[str], code: int | None = None) -> None:
        code = (EXIT_PASS if verdict == "pass" else EXIT_FAIL) if code is None else code
        _Session.active = None
        self.log.finish(verdict=verdict, exit_code=code, failed_by=failed_by)
        raise typer.Exit(code)


@app.command("audit", cls=_Command, epilog=EXIT_CODES)
def audit_command(
    data: Annotated[Path, typer.Argument(help="CSV, Parquet or Arrow/Feather file.")],
    entity: EntityOpt,
    time: TimeOpt,
    vars: Annotated[str | None, typer.Option("--vars", help="Variables to check, comma-separated (default: all numeric non-key columns).")] = None,
    freq: FreqOpt = None,
    report: Annotated[Path | None, typer.Option("--report", help="Write the JSON report here.")] = None,
    report_html: Annotated[Path | None, typer.Option("--report-html", help="Write a self-contained HTML report here.")] = None,
    fail_on: FailOpt = "error",
    input_format: FormatOpt = None,
    delimiter: DelimOpt = None,
    decimal_comma: DecimalOpt = False,
    missing_token: TokenOpt = None,
    quiet: QuietOpt = False,
    as_json: JsonOpt = False,
    progress: ProgressOpt = "auto",
    log_json: LogJsonOpt = False,
) -> None:
    """Check a panel's structure and gate on what is found."""
    session = _Session(progress, quiet, log_json, as_json)
    _check_data(data, session)
    from panelprep import pipeline
    from panelprep.report.text import audit_lines, closing_lines

    try:
        _check_reports([report, report_html], data)
        result = pipeline.audit_file(
            data, entity, time, vars,
            options=_read_options(input_format, delimiter, decimal_comma, missing_token),
            progress=session.log,
            freq=freq, fail_on=fail_on,
        )
        result.options.update({"audit.report": None if report is None else str(report),
                               "audit.report_html": None if report_html is None
                               else str(report_html)})
        if report_html is not None:
            session.log("write.report-html", f"writing {report_html}")
            _write_html(report_html, result.to_dict(), result, data)
        if report is not None:
            session.log("write.report", f"writing {report}")
        document = result.to_dict()
        if report is not None:
            _write_json(report, document, data)
    except InputError as err:
        session.fail(str(err))
    session.document(document)
    written = [(what, str(path)) for what, path in (("the JSON report", report),
                                                     ("the HTML report", report_html)) if path]
    session.summary(audit_lines(document) + closing_lines(document, written))
    session.end(result.verdict, document["gate"]["failed_by"])


@app.command("prepare", cls=_Command, epilog=EXIT_CODES)
def prepare_command(
    data: Annotated[Path | None, typer.Argument(help="CSV, Parquet or Arrow/Feather file (or input.path of --config).")] = None,
    config: Annotated[Path | None, typer.Option("--config", "-c", help="Run file (TOML); flags given here override it.")] = None,
    entity: Annotated[str | None, typer.Option("--entity", "-e", help="Entity key column(s), comma-separated.")] = None,
    time: Annotated[str | None, typer.Option("--time", "-t", help="Time column.")] = None,
    y: Annotated[str | None, typer.Option("--y", help="Dependent variable.")] = None,
    x: Annotated[str | None, typer.Option("--x", help="Regressors, comma-separated (may name lags, e.g. sales_lag1).")] = None,
    out: Annotated[Path | None, typer.Option("--out", "-o", help="Output folder.")] = None,
    failed_out: Annotated[Path | None, typer.Option("--failed-out", help="Folder for the diagnostics when the gate fails (default: OUT.failed beside --out); --out is then left as it was.")] = None,
    transform: Annotated[str | None, typer.Option("--transform", help="Comma-separated: within, between, quasi, twoway, diff (default within,between,quasi).")] = None,
    method: Annotated[str | None, typer.Option("--method", help="Variance components: swamy-arora (default), wallace-hussain, amemiya or nerlove.")] = None,
    output_format: Annotated[str | None, typer.Option("--format", help="Data files as parquet (default) or csv.")] = None,
    compression: Annotated[str | None, typer.Option("--compression", help="Parquet codec: zstd (default), lz4, snappy, gzip or none.")] = None,
    force: Annotated[bool | None, typer.Option("--force/--no-force", help="Replace a non-empty output folder.")] = None,
    evidence: Annotated[bool | None, typer.Option("--evidence/--no-evidence", help="Compute the tests that inform the choice of estimator (default on).")] = None,
    contract: Annotated[Path | None, typer.Option("--contract", help="pandera YAML schema the input must satisfy.")] = None,
    previous: Annotated[Path | None, typer.Option("--previous", help="Previous vintage of the data: compare the input with it before writing (run-file compare.previous).")] = None,
    duplicates: Annotated[str | None, typer.Option("--duplicates", help="fail (default), drop-exact, keep-first, keep-last or mean.")] = None,
    normalise_ids: Annotated[str | None, typer.Option("--normalise-ids", help="none (default), trim or trim-fold.")] = None,
    singletons: Annotated[str | None, typer.Option("--singletons", help="keep (default) or drop.")] = None,
    balance: Annotated[str | None, typer.Option("--balance", help="keep (default), complete-entities or largest-block.")] = None,
    window: Annotated[str | None, typer.Option("--window", help="FIRST,LAST period labels to keep; either may be empty.")] = None,
    lag: Annotated[str | None, typer.Option("--lag", help="Lags as var:k,... creating var_lagk.")] = None,
    lead: Annotated[str | None, typer.Option("--lead", help="Leads as var:k,... creating var_leadk.")] = None,
    diff: Annotated[str | None, typer.Option("--diff", help="Differences as var[:k],... creating var_diffk.")] = None,
    severity: Annotated[str | None, typer.Option("--severity", help="Severity per finding id as ID=LEVEL,... with LEVEL info, warning or error, e.g. period-holes=error,entity-single-obs=info.")] = None,
    names: Annotated[str | None, typer.Option("--names", help="Rename the columns panelprep adds (run-file [names] keys), e.g. row=src_row,theta=re_theta.")] = None,
    freq: FreqOpt = None,
    fail_on: Annotated[str | None, typer.Option("--fail-on", help="Lowest severity that fails the gate: error (default) or warning.")] = None,
    input_format: FormatOpt = None,
    delimiter: DelimOpt = None,
    decimal_comma: Annotated[bool | None, typer.Option("--decimal-comma/--decimal-point", help="CSV numbers use ',' as decimal mark.")] = None,
    missing_token: TokenOpt = None,
    quiet: QuietOpt = False,
    as_json: JsonOpt = False,
    progress: ProgressOpt = "auto",
    log_json: LogJsonOpt = False,
    engine: Annotated[str | None, typer.Option("--engine", help="local (default) or dask: partition by partition on a Dask cluster (pip install 'panelprep[dask]').")] = None,
    cluster: Annotated[str | None, typer.Option("--cluster", help="Address of a running Dask scheduler (default: a local cluster is started).")] = None,
    partitions: Annotated[int | None, typer.Option("--partitions", help="Partitions of the dask engine's shuffle by entity (default automatic).")] = None,
) -> None:
    """Clean, audit, then write estimation-ready files with provenance into --out."""
    session = _Session(progress, quiet, log_json, as_json)
    if engine != "dask" and not _dataset_like(data):
        # folders and globs are for the dask engine, which checks its inputs itself (the
        # local engine refuses them with the same line as here)
        _check_data(data, session)
    from panelprep.config import RunFile, load_run_file

    overrides = {
        "input.path": data, "input.format": input_format, "input.delimiter": delimiter,
        "input.decimal_comma": decimal_comma, "input.missing_tokens": missing_token,
        "panel.entity": entity, "panel.time": time, "panel.freq": freq,
        "model.y": y, "model.x": x, "contract.schema": contract, "compare.previous": previous,
        "checks.fail_on": fail_on, "checks.severity": _severity_map(severity),
        "clean.duplicates": duplicates, "clean.normalise_ids": normalise_ids,
        "clean.singletons": singletons, "clean.balance": balance, "clean.window": window,
        "derive.lag": lag, "derive.lead": lead, "derive.diff": diff,
        "output.dir": out, "output.failed_dir": failed_out, "output.transforms": transform, "output.method": method,
        "output.format": output_format, "output.compression": compression, "output.force": force, "output.evidence": evidence,
        "engine.kind": engine, "engine.cluster": cluster, "engine.partitions": partitions,
    }
    try:
        overrides.update(_names_map(names))
        run = load_run_file(config, overrides) if config else RunFile().merged(overrides)
        # the run file is checked before the numeric stack loads: a bad value is answered
        # at once
        from panelprep.prepare import run_from_file

        result = run_from_file(run, progress=session.log)
    except InputError as err:
        session.fail(str(err))
    session.document(result.summary)
    _print_preparation(result, run.output.dir, session)
    session.end(result.verdict, result.summary["gate"]["failed_by"])


@app.command("compare", cls=_Command, epilog=EXIT_CODES)
def compare_command(
    old: Annotated[Path, typer.Argument(help="The earlier vintage: CSV, Parquet or Arrow/Feather file.")],
    new: Annotated[Path, typer.Argument(help="The later vintage of the same panel.")],
    entity: EntityOpt,
    time: TimeOpt,
    vars: Annotated[str | None, typer.Option("--vars", help="Variables to compare, comma-separated (default: every numeric non-key column both hold).")] = None,
    freq: FreqOpt = None,
    rtol: Annotated[float, typer.Option("--rtol", help="Relative tolerance: a cell is restated when |new - old| > atol + rtol * |old|.")] = 1e-9,
    atol: Annotated[float, typer.Option("--atol", help="Absolute tolerance (e.g. half the last digit the vendor rounds to).")] = 0.0,
    max_restated_share: Annotated[float | None, typer.Option("--max-restated-share", help="A variable restated in more than this share of its cells is an error (default: no limit).")] = None,
    out: Annotated[Path | None, typer.Option("--out", "-o", help="Write restated.parquet, comparison.json, comparison.txt and comparison.html into this folder.")] = None,
    force: Annotated[bool, typer.Option("--force", help="Replace a non-empty --out folder.")] = False,
    severity: Annotated[str | None, typer.Option("--severity", help="Severity per finding id, e.g. vintage-rows-added=warning.")] = None,
    fail_on: FailOpt = "error",
    input_format: FormatOpt = None,
    delimiter: DelimOpt = None,
    decimal_comma: DecimalOpt = False,
    missing_token: TokenOpt = None,
    quiet: QuietOpt = False,
    as_json: JsonOpt = False,
    progress: ProgressOpt = "auto",
    log_json: LogJsonOpt = False,
) -> None:
    """Compare two vintages of a panel: what entered, what left, what was restated."""
    session = _Session(progress, quiet, log_json, as_json)
    _check_data(old, session)
    _check_data(new, session)
    from panelprep import pipeline
    from panelprep.compare import CompareOptions, compare_files, write_comparison
    from panelprep.io import OutputFolder
    from panelprep.report.comparison import comparison_lines
    from panelprep.report.text import closing_lines

    try:
        options = CompareOptions(rtol=rtol, atol=atol, max_restated_share=max_restated_share,
                                 fail_on=fail_on, severities=_severity_map(severity) or {})
        options.validate()
        folder = OutputFolder(out, [old, new], force=force) if out is not None else None
        try:
            result = compare_files(
                old, new, pipeline.split_names(entity) or [], time, pipeline.split_names(vars),
                read_options=_read_options(input_format, delimiter, decimal_comma, missing_token),
                progress=session.log, freq=freq, options=options,
            )
            if folder is not None:
                write_comparison(result, folder, session.log)
                folder.commit()
        except BaseException:
            if folder is not None:
                folder.abandon()
            raise
    except InputError as err:
        session.fail(str(err))
    written = [] if out is None else [
        ("the changed cells", f"{out / 'restated.parquet'} ({result.n_changed:,} cells)"),
        ("the comparison", f"{out} (comparison.json, comparison.txt, comparison.html)")]
    document = result.to_dict()
    session.document(document)
    session.summary(comparison_lines(document) + closing_lines(document, written))
    session.end(result.verdict, document["gate"]["failed_by"])


@app.command("demo", cls=_Command, epilog=EXIT_CODES)
def demo_command(
    folder: Annotated[Path, typer.Argument(help="Folder for the demo data, run file and outputs.")] = Path("panelprep-demo"),
    force: Annotated[bool, typer.Option("--force", help="Redo the demo in a folder that is not empty.")] = False,
    quiet: QuietOpt = False,
    progress: ProgressOpt = "auto",
) -> None:
    """Write an invented demo panel with planted defects and prepare it from a run file."""
    from panelprep.demo import run_demo

    session = _Session(progress, quiet)
    try:
        result, planted = run_demo(folder, force=force, progress=session.log)
    except InputError as err:
        session.fail(str(err))
    session.log.finish()
    typer.echo(f"demo data (invented firms, not real companies): {folder / 'firms.csv'}, "
               f"{planted['rows']:,} rows, {planted['firms']} firms, 2005-2024")
    typer.echo(f"  planted: {planted['exact_duplicate_rows']} repeated rows, "
               f"{planted['conflicting_duplicate_keys']} conflicting keys, "
               f"{planted['lookalike_groups']} look-alike ids, {planted['gap_firms']} firms with holes, "
               f"{planted['singleton_firms']} singletons, "
               f"{sum(planted['missing_cells'].values())} missing cells")
    typer.echo(f"run file: {folder / 'run.toml'}")
    typer.echo("")
    vintages = folder / "vintages"
    _print_preparation(result, folder / "out", session,
                       f"read {result.written_to / 'diagnostics.txt'} top to bottom; rerun with: "
                       f"panelprep prepare --config {folder / 'run.toml'} --force\n"
                       "two deliveries of the panel, the later one revised: panelprep compare "
                       f"{vintages / 'firms_2023.csv'} {vintages / 'firms_2024.csv'} "
                       "--entity firm_id --time year")
    raise typer.Exit(EXIT_PASS if result.verdict == "pass" else EXIT_FAIL)


def _severity_map(text: str | None) -> dict[str, str] | None:
    if not text:
        return None
    out = {}
    for item in text.split(","):
        finding_id, sep, level = item.partition("=")
        if not sep:
            raise InputError(f"--severity {item!r} must be finding-id=level")
        out[finding_id.strip()] = level.strip()
    return out


def _names_map(text: str | None) -> dict[str, str]:
    """``--names row=src_row,theta=t`` -> ``{"names.row": "src_row", ...}``."""
    if not text:
        return {}
    out = {}
    for item in text.split(","):
        key, sep, name = item.partition("=")
        if not sep or not key.strip():
            raise InputError(f"--names {item!r} must be key=name, keys as in the run file's "
                             "[names] section (row, intercept, theta, entity_rows, reason, "
                             "step, lag, lead, diff)")
        out[f"names.{key.strip()}"] = name.strip()
    return out


@app.command("draft", cls=_Command)
def draft_command(
    data: Annotated[Path, typer.Argument(help="The data file to draft a run file for.")],
    out: Annotated[Path | None, typer.Option("--out", "-o", help="Write the run file here (default: print it).")] = None,
    force: Annotated[bool, typer.Option("--force", help="Overwrite an existing run file.")] = False,
) -> None:
    """Write a commented starter run file for DATA, with guessed keys marked."""
    from panelprep.draft import starter_run_file
    from panelprep.io import check_file_destination, resolved, write_file

    try:
        if out is not None:
            # before anything is read or written: the run file may never be the data
            check_file_destination(out, [data], "the run file")
        text = starter_run_file(data, run_dir=None if out is None else resolved(out).parent)
        if out is None:
            typer.echo(text, nl=False)
            return
        if os.path.lexists(out) and not force:
            raise InputError(f"{out}: exists (use --force to overwrite)")
        write_file(out, text, [data], "the run file")
    except InputError as err:
        _unusable(str(err))
    typer.echo(f"wrote {out}; check the lines marked 'guessed', then run: "
               f"panelprep prepare --config {out}", err=True)


def _print_preparation(result, out: Path, session: _Session, note: str = "") -> None:
    """The audit, the components, the cautions, where the files went, ``note``, and the verdict
    line last."""
    from panelprep.report.text import audit_lines, cautions_lines, components_lines, verdict_line

    summary = result.summary
    lines = audit_lines(summary)
    if summary.get("components"):
        lines += ["", *components_lines(summary["components"])]
    lines += cautions_lines(summary)
    names = ", ".join(f["name"] for f in summary.get("files", [])) or "diagnostics only"
    extra = ", run.toml" if result.verdict == "pass" else ""
    lines += ["", (f"written to {result.written_to}: {names}{extra}, diagnostics.json, "
              "diagnostics.txt, report.html")]
    if note:
        lines.append(note)
    session.summary([*lines, verdict_line(summary)])
    if result.verdict == "fail":
        failing = ", ".join(summary["gate"]["failed_by"])
        session.note(f"panelprep: the gate failed ({failing}); {out} was left as it was; the "
                     f"diagnostics are in {result.written_to}")


@app.command("components", cls=_Command, epilog=EXIT_CODES)
def components_command(
    data: Annotated[Path, typer.Argument(help="CSV, Parquet or Arrow/Feather file.")],
    entity: EntityOpt,
    time: TimeOpt,
    y: Annotated[str, typer.Option("--y", help="Dependent variable.")],
    x: Annotated[str, typer.Option("--x", help="Regressors, comma-separated.")],
    method: Annotated[str, typer.Option("--method", help="swamy-arora, wallace-hussain, amemiya or nerlove.")] = "swamy-arora",
    as_json: Annotated[bool, typer.Option("--json", help="Print the components as JSON.")] = False,
    freq: FreqOpt = None,
    input_format: FormatOpt = None,
    delimiter: DelimOpt = None,
    decimal_comma: DecimalOpt = False,
    missing_token: TokenOpt = None,
    quiet: QuietOpt = False,
    progress: ProgressOpt = "auto",
) -> None:
    """Print only the variance components of the estimation sample."""
    _check_data(data)
    from panelprep.prepare import estimate_file_components
    from panelprep.report.text import components_lines

    session = _Session(progress, quiet)
    try:
        found = estimate_file_components(
            data, entity, time, y, x, method=method, freq=freq,
            read_options=_read_options(input_format, delimiter, decimal_comma, missing_token),
            progress=session.log,
        )
    except InputError as err:
        session.fail(str(err))
    session.log.finish()
    if found.components is None:
        failing = ", ".join(dict.fromkeys(f["id"] for f in found.summary["findings"]
                                          if f["severity"] == "error"))
        typer.echo(f"panelprep: the audit gate failed ({failing}); no components estimated "
                   "(panelprep audit shows why)", err=True)
        raise typer.Exit(EXIT_FAIL)
    from panelprep._schema import SCHEMA_VERSION

    components = {"schema_version": SCHEMA_VERSION, **found.summary["components"],
                  "verdict": found.verdict}
    failed = [f for f in found.summary["findings"] if f["severity"] == "error"]
    if as_json:
        typer.echo(json.dumps(components, indent=2, allow_nan=False))
    elif not failed:
        typer.echo("\n".join(components_lines(components)))
    if failed:
        # the same gate as prepare: an under-identified fit is not a set of numbers to use
        for finding in failed:
            typer.echo(f"panelprep: {finding['id']}: {finding['message']}", err=True)
        typer.echo("panelprep: the components gate failed; these components are not usable "
                   "as estimates", err=True)
        raise typer.Exit(EXIT_FAIL)


def _check_reports(paths: list[Path | None], source: Path) -> None:
    """Before the audit runs: no report may be the input, nor go into a folder that is not one."""
    from panelprep.io import check_file_destination

    for path in paths:
        if path is not None:
            check_file_destination(path, [source], "the report")


def _write_html(path: Path, document: dict, result, source: Path) -> None:
    from panelprep.figures import picture_data
    from panelprep.report.html import write_html

    write_html(path, document, picture_data(result.context), inputs=[source])


def _write_json(path: Path, document: dict, source: Path) -> None:
    from panelprep.io import write_file

    text = json.dumps(document, indent=2, ensure_ascii=False, allow_nan=False)
    write_file(path, text + "\n", [source], "the report")


def main() -> None:
    """Entry point: usage errors become one line and exit 2, internal errors exit 3."""
    try:
        with warnings.catch_warnings():
            # a library's warning never reaches stderr; the runs record theirs in the
            # report (library-warnings), and this is the last line of defence
            warnings.simplefilter("ignore")
            code = app(standalone_mode=False)
    except typer.TyperException as err:  # usage errors: bad or missing options
        ctx = getattr(err, "ctx", None)
        where = f" ({ctx.command_path} --help shows the options)" if ctx is not None else ""
        message = " ".join(err.format_message().split())
        typer.echo(f"panelprep: error: {message}{where}", err=True)
        sys.exit(EXIT_UNUSABLE)
    except typer.Abort:
        typer.echo("panelprep: error: aborted", err=True)
        sys.exit(EXIT_UNUSABLE)
    except Exception as err:  # noqa: BLE001 - last line of defence: never a traceback for a user
        sys.exit(_internal_error(err))
    if _Session.active is not None:
        _Session.active.log.finish(exit_code=code)
    if code == EXIT_INTERRUPTED:
        # typer turns Ctrl-C into exit 130 (no command exits so itself)
        typer.echo(f"panelprep: {_interrupted()}", err=True)
    sys.exit(code or 0)


def script() -> None:
    """The ``panelprep`` command: ``main``, then an exit without the interpreter's teardown.

    When ``main`` returns, every output is complete and renamed into place
    and no thread is left working, so what remains of Python's exit is
    freeing the run's arrays and modules one by one: about 0.3 s after a run
    of 2.5 M rows, for nothing.  The standard streams are flushed first.
    (``main`` itself exits normally, for callers in the same process.)
    """
    try:
        main()
        code = 0
    except SystemExit as done:
        code = done.code if isinstance(done.code, int) else (0 if done.code is None else 1)
        if done.code is not None and not isinstance(done.code, int):
            print(done.code, file=sys.stderr)
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):  # a closed pipe (| head) or stream: nothing to keep
            pass
    os._exit(code)


def _internal_error(err: Exception) -> int:
    """A bug: the traceback saved to a file, one line on stderr naming it; exit 3."""
    import tempfile
    import traceback

    from panelprep._version import __version__

    message = " ".join(str(err).split())[:300]
    try:
        handle, name = tempfile.mkstemp(prefix="panelprep-traceback-", suffix=".txt")
        with os.fdopen(handle, "w", encoding="utf-8") as saved:
            saved.write(f"panelprep {__version__}, Python {sys.version.split()[0]}\n")
            saved.write(f"command: {' '.join(sys.argv)}\n\n")
            saved.write("".join(traceback.format_exception(err)))
        where = f"the traceback is saved in {name}"
    except OSError as saving:
        where = f"the traceback could not be saved ({saving.strerror})"
    line = (f"internal error (a bug in panelprep, not a problem with your data): "
            f"{type(err).__name__}: {message}; {where}; please report it as a bug with that "
            "file and the command")
    session, _Session.active = _Session.active, None
    if session is not None and session.log_json:
        session.log.finish(exit_code=EXIT_INTERNAL, message=line)
    else:
        if session is not None:
            session.log.finish()
        typer.echo(f"panelprep: {line}", err=True)
    return EXIT_INTERNAL


def _interrupted() -> str:
    """What an interrupted run left, truthfully: what was put in place before Ctrl-C, if any."""
    if "panelprep.io" not in sys.modules:
        return "interrupted; nothing was written"
    from panelprep.io import written_paths

    done = written_paths()
    if not done:
        return "interrupted; nothing was written"
    return (f"interrupted after writing {', '.join(map(str, done))}; nothing else was written")
