"""The dask engine: the preparation run partition by partition on a Dask cluster.

The plan (each pass is one task per partition; only small per-partition
results, never rows, come back to this process):

1. the input's files (a Parquet file, a folder of Parquet files, hive
   partitions included, or a glob of Parquet or CSV files) are read by the
   local engine's reader (``io.frame_from_table``), only the columns the run
   needs, and their rows are numbered in file order (files sorted by name);
2. the distinct time values make the grid (``timeaxis.time_grid``), so every
   partition places its rows on the same periods;
3. one shuffle by entity: rows go by the hash of their entity key with case
   and outer spaces folded, so each partition holds whole entities (and the
   ids that differ only by case or spaces meet in one partition);
4. ``audit``: per partition the local index on the shared grid, an
   ``AuditContext``, every check's tally (``checks.base.Check.tally``), the
   steps to the estimation sample with their ledger rows, and the sample
   block; kept on the workers for the passes that follow;
5. ``scaling``: the three column sums of ``_scale.scaling`` for the sample,
   for the rows of entities with two rows or more and for the entity means;
6. ``moments``: ``_moments.entity_moments`` on the whole sample's scaling,
   and the variation table's sums; ``periods``: its per-period sums of
   squares about the period means;
7. here: the findings from the added tallies, the variation table, the
   components from the added moments (``components.VarianceComponents.
   fit_sample``) and theta's two parameters;
8. ``designs``: each file's design factor per partition, stacked here into
   the decision on which regressors each file keeps;
9. ``write``: each partition writes its part of every file
   (``within/part-00000.parquet``, ...) into the temporary output folder,
   then the diagnostics are written and the folder renamed into place.

What this engine cannot do yet is refused before any data is read
(``engine.refuse_unsupported``).  Every check has a tally, but those read
off the variation table (``VARIATION_CHECKS``), which run here on the
added-up table.
"""

from __future__ import annotations

import glob
import hashlib
import math
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from functools import partial
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from panelprep._groups import group_counts, group_sums
from panelprep._linalg import decision_rtol, independent_from_inner
from panelprep._moments import ScaledMoments, combined_moments, entity_moments, triangular
from panelprep._paths import check_readable
from panelprep._scale import (
    Scaling,
    first_divisor,
    largest,
    level_sums,
    scaling_from,
    spread_sums,
)
from panelprep.checks import CHECKS, AuditContext
from panelprep.checks.base import merge_tallies
from panelprep.checks.shape import shape_finding
from panelprep.components import VarianceComponents
from panelprep.config import EngineSection
from panelprep.engine import dask_client, refuse_unsupported, require_dask
from panelprep.errors import ColumnError, InputError, TimeParseError
from panelprep.findings import Finding, apply_severities, gate
from panelprep.index import PanelIndex, build_index
from panelprep.io import (
    OutputFolder,
    ReadOptions,
    column_names,
    detect_format,
    frame_from_table,
    read_frame,
    sha256_file,
    write_table,
)
from panelprep.ledger import Ledger, StepRecord, require_rows
from panelprep.pipeline import (
    AuditReport,
    Progress,
    judge_final_sample,
    panel_summary,
    panel_tally,
    stated_step_finding,
)
from panelprep.prepare import (
    LEFT_OUT,
    OutputTables,
    Preparation,
    PrepareOptions,
    _components_findings,
    _failed_after_gate,
    _failed_output,
    _listwise_summary,
    closed_summary,
    failed_summary,
    file_metadata,
    fitted_summary,
    output_folders,
    run_record,
    sample_steps,
    write_diagnostics,
    write_run_file,
)
from panelprep.runlog import RunLog
from panelprep.timeaxis import Grid, time_grid
from panelprep.transforms import between, theta_per_entity
from panelprep.variation import (
    empty_row,
    pooled,
    spread_part,
    variation_row,
    with_within_measures,
)

# internal columns of the shuffled rows: the 0-based input row and the entity's hash
ROW = "__panelprep_row__"
HASH = "__panelprep_entity_hash__"
# checks whose finding is read off the variation table, made once from the added sums
VARIATION_CHECKS = ("var-fixed-within", "var-thin-within", "var-fixed-per-period")
# rows per partition the automatic count aims at
PARTITION_ROWS = 1_000_000
_GLOB = set("*?[")


@dataclass(frozen=True)
class Piece:
    """One file of the input, with the values of its hive partition keys (``key=value``
    folders above it), and where its rows start in the input's row numbering."""

    path: Path
    hive: tuple[tuple[str, str], ...]
    offset: int


@dataclass(frozen=True)
class Source:
    """The files of the input, their format, the columns they hold, and the rows."""

    given: str
    pieces: tuple[Piece, ...]
    fmt: str
    columns: list[str]
    rows: int | None

    @property
    def paths(self) -> list[Path]:
        return [p.path for p in self.pieces]


def input_source(data: str | Path, read_options: ReadOptions) -> Source:
    """The files a path, folder or glob names; one line for anything unusable."""
    text = str(data)
    path = Path(data)
    if path.is_dir():
        found = sorted(p for p in path.rglob("*.parquet")
                       if not any(part.startswith((".", "_")) for part in p.relative_to(path).parts))
        where = f"{path}: no .parquet file in the folder"
    elif _GLOB & set(text):
        found = sorted(Path(p) for p in glob.glob(text, recursive=True) if Path(p).is_file())
        where = f"{text}: no file matches"
    else:
        check_readable(path)
        found = [path]
        where = ""
    if not found:
        raise InputError(where)
    formats = {detect_format(p, read_options.input_format) for p in found}
    if len(formats) > 1:
        raise InputError(f"{text}: the files mix formats ({', '.join(sorted(formats))}); name "
                         "files of one format")
    fmt = formats.pop()
    if fmt not in ("parquet", "csv"):
        raise InputError(f"{text}: the dask engine reads Parquet or CSV files, not {fmt}")
    for p in found:
        check_readable(p)
    root = path if path.is_dir() else None
    hives = [_hive_keys(p, root) for p in found]
    columns = [*column_names(found[0], read_options), *(k for k, _ in hives[0])]
    rows = None
    offsets = [0] * len(found)
    if fmt == "parquet":
        counts = [_parquet_rows(p) for p in found]
        offsets = np.concatenate([[0], np.cumsum(counts)[:-1]]).astype(int).tolist()
        rows = int(sum(counts))
    pieces = tuple(Piece(p, h, o) for p, h, o in zip(found, hives, offsets))
    return Source(text, pieces, fmt, columns, rows)


def _hive_keys(path: Path, root: Path | None) -> tuple[tuple[str, str], ...]:
    if root is None:
        return ()
    parts = path.relative_to(root).parts[:-1]
    return tuple(tuple(part.split("=", 1)) for part in parts if "=" in part)


def _parquet_rows(path: Path) -> int:
    try:
        return pq.ParquetFile(path).metadata.num_rows
    except (pa.ArrowException, OSError) as err:
        raise InputError(f"{path}: cannot read as parquet: {' '.join(str(err).split())[:200]}"
                         ) from None


def sha256_of(hashes: Sequence[str]) -> str:
    """One sha256 for several files: of their sha256 digests in order, one a line.

    A single file keeps its own sha256, as the local engine records it.
    """
    if len(hashes) == 1:
        return hashes[0]
    return hashlib.sha256("".join(f"{h}\n" for h in hashes).encode()).hexdigest()


@dataclass(frozen=True)
class Spec:
    """What every partition's tasks need to know."""

    options: PrepareOptions
    read_options: ReadOptions
    wanted: list[str]
    grid: Grid | None = None
    # each column's type as read (the shuffle hands some back as objects: Arrow decimals)
    dtypes: dict[str, Any] | None = None


def read_piece(piece: Piece, spec: Spec, dtypes: dict[str, Any] | None = None) -> pd.DataFrame:
    """One file's rows as the local engine reads them, numbered, with the entity's hash.

    Float variables become ``double[pyarrow]`` in every file (NaN apart from
    null, as ``io.read_frame`` keeps them when a file holds NaN), and with
    ``dtypes`` (the first file's) every column is made that type, so the
    files' rows can meet in one partition.
    """
    options = spec.options
    hive = dict(piece.hive)
    stored = [c for c in spec.wanted if c not in hive]
    if not hive:
        frame = read_frame(piece.path, stored, options.entity, options.time, spec.read_options)
    else:
        try:
            table = pq.read_table(piece.path, columns=stored, page_checksum_verification=True)
        except (pa.ArrowException, OSError, ValueError) as err:
            raise InputError(f"{piece.path}: cannot read as parquet: "
                             f"{' '.join(str(err).split())[:200]}") from None
        frame = frame_from_table(piece.path, table, stored, options.entity, options.time,
                                 "parquet")
        for key, value in hive.items():
            frame[key] = pd.Series([value] * len(frame), dtype="str")
        frame = frame[spec.wanted]
    keys = {*options.entity, options.time}
    for name in frame.columns:
        if name not in keys and pd.api.types.is_float_dtype(frame[name].dtype) and not isinstance(
                frame[name].dtype, pd.ArrowDtype):
            frame[name] = frame[name].astype("double[pyarrow]")
    if dtypes is not None:
        for name, dtype in dtypes.items():
            if frame[name].dtype != dtype:
                try:
                    frame[name] = frame[name].astype(dtype)
                except (TypeError, ValueError):
                    raise ColumnError(
                        f"{piece.path}: column {name!r} is {frame[name].dtype} here but "
                        f"{dtype} in the first file; the dask engine needs one type per "
                        "column in every file") from None
    folded = frame[options.entity].astype(str).apply(lambda c: c.str.strip().str.casefold())
    frame[HASH] = pd.util.hash_pandas_object(folded, index=False).to_numpy()
    frame[ROW] = np.arange(piece.offset, piece.offset + len(frame), dtype=np.int64)
    return frame


def empty_of(piece: Piece, spec: Spec) -> pd.DataFrame:
    """The columns and types of a file's rows, without its rows (the frames' meta)."""
    return read_piece(piece, spec).iloc[:0]


def numbered_piece(piece: Piece, offset: int, spec: Spec,
                   dtypes: dict[str, Any]) -> pd.DataFrame:
    """:func:`read_piece` of a CSV file once the files' lengths give its first row."""
    return read_piece(Piece(piece.path, piece.hive, offset), spec, dtypes)


@dataclass(eq=False)
class PartState:
    """What a partition keeps on its worker between passes (never sent back whole)."""

    tally: dict[str, Any]
    index: PanelIndex
    values: np.ndarray
    counts: np.ndarray
    keys: pd.DataFrame
    rows: np.ndarray
    ordinal: np.ndarray
    dropped: pd.DataFrame


def audit_part(frame: pd.DataFrame, spec: Spec) -> PartState:
    """The local audit of one partition (whole entities) on the shared grid, as tallies."""
    options = spec.options
    frame = frame.sort_values(ROW, kind="stable")
    origin = frame[ROW].to_numpy(dtype=np.int64)
    frame = frame.drop(columns=[ROW, HASH]).reset_index(drop=True)
    for name, dtype in (spec.dtypes or {}).items():
        if frame[name].dtype != dtype:
            frame[name] = frame[name].astype(dtype)
    index = build_index(frame, options.entity, options.time, grid=spec.grid)
    ctx = AuditContext(frame, index, options.variables, options.thresholds,
                       spec.read_options.decimal_comma, tuple(spec.read_options.missing_tokens),
                       origin=origin)
    checks = {c.id: c.tally(ctx) for c in CHECKS if c.tally is not None}
    ledger = Ledger(rows_read=len(frame))
    alive = np.ones(len(frame), dtype=bool)
    story = []
    for removed, reason, step, step_id in sample_steps(ctx, options.variables):
        gone = removed & alive
        after = alive & ~gone
        story.append((step_id, step, int(alive.sum()), int(after.sum()),
                      _entities(index, alive), _entities(index, after)))
        ledger.drop(np.flatnonzero(gone), reason, step_id)
        alive = after
    dropped = ledger.to_frame(frame, [*options.entity, options.time], options.names)
    dropped[options.names.row] = origin[dropped[options.names.row].to_numpy() - 1] + 1
    sample = ctx.sample
    sample_ix = ctx.sample_index
    counts = ctx.sample_counts
    multi = counts[sample_ix.entity_codes] > 1
    tally = {"checks": checks, "panel": panel_tally(ctx),
             "story": story, "by_reason": ledger.by_reason(), "listwise": _listwise_summary(ctx),
             "rows": int(sample.sum()), "entities": int(sample_ix.n_entities),
             "multi_rows": int(multi.sum()), "singletons": int((counts == 1).sum()),
             "dropped": len(dropped), "rows_read": len(frame)}
    # the sample sorted by (entity, period), rows of one cell in input order: each part of
    # the files is then sorted so (the findings above were taken in input order)
    order = sample_ix.order
    sorted_ix = sample_ix.subset(order)
    return PartState(
        tally=tally, index=sorted_ix, values=ctx.sample_values[order], counts=counts,
        keys=frame[[*options.entity, options.time]].iloc[np.flatnonzero(sample)[order]]
        .reset_index(drop=True),
        rows=(origin[sample] + 1)[order],
        ordinal=sorted_ix.period_codes + sorted_ix.first_period,
        dropped=dropped,
    )


def _entities(index: PanelIndex, mask: np.ndarray) -> int:
    codes = index.entity_codes[mask]
    return int((group_counts(codes[codes >= 0], index.n_entities) > 0).sum())


def tally_of(state: PartState) -> dict[str, Any]:
    return state.tally


# --- the scaling passes: one block each for the sample, its rows of entities with two
# rows or more, and the entity means -------------------------------------------------

def _blocks(state: PartState) -> dict[str, np.ndarray]:
    multi = state.counts[state.index.entity_codes] > 1
    return {"sample": state.values, "multi": state.values[multi],
            "between": between(state.values, state.index.entity_codes, state.counts)}


def largest_part(state: PartState) -> dict[str, tuple]:
    """Per block: rows, largest magnitude, smallest and largest value of each column."""
    out = {}
    for name, block in _blocks(state).items():
        empty = len(block) == 0
        low = np.full(block.shape[1], np.inf) if empty else block.min(axis=0)
        high = np.full(block.shape[1], -np.inf) if empty else block.max(axis=0)
        out[name] = (len(block), largest(block), low, high)
    return out


def level_part(state: PartState, first: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    return {name: level_sums(block, first[name]) for name, block in _blocks(state).items()}


def spread_part_sums(state: PartState, first: dict[str, np.ndarray],
                     mean: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    return {name: spread_sums(block, first[name], mean[name])
            for name, block in _blocks(state).items()}


def moments_part(state: PartState, scale: Scaling, tol: np.ndarray) -> dict[str, Any]:
    """Entity moments of the sample and the variation table's sums, on the whole
    sample's scaling (``tol``: each column's constancy bound, squared)."""
    codes, counts = state.index.entity_codes, state.counts
    n_entities = len(counts)
    x_scale = Scaling(scale.first[1:], scale.mean[1:], scale.second[1:])
    y_scale = Scaling(scale.first[:1], scale.mean[:1], scale.second[:1])
    values = state.values
    moments = entity_moments(values[:, 1:], values[:, 0], codes, counts, x_scale, y_scale)
    inv = 1.0 / np.maximum(counts, 1)
    multi = counts >= 2
    periods, period = np.unique(state.ordinal, return_inverse=True)
    period = period.reshape(-1)
    columns = []
    z = np.empty(len(values))
    for j in range(values.shape[1]):
        scale.column(values, j, out=z)
        means = group_sums(codes, z, n_entities) * inv
        entity_ss = group_sums(codes, (z - means[codes]) ** 2, n_entities)
        varying = entity_ss > tol[j] * counts
        columns.append({
            "overall": spread_part(z), "means": spread_part(means),
            "within_ss": float(entity_ss.sum()), "multi": int(multi.sum()),
            "varying": int(varying[multi].sum()),
            "period_sums": np.bincount(period, weights=z, minlength=len(periods)),
        })
    # the row codes stay here: the driver adds up per-entity moments, never row-long arrays
    return {"moments": replace(moments, codes=np.zeros(0, dtype=np.int64)),
            "columns": columns, "periods": periods,
            "period_counts": np.bincount(period, minlength=len(periods))}


def period_part(state: PartState, scale: Scaling, periods: np.ndarray,
                period_means: np.ndarray) -> np.ndarray:
    """Per column and period of the grid's occurring ``periods``: the sum of squares about
    the period's mean (k + 1, P)."""
    place = np.searchsorted(periods, state.ordinal)
    out = np.zeros((state.values.shape[1], len(periods)))
    z = np.empty(len(state.values))
    for j in range(state.values.shape[1]):
        scale.column(state.values, j, out=z)
        out[j] = np.bincount(place, weights=(z - period_means[j][place]) ** 2,
                             minlength=len(periods))
    return out


def _tables(state: PartState, spec: Spec, components: tuple[float, float],
            scales: dict[str, np.ndarray], decided: dict | None = None) -> OutputTables:
    theta = theta_per_entity(*components, state.counts)
    return OutputTables(keys=state.keys, index=state.index, values=state.values,
                        counts=state.counts, theta=theta, options=spec.options,
                        ledger=Ledger(rows_read=0), raw=pd.DataFrame(), rows=state.rows,
                        progress=RunLog(), scales=scales, decided=decided)


def design_part(state: PartState, spec: Spec, components: tuple[float, float],
                scales: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Each transformed file's design factor on this partition's rows."""
    tables = _tables(state, spec, components, scales)
    return {name: tables.factor(name) for name in spec.options.transforms}


def write_part(job: tuple[PartState, dict[str, str]], spec: Spec,
               components: tuple[float, float], scales: dict[str, np.ndarray], decided: dict,
               folder: str, metadata: dict[str, dict[str, str]]) -> dict[str, Any]:
    """This partition's part of every file (file -> part file name), with the provenance
    in each; returns each part's rows, sha256 and schema."""
    state, names = job
    tables = _tables(state, spec, components, scales, decided)
    out = {}
    for name, part in names.items():
        path = Path(folder) / name / part
        if name == "dropped":
            table = pa.Table.from_pandas(state.dropped, preserve_index=False)
            pieces = iter([table])
        else:
            pieces = tables.pieces(name)
        options = spec.options
        rows = write_table(pieces, path, "parquet", metadata[name],
                           compression=options.compression,
                           dictionary=[*options.entity, options.time])
        out[name] = {"rows": rows, "sha256": sha256_file(path),
                     "schema": pq.read_schema(path)}
    return out


# --- the run ---------------------------------------------------------------------------

def run_partitioned(
    data: str | Path, out: str | Path, options: PrepareOptions, read_options: ReadOptions,
    engine: EngineSection, force: bool = False, progress: Progress | None = None,
    keep: Sequence[str | Path] = (), failed_out: str | Path | None = None,
) -> Preparation:
    """``prepare.run_preparation`` on a Dask cluster (see the module docstring).

    The output folder appears complete or not at all: every part is written
    into its temporary folder, which is renamed into place only when the
    diagnostics are written too; a failed gate leaves ``out`` as it was and
    writes the diagnostics into ``failed_out`` (default ``OUT.failed``).
    """
    options.validate()
    require_dask()
    refuse_unsupported(options, read_options)
    progress = progress if progress is not None else RunLog()
    source = input_source(data, read_options)
    options.check_names(source.columns, str(data))
    for column in [*options.entity, options.time, *options.columns_to_read]:
        if column not in source.columns:
            raise ColumnError(f"{data}: column {column!r} not found; columns are "
                              f"{source.columns}")
    record = run_record(options, read_options, data, out, force, failed_out, engine=engine)
    inputs = [*source.paths, *map(Path, keep)]
    out = Path(out)
    folder, failed = output_folders(out, inputs, force, failed_out)
    try:
        with dask_client(engine.cluster) as client:
            try:
                prep, written = _run_on(client, source, options, read_options, engine,
                                        progress, record, folder)
            except InputError:
                raise
            except Exception as err:
                if not _cluster_failure(err):
                    raise
                raise InputError(f"the dask cluster failed ({type(err).__name__}: "
                                 f"{' '.join(str(err).split())[:160]}); {out} was left as it "
                                 "was") from None
        if prep.verdict == "fail":
            folder.abandon()
            folder = _failed_output(failed, inputs, out, failed_out is None)
            written = []
        if written:
            write_run_file(folder, record, progress)
        write_diagnostics(prep, folder, options, progress, record, written, pictures={})
        folder.commit()
    except BaseException:
        folder.abandon()
        raise
    prep.written_to = folder.target
    return prep


def _cluster_failure(err: Exception) -> bool:
    """Whether ``err`` says the cluster, not the data or the code, failed: a task whose
    workers kept dying (the scheduler retries a task a few times), a lost connection."""
    from distributed.comm.core import CommClosedError
    from distributed.scheduler import KilledWorker

    return isinstance(err, (KilledWorker, CommClosedError, TimeoutError, OSError))


def _run_pass(client: Any, progress: Progress, step: str, what: str, task: Callable,
              states: list, *constants: Any) -> list:
    """One task per partition; partitions done are told on the run log as they finish."""
    from distributed import as_completed

    progress(step, f"{what}: {len(states)} partitions")
    futures = client.map(partial(task, **dict(constants)) if constants else task, states,
                         pure=False)
    told = 0
    for done, _ in enumerate(as_completed(futures), start=1):
        if done * 4 >= (told + 1) * len(futures) and done < len(futures):
            told = done * 4 // len(futures)
            progress(step, f"{what}: {done} of {len(futures)} partitions done")
    return client.gather(futures)


def _run_on(client: Any, source: Source, options: PrepareOptions, read_options: ReadOptions,
            engine: EngineSection, progress: Progress, record: Any,
            folder: OutputFolder) -> tuple[Preparation, list[dict[str, Any]]]:
    import dask.dataframe as dd

    wanted = list(dict.fromkeys([*options.entity, options.time, *options.columns_to_read]))
    spec = Spec(options, read_options, wanted)
    progress("read", f"reading {len(source.pieces)} {source.fmt} file(s)")
    meta = client.submit(empty_of, source.pieces[0], spec, pure=False).result()
    dtypes = {c: meta[c].dtype for c in wanted}
    frames = dd.from_map(read_piece, list(source.pieces), spec=spec, dtypes=dtypes, meta=meta,
                         enforce_metadata=False)
    rows_read = source.rows
    if rows_read is None:
        # CSV: a first pass counts each file's rows, so rows are numbered in file order
        lengths = frames.map_partitions(len).compute().tolist()
        offsets = np.concatenate([[0], np.cumsum(lengths)[:-1]]).astype(int).tolist()
        frames = dd.from_map(numbered_piece, list(source.pieces), offsets, spec=spec,
                             dtypes=dtypes, meta=meta, enforce_metadata=False)
        rows_read = int(sum(lengths))
    if rows_read == 0:
        raise InputError(f"{source.given}: no data rows, only a header")
    progress("grid", "the period grid from the distinct time values")
    distinct = frames[options.time].drop_duplicates().compute()
    try:
        grid = time_grid(distinct, options.freq, options.time)
    except TimeParseError as err:
        # the grid is read from the distinct values, whose positions are no input rows
        raise TimeParseError(re.sub(r" at row \d+", "", str(err))) from None
    spec = Spec(options, read_options, wanted, grid, dtypes)
    n_partitions = engine.partitions or max(
        2 * len(client.scheduler_info()["workers"]), math.ceil(rows_read / PARTITION_ROWS))
    progress("shuffle", f"shuffling {rows_read:,} rows by entity into {n_partitions} partitions",
             rows=rows_read)
    shuffled = frames.shuffle(on=HASH, npartitions=n_partitions)
    states = client.compute([_audit_delayed(p, spec) for p in shuffled.to_delayed()])
    tallies = _run_pass(client, progress, "audit", "the checks' tallies", tally_of, states)
    findings, panel, story, by_reason, listwise = _audit_findings(tallies, options, grid,
                                                                  progress)
    n_rows = sum(t["rows"] for t in tallies)
    if n_rows:
        # the variation table before the gate: its findings count like the others'
        scalings = _scalings(client, progress, states)
        sample_scale = scalings["sample"][0]
        tol = _constancy_bounds(sample_scale, scalings["sample"][1], options)
        parts = _run_pass(client, progress, "moments", "entity moments and variation sums",
                          moments_part, states, ("scale", sample_scale), ("tol", tol))
        table = _variation(client, progress, states, parts, sample_scale,
                           scalings["sample"][1], tol, options)
    else:
        table = {name: empty_row() for name in options.variables}
    findings = _with_variation_findings(findings, table, options)
    report = judge_final_sample(AuditReport(
        log=progress, options={}, verdict=gate(findings, options.fail_on),
        fail_on=options.fail_on, findings=findings,
        keys={"entity": options.entity, "time": options.time, "freq": grid.axis.name,
              "freq_inferred": grid.axis.inferred},
        input={"path": source.given,
               "sha256": sha256_of([sha256_file(p) for p in source.paths]), "rows": rows_read,
               "format": source.fmt, "files": len(source.paths)},
        panel=panel, variables=table, context=None), [])
    summary = report.to_dict()
    if report.verdict == "fail":
        failed_summary(summary, report, story, by_reason, progress, record, options)
        return Preparation(report, Ledger(rows_read), None, None, summary), []
    if report.panel["conflicting_duplicate_keys"]:
        raise InputError(
            "conflicting duplicate keys remain but the gate let them through; "
            "choose a duplicates policy or keep key-conflict an error")
    require_rows(n_rows, "cleaning")
    if rows_read != n_rows + sum(t["dropped"] for t in tallies):
        raise RuntimeError("drop ledger out of balance across partitions")

    moments = combined_moments([p["moments"] for p in parts])
    progress("components", f"variance components ({options.method})", rows=n_rows)
    x_scale = Scaling(sample_scale.first[1:], sample_scale.mean[1:], sample_scale.second[1:])
    y_scale = Scaling(sample_scale.first[:1], sample_scale.mean[:1], sample_scale.second[:1])
    standard = ScaledMoments(x_scale, y_scale, moments)
    components = VarianceComponents(method=options.method).fit_sample(
        standard, moments.counts, names=options.x)
    scaled = components.scaled_components_
    norms = standard.centred_norms()
    n_entities = sum(t["entities"] for t in tallies)
    multi_rows = sum(t["multi_rows"] for t in tallies)
    scales = {"within": norms if multi_rows == n_rows else scalings["multi"][2][1:],
              "quasi": np.concatenate([[np.sqrt(n_rows)], norms]),
              "between": np.concatenate([[np.sqrt(n_entities)], scalings["between"][2][1:]])}
    # a severity given for a components finding counts like one given for a check
    judged = apply_severities(_components_findings(components, options), options.severities)
    findings = findings + judged
    singletons = sum(t["singletons"] for t in tallies)
    fitted_summary(summary, findings, options,
                   {"rows": n_rows, "entities": n_entities, **listwise}, story, by_reason,
                   components, judged)
    info = _plan(options, multi_rows, n_entities, n_rows, singletons)
    prep = Preparation(report, Ledger(rows_read), components, None, summary)
    written: list[dict[str, Any]] = []
    if summary["verdict"] != "fail":
        # which regressors each file keeps, decided once on the whole sample
        factors = _run_pass(client, progress, "designs", "the files' designs", design_part,
                            states, ("spec", spec), ("components", scaled), ("scales", scales))
        sizes = {"within": multi_rows, "quasi": n_rows, "between": n_entities}
        decided = {name: _decision([f[name] for f in factors], sizes[name])
                   for name in options.transforms}
        _left_out(info, decided, options)
    closed_summary(summary, info, components, int(report.panel["periods"]), standard,
                   moments.counts, options)
    if summary["verdict"] == "fail":
        _failed_after_gate(summary)
    if summary["verdict"] != "fail":
        written = _write(client, progress, states, tallies, spec, scaled, scales, decided,
                         summary, record, folder)
    return prep, written


def _decision(factors: list[np.ndarray], rows: int) -> tuple[np.ndarray, np.ndarray]:
    """``(kept, negligible)`` of a file's columns from its partitions' design factors."""
    width = factors[0].shape[1]
    if rows == 0:
        return np.zeros(width, dtype=bool), np.zeros(width, dtype=bool)
    inner = triangular(np.vstack(factors), width)
    return independent_from_inner(inner, decision_rtol(rows, width))


def _audit_delayed(part: Any, spec: Spec) -> Any:
    from dask import delayed

    return delayed(audit_part)(part, spec)


def _audit_findings(tallies: list[dict], options: PrepareOptions, grid: Grid,
                    progress: Progress) -> tuple[list[Finding], dict, list[StepRecord],
                                                 dict[str, int], dict[str, int]]:
    """The checks' findings (but those of the variation table), the panel block, the steps
    and the drops from the partitions' tallies."""
    progress("findings", "adding up the partitions' tallies")
    stated = stated_step_finding(grid.axis)
    findings = [] if stated is None else [stated]
    for check in CHECKS:
        if check.tally is None:
            continue
        tally = merge_tallies([t["checks"][check.id] for t in tallies])
        if check.id == "panel-shape":
            finding = shape_finding(check, tally, grid.axis, options.thresholds)
        else:
            finding = check.finish(check, tally)
        if finding is not None:
            findings.append(finding)
    panel = panel_summary(merge_tallies([t["panel"] for t in tallies]))
    story = []
    for i, (step_id, step, *_) in enumerate(tallies[0]["story"]):
        rows_before, rows_after, before, after = np.sum(
            [t["story"][i][2:] for t in tallies], axis=0).tolist()
        story.append(StepRecord(step_id, step, rows_before, rows_after, before, after))
    by_reason = merge_tallies([t["by_reason"] for t in tallies])
    listwise = merge_tallies([t["listwise"] for t in tallies])
    return findings, panel, story, by_reason, listwise


def _scalings(client: Any, progress: Progress, states: list) -> dict[str, tuple]:
    """Per block: its Scaling, (rows, smallest, largest value per column), and its norms."""
    parts = _run_pass(client, progress, "scaling", "column scales", largest_part, states)
    firsts, extents = {}, {}
    for name in parts[0]:
        n = sum(p[name][0] for p in parts)
        big = np.max([p[name][1] for p in parts], axis=0)
        low = np.min([p[name][2] for p in parts], axis=0)
        high = np.max([p[name][3] for p in parts], axis=0)
        firsts[name] = first_divisor(big)
        extents[name] = (n, low, high)
    levels = _run_pass(client, progress, "scaling", "column levels", level_part, states,
                       ("first", firsts))
    means = {name: np.sum([lv[name] for lv in levels], axis=0) / max(extents[name][0], 1)
             for name in firsts}
    spreads = _run_pass(client, progress, "scaling", "column spreads", spread_part_sums, states,
                        ("first", firsts), ("mean", means))
    out = {}
    for name, first in firsts.items():
        total = np.sum([s[name] for s in spreads], axis=0)
        scale = scaling_from(first, means[name], total, max(extents[name][0], 1))
        # ||x - mean(x)||, the reference size of a file's column (prepare._centred_norm)
        out[name] = (scale, extents[name], first * np.sqrt(total))
    return out


def _constancy_bounds(scale: Scaling, extent: tuple, options: PrepareOptions) -> np.ndarray:
    """Each column's ``(constant_rtol * max |z|)^2``: z is monotone in x, so its largest
    magnitude is at the smallest or the largest value."""
    _, low, high = extent
    ends = scale.rows(np.vstack([low, high]), 0, 2)
    biggest = np.maximum(np.abs(ends).max(axis=0), np.finfo(float).tiny)
    return (options.thresholds.constant_rtol * biggest) ** 2


def _variation(client: Any, progress: Progress, states: list, parts: list[dict],
               scale: Scaling, extent: tuple, tol: np.ndarray, options: PrepareOptions
               ) -> dict[str, dict]:
    """The variation table of the sample from the partitions' sums (``variation_row``)."""
    periods = np.unique(np.concatenate([p["periods"] for p in parts]))
    k1 = len(options.variables)
    sums = np.zeros((k1, len(periods)))
    counts = np.zeros(len(periods), dtype=np.int64)
    for p in parts:
        place = np.searchsorted(periods, p["periods"])
        counts[place] += p["period_counts"]
        for j, column in enumerate(p["columns"]):
            sums[j, place] += column["period_sums"]
    period_means = sums / np.maximum(counts, 1)
    squares = np.sum(_run_pass(client, progress, "periods", "sums of squares per period",
                               period_part, states, ("scale", scale), ("periods", periods),
                               ("period_means", period_means)), axis=0)
    n = int(sum(p["moments"].n for p in parts))
    n_entities = int(sum(len(p["moments"].counts) for p in parts))
    _, low, high = extent
    multi_period = counts >= 2
    table = {}
    for j, name in enumerate(options.variables):
        columns = [p["columns"][j] for p in parts]
        count, level, m2 = pooled([c["overall"] for c in columns])
        groups, _, m2_means = pooled([c["means"] for c in columns])
        period_varies = squares[j] > tol[j] * counts
        table[name] = variation_row(
            n=n, n_entities=n_entities, centre=float(scale.centre[j]),
            unit=float(scale.scale[j]), level=level,
            sd=float(np.sqrt(m2 / (count - 1))) if count > 1 else None,
            sd_means=float(np.sqrt(m2_means / (groups - 1))) if groups > 1 else None,
            within_ss=float(sum(c["within_ss"] for c in columns)),
            low=float(low[j]), high=float(high[j]),
            multi=int(sum(c["multi"] for c in columns)),
            varying=int(sum(c["varying"] for c in columns)),
            period_varies=bool(period_varies[multi_period].any()),
            multi_period=bool(multi_period.any()))
    return with_within_measures(table)


def _with_variation_findings(findings: list[Finding], table: dict[str, dict],
                             options: PrepareOptions) -> list[Finding]:
    """The findings read off the variation table, in check order among the others."""
    view = SimpleNamespace(variation=table, thresholds=options.thresholds)
    made = [c.run(view) for c in CHECKS if c.id in VARIATION_CHECKS]
    severities = dict(options.severities)
    # a preparation never drops repeated rows unless a policy says so
    severities.setdefault("row-repeated", "error")
    by_id = {f.id: f for f in apply_severities([*findings, *filter(None, made)], severities)}
    return [by_id[c.id] for c in CHECKS if c.id in by_id]


def _plan(options: PrepareOptions, multi_rows: int, n_entities: int, n_rows: int,
          singletons: int) -> dict[str, Any]:
    """What each file holds (``OutputTables.info``) before its columns are decided."""
    plan = {"within": {"rows": multi_rows, "entities_absorbed": n_entities - singletons,
                       "singletons_dropped": singletons},
            "between": {"rows": n_entities}, "quasi": {"rows": n_rows}}
    return {name: plan[name] for name in options.transforms}


def _left_out(info: dict[str, Any], decided: dict, options: PrepareOptions) -> None:
    """Each file's regressors left out, as ``OutputTables._regressors`` records them."""
    reasons = {"within": "no-within-variation", "quasi": "collinear", "between": "collinear"}
    for name in options.transforms:
        independent, negligible = decided[name]
        if name != "within":
            independent, negligible = independent[1:], negligible[1:]
        left_out = []
        for j in np.flatnonzero(~independent):
            reason = reasons[name] if negligible[j] and name != "between" else "collinear"
            left_out.append({"name": options.x[j], "reason": reason, "why": LEFT_OUT[reason]})
        info[name]["regressors_left_out"] = left_out


def _write(client: Any, progress: Progress, states: list, tallies: list[dict], spec: Spec,
           scaled: tuple[float, float], scales: dict, decided: dict, summary: dict,
           record: Any, folder: OutputFolder) -> list[dict[str, Any]]:
    """Every partition's parts, then each dataset's ``_common_metadata``."""
    options = spec.options
    names = ["clean", *options.transforms, "dropped"]
    rows_of = {"clean": "rows", "within": "multi_rows", "between": "entities", "quasi": "rows",
               "dropped": "dropped"}
    part_names: list[dict[str, str]] = [{} for _ in states]
    for name in names:
        (folder.path(name)).mkdir()
        number = 0
        for i, tally in enumerate(tallies):
            if tally[rows_of[name]] or (number == 0 and i == len(tallies) - 1):
                part_names[i][name] = f"part-{number:05d}.parquet"
                number += 1
    columns = client.submit(columns_part, states[0], spec, scaled, scales, decided,
                            pure=False).result()
    metadata = {name: file_metadata(summary, options, record, name, columns[name])
                for name in names}
    progress("write", f"writing {len(names)} datasets from {len(states)} partitions")
    results = _run_pass(client, progress, "write", "writing the parts", write_part,
                        [(state, part_names[i]) for i, state in enumerate(states)],
                        ("spec", spec), ("components", scaled), ("scales", scales),
                        ("decided", decided), ("folder", str(folder.temp)),
                        ("metadata", metadata))
    files = []
    for name in names:
        written = [r[name] for r in results if name in r]
        pq.write_metadata(written[0]["schema"], folder.path(name) / "_common_metadata")
        files.append({"name": name, "rows": int(sum(w["rows"] for w in written)),
                      "sha256": sha256_of([w["sha256"] for w in written]),
                      "columns": columns[name], "parts": len(written)})
    return files


def columns_part(state: PartState, spec: Spec, components: tuple[float, float],
                 scales: dict[str, np.ndarray], decided: dict) -> dict[str, list[dict]]:
    """Each file's columns with their roles (``OutputTables.columns``), from one piece."""
    tables = _tables(state, spec, components, scales, decided)
    out = {}
    for name in ["clean", *spec.options.transforms]:
        next(iter(tables.pieces(name)))
        out[name] = tables.columns[name]
    out["dropped"] = tables._roles(list(state.dropped.columns))
    return out
