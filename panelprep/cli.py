"""Command line: parse options, call the pipeline, map failures to exit codes.

Exit codes are the contract for ETL gates: 0 the data passed, 1 the data
failed the gate, 2 the command could not run (one line on stderr, never a
traceback).
"""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Annotated

import typer

from panelprep import pipeline
from panelprep.errors import InputError
from panelprep.io import ReadOptions
from panelprep.report.text import audit_lines, components_lines

EXIT_PASS, EXIT_FAIL, EXIT_UNUSABLE = 0, 1, 2

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    help="Audit, clean and transform entity-by-period panels before any model is fitted.",
)

EntityOpt = Annotated[str, typer.Option("--entity", "-e", help="Entity key column(s), comma-separated.")]
TimeOpt = Annotated[str, typer.Option("--time", "-t", help="Time column.")]
FreqOpt = Annotated[str | None, typer.Option(
    "--freq", help="Period frequency: year, quarter, month, week, day or int (inferred if omitted).")]
FormatOpt = Annotated[str | None, typer.Option(
    "--input-format", help="csv, parquet or arrow (default: by extension).")]
DelimOpt = Annotated[str | None, typer.Option(
    "--delimiter", help="CSV delimiter (default: sniffed from the header).")]
DecimalOpt = Annotated[bool, typer.Option("--decimal-comma", help="CSV numbers use ',' as decimal mark.")]
TokenOpt = Annotated[str | None, typer.Option(
    "--missing-token", help="Comma-separated texts to read as missing in numeric variables, e.g. 'n/a,-'.")]
QuietOpt = Annotated[bool, typer.Option("--quiet", "-q", help="No progress lines on stderr.")]
FailOpt = Annotated[str, typer.Option("--fail-on", help="Lowest severity that fails the gate: error or warning.")]


@app.callback()
def root() -> None:
    """Audit, clean and transform entity-by-period panels before any model is fitted."""


def _read_options(input_format, delimiter, decimal_comma, missing_token) -> ReadOptions:
    if delimiter == "\\t":
        delimiter = "\t"
    return ReadOptions(
        input_format=input_format,
        delimiter=delimiter,
        decimal_comma=decimal_comma,
        missing_tokens=tuple(pipeline.split_names(missing_token) or ()),
    )


def _unusable(message: str) -> None:
    typer.echo(f"panelprep: error: {message}", err=True)
    raise typer.Exit(EXIT_UNUSABLE)


@app.command("audit")
def audit_command(
    data: Annotated[Path, typer.Argument(help="CSV, Parquet or Arrow/Feather file.")],
    entity: EntityOpt,
    time: TimeOpt,
    vars: Annotated[str | None, typer.Option("--vars", help="Variables to check, comma-separated (default: all numeric non-key columns).")] = None,
    freq: FreqOpt = None,
    report: Annotated[Path | None, typer.Option("--report", help="Write the JSON report here.")] = None,
    fail_on: FailOpt = "error",
    input_format: FormatOpt = None,
    delimiter: DelimOpt = None,
    decimal_comma: DecimalOpt = False,
    missing_token: TokenOpt = None,
    quiet: QuietOpt = False,
) -> None:
    """Check a panel's structure and gate on what is found."""
    try:
        if fail_on not in ("error", "warning"):
            raise InputError(f"--fail-on {fail_on!r} must be error or warning")
        result = pipeline.audit_file(
            data, entity, time, vars,
            options=_read_options(input_format, delimiter, decimal_comma, missing_token),
            progress=pipeline.stderr_progress(quiet),
            freq=freq, fail_on=fail_on,
        )
        document = result.to_dict()
        if report is not None:
            _write_json(report, document, data)
    except InputError as err:
        _unusable(str(err))
    typer.echo("\n".join(audit_lines(document)))
    raise typer.Exit(EXIT_PASS if result.verdict == "pass" else EXIT_FAIL)


@app.command("prepare")
def prepare_command(
    data: Annotated[Path, typer.Argument(help="CSV, Parquet or Arrow/Feather file.")],
    entity: EntityOpt,
    time: TimeOpt,
    y: Annotated[str, typer.Option("--y", help="Dependent variable.")],
    x: Annotated[str, typer.Option("--x", help="Regressors, comma-separated (may name lags, e.g. sales_lag1).")],
    out: Annotated[Path, typer.Option("--out", "-o", help="Output folder.")],
    transform: Annotated[str, typer.Option("--transform", help="Comma-separated: within, between, quasi, twoway.")] = "within,between,quasi",
    method: Annotated[str, typer.Option("--method", help="Variance components: swamy-arora, wallace-hussain, amemiya or nerlove.")] = "swamy-arora",
    output_format: Annotated[str, typer.Option("--format", help="Data files as parquet or csv.")] = "parquet",
    force: Annotated[bool, typer.Option("--force", help="Replace a non-empty output folder.")] = False,
    duplicates: Annotated[str, typer.Option("--duplicates", help="fail, drop-exact, keep-first, keep-last or mean.")] = "fail",
    normalise_ids: Annotated[str, typer.Option("--normalise-ids", help="none, trim or trim-fold.")] = "none",
    singletons: Annotated[str, typer.Option("--singletons", help="keep or drop.")] = "keep",
    balance: Annotated[str, typer.Option("--balance", help="keep, complete-entities or largest-block.")] = "keep",
    window: Annotated[str | None, typer.Option("--window", help="FIRST:LAST period labels to keep, either may be empty.")] = None,
    lag: Annotated[str | None, typer.Option("--lag", help="Lags as var:k,... creating var_lagk.")] = None,
    lead: Annotated[str | None, typer.Option("--lead", help="Leads as var:k,... creating var_leadk.")] = None,
    diff: Annotated[str | None, typer.Option("--diff", help="Differences as var[:k],... creating var_diffk.")] = None,
    freq: FreqOpt = None,
    fail_on: FailOpt = "error",
    input_format: FormatOpt = None,
    delimiter: DelimOpt = None,
    decimal_comma: DecimalOpt = False,
    missing_token: TokenOpt = None,
    quiet: QuietOpt = False,
) -> None:
    """Clean, audit, then write estimation-ready files with provenance into --out."""
    from panelprep.clean import Policies
    from panelprep.lags import parse_shifts
    from panelprep.prepare import PrepareOptions, run_preparation

    try:
        if fail_on not in ("error", "warning"):
            raise InputError(f"--fail-on {fail_on!r} must be error or warning")
        options = PrepareOptions(
            entity=pipeline.split_names(entity) or [], time=time, y=y,
            x=pipeline.split_names(x) or [], freq=freq,
            transforms=pipeline.split_names(transform) or [], method=method,
            output_format=output_format, fail_on=fail_on,
            policies=Policies(duplicates=duplicates, normalise_ids=normalise_ids,
                              singletons=singletons, balance=balance, window=_window(window)),
            shifts=[*parse_shifts("lag", lag), *parse_shifts("lead", lead),
                    *parse_shifts("diff", diff)],
        )
        result = run_preparation(
            data, out, options,
            read_options=_read_options(input_format, delimiter, decimal_comma, missing_token),
            force=force, progress=pipeline.stderr_progress(quiet),
        )
    except InputError as err:
        _unusable(str(err))
    _print_preparation(result.summary, out)
    raise typer.Exit(EXIT_PASS if result.verdict == "pass" else EXIT_FAIL)


def _window(text: str | None) -> tuple[str | None, str | None]:
    if not text:
        return (None, None)
    first, sep, last = text.partition(":")
    if not sep:
        raise InputError(f"--window {text!r} must be FIRST:LAST (either may be empty)")
    return (first.strip() or None, last.strip() or None)


def _print_preparation(summary: dict, out: Path) -> None:
    typer.echo("\n".join(audit_lines(summary)))
    if summary.get("components"):
        typer.echo("")
        typer.echo("\n".join(components_lines(summary["components"])))
    typer.echo("")
    names = ", ".join(f["name"] for f in summary.get("files", [])) or "diagnostics only"
    typer.echo(f"written to {out}: {names}, diagnostics.json, diagnostics.txt")


@app.command("components")
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
) -> None:
    """Print only the variance components of the estimation sample."""
    from panelprep.prepare import estimate_file_components

    try:
        found = estimate_file_components(
            data, entity, time, y, x, method=method, freq=freq,
            read_options=_read_options(input_format, delimiter, decimal_comma, missing_token),
            progress=pipeline.stderr_progress(quiet),
        )
    except InputError as err:
        _unusable(str(err))
    if found.components is None:
        failing = ", ".join(dict.fromkeys(f["id"] for f in found.summary["findings"]
                                          if f["severity"] == "error"))
        typer.echo(f"panelprep: the audit gate failed ({failing}); no components estimated "
                   "(panelprep audit shows why)", err=True)
        raise typer.Exit(EXIT_FAIL)
    components = found.summary["components"]
    if as_json:
        typer.echo(json.dumps(components, indent=2, allow_nan=False))
    else:
        typer.echo("\n".join(components_lines(components)))


def _write_json(path: Path, document: dict, source: Path) -> None:
    if path.resolve() == Path(source).resolve():
        raise InputError(f"{path}: the report would overwrite the input file")
    text = json.dumps(document, indent=2, ensure_ascii=False, allow_nan=False)
    tmp = path.with_name(path.name + ".partial")
    try:
        tmp.write_text(text + "\n", encoding="utf-8")
        tmp.replace(path)
    except OSError as err:
        tmp.unlink(missing_ok=True)
        raise InputError(f"{path}: cannot write the report: {err.strerror}") from None


def main() -> None:
    """Entry point that also turns unexpected failures into one line and exit 2."""
    try:
        app(standalone_mode=True)
    except SystemExit:
        raise
    except Exception as err:  # last line of defence: never a traceback for a user
        typer.echo(f"panelprep: error: internal failure: {type(err).__name__}: {err}", err=True)
        sys.exit(EXIT_UNUSABLE)
