"""Speed and memory of the preparation flow on a large synthetic unbalanced panel.

One run generates a panel (untimed), writes it as Parquet, then measures every
case on that same file, each repetition in a fresh subprocess so that peak
resident memory (``VmHWM``) belongs to that measurement alone:

* ``floor``: pyarrow reads the columns prepare reads and writes them back out
  once per data file prepare writes (zstd, like prepare).
* ``naive``: the hand-written pandas way, read -> listwise deletion -> groupby
  means -> within, between -> numpy OLS (pooled, within, between) ->
  Swamy-Arora components -> theta per entity -> quasi-demeaning -> to_parquet.
* ``ours_api`` / ``ours_cli``: ``panelprep.prepare.prepare`` and
  ``panelprep prepare --quiet`` with within, between and quasi.
* ``naive_compute`` / ``ours_compute``: the naive computation and
  ``prepare_frame`` on a frame already in memory (no I/O).
* ``audit``: ``panelprep.audit`` on the frame in memory.
* ``twoway_ours`` / ``twoway_naive`` / ``within_ours``: the two-way transform
  to 1e-10 relative precision, alternating pandas groupby demeaning to the
  same precision, and the one-way within transform, on the same block.
* ``errors_ours``: the three error-structure tests on the same block.

Usage (see benchmarks/README.md)::

    python benchmarks/run_benchmark.py --rows 10000000 --entities 200000 --vars 8 \
        --reps 3 --json benchmarks/results/full.json
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import os
import platform
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

ENTITY = "firm_id"
TIME = "year"
FIRST_YEAR = 1900
TRANSFORMS = ("within", "between", "quasi")
TWOWAY_TOL = 1e-10
# Alternating projections stop after this many sweeps even if not converged
# (reported as not converged rather than running without bound).
NAIVE_MAX_SWEEPS = 5000
PROBE_ROWS = 500
PARQUET_COMPRESSION = "zstd"

CASES = {
    "floor": "pyarrow read + write the same columns once per data file prepare writes",
    "naive": "hand-written pandas/numpy: read, clean, within/between/quasi, to_parquet",
    "ours_api": "panelprep.prepare.prepare (within, between, quasi), Python API",
    "ours_cli": "panelprep prepare --quiet in a subprocess (wall time incl. start-up)",
    "naive_compute": "naive computation on a frame in memory (no I/O)",
    "ours_compute": "prepare_frame on a frame in memory (no I/O)",
    "audit": "panelprep.audit on the frame in memory",
    "twoway_ours": f"transforms.twoway to {TWOWAY_TOL:g} relative precision",
    "twoway_naive": f"alternating pandas groupby demeaning until max change < {TWOWAY_TOL:g}",
    "within_ours": "transforms.within on the same block",
    "errors_ours": "evidence.error_structure (Wooldridge, Born-Breitung, Pesaran CD) on the block",
    "compare_floor": "pyarrow read of both vintages (the data and a revised copy) to pandas",
    "compare": "panelprep.compare.compare_files: the data against a revised copy",
}
SCALING_CASES = ("floor", "ours_api", "ours_compute", "audit", "twoway_ours", "within_ours")
SCALING_ROWS = (1_000_000, 3_000_000, 10_000_000)


# --------------------------------------------------------------------------- data


def variable_names(n_vars: int) -> tuple[str, list[str]]:
    """The response and the regressors: ``n_vars`` numeric columns in all."""
    if n_vars < 2:
        raise SystemExit("--vars must be at least 2 (a response and one regressor)")
    return "y", [f"x{j}" for j in range(1, n_vars)]


def generate_panel(
    rows: int, entities: int, n_vars: int, gap_share: float, dup_share: float,
    missing_share: float, seed: int,
):
    """A synthetic unbalanced panel as a pyarrow Table, sorted by entity and year.

    Each entity covers a run of consecutive years of random length (mean
    ``rows / entities / (1 - gap_share)``) at a random start; a share
    ``gap_share`` of its non-first slots is then left out at random, which
    makes gaps.  ``y = x b + u_i + e_it``; each x has an entity part correlated
    with ``u_i``, a year part and row noise, around offsets of 10..80 so that
    relative precision is measured against a nonzero level.  A share
    ``missing_share`` of rows gets one variable set to missing, and a share
    ``dup_share`` of rows is repeated exactly (every column) right after the
    original.  Everything is vectorised: no loop over entities.
    """
    import pyarrow as pa

    rng = np.random.default_rng(seed)
    y_name, x_names = variable_names(n_vars)
    if entities < 1 or rows < 2 * entities:
        raise SystemExit("--rows must be at least twice --entities")
    slots_target = rows / (1.0 - gap_share)
    mean_span = slots_target / entities
    low = max(2, round(0.3 * mean_span))
    high = max(low + 1, round(2 * mean_span - low))
    span = rng.integers(low, high + 1, size=entities)
    # nudge spans so that the slots exceed the rows to keep by the right margin
    short = int(np.ceil(slots_target)) - int(span.sum())
    if short > 0:
        span += short // entities + 1
    n_years = int(span.max()) + max(5, int(span.max()) // 4)
    start = rng.integers(0, n_years - span + 1)
    slots = int(span.sum())
    code = np.repeat(np.arange(entities, dtype=np.int64), span)
    first_slot = np.zeros(entities + 1, dtype=np.int64)
    np.cumsum(span, out=first_slot[1:])
    offset = np.arange(slots, dtype=np.int64) - np.repeat(first_slot[:-1], span)
    year = np.repeat(start, span) + offset

    # keep every entity's first slot and a random choice of the others
    keep = np.zeros(slots, dtype=bool)
    keep[first_slot[:-1]] = True
    others = np.flatnonzero(~keep)
    extra = rows - entities
    if extra > len(others):
        raise SystemExit("panel too short for the requested gap share")
    keep[rng.choice(others, size=extra, replace=False)] = True
    code, year = code[keep], year[keep]
    n = len(code)

    effect = rng.normal(0.0, 2.0, size=entities)
    year_effect = rng.normal(0.0, 1.0, size=n_years)
    beta = np.linspace(0.5, -0.5, len(x_names))
    columns: dict[str, np.ndarray] = {}
    y = 50.0 + effect[code] + rng.normal(0.0, 1.0, size=n)
    for j, name in enumerate(x_names):
        part = 0.6 * effect + rng.normal(0.0, 1.0, size=entities)
        x = 10.0 * (j + 1) + part[code] + 0.5 * year_effect[year] + rng.normal(0.0, 1.0, size=n)
        y += beta[j] * x
        columns[name] = x
    columns = {y_name: y, **columns}

    if missing_share > 0:
        holes = rng.choice(n, size=round(missing_share * n), replace=False)
        which = rng.integers(0, n_vars, size=len(holes))
        names = [y_name, *x_names]
        for j, name in enumerate(names):
            columns[name][holes[which == j]] = np.nan

    repeat = np.ones(n, dtype=np.int64)
    if dup_share > 0:
        repeat[rng.choice(n, size=round(dup_share * n), replace=False)] = 2
    take = np.repeat(np.arange(n), repeat)

    labels = pa.array([f"F{i:07d}" for i in range(entities)], type=pa.string())
    arrays = {
        ENTITY: labels.take(pa.array(code[take])),
        TIME: pa.array(FIRST_YEAR + year[take], type=pa.int64()),
    }
    for name, values in columns.items():
        arrays[name] = pa.array(values[take], type=pa.float64(), from_pandas=True)
    return pa.table(arrays)


def data_path(workdir: Path, args: argparse.Namespace, rows: int, entities: int) -> Path:
    tag = (f"panel_r{rows}_e{entities}_v{args.vars}_g{args.gap_share:g}_d{args.dup_share:g}"
           f"_m{args.missing_share:g}_s{args.seed}.parquet")
    return workdir / tag


def ensure_data(path: Path, args: argparse.Namespace, rows: int, entities: int) -> float:
    """Write the panel unless the same one is already there; returns seconds spent."""
    import pyarrow.parquet as pq

    if path.exists() and not args.regenerate:
        return 0.0
    began = time.perf_counter()
    table = generate_panel(rows, entities, args.vars, args.gap_share, args.dup_share,
                           args.missing_share, args.seed)
    partial = path.with_suffix(".partial")
    pq.write_table(table, partial, compression=PARQUET_COMPRESSION)
    partial.rename(path)
    return time.perf_counter() - began


# ---------------------------------------------------------------------- memory


def _status_kib(field: str) -> int:
    with open("/proc/self/status") as handle:
        for line in handle:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    return 0


# ------------------------------------------------------------------ the cases


class Spec:
    """What a child needs to run one case (passed as JSON on the command line)."""

    def __init__(self, raw: dict[str, Any]):
        self.data = Path(raw["data"])
        self.out = Path(raw["out"])
        self.y = raw["y"]
        self.x = list(raw["x"])
        self.dedupe = bool(raw["dedupe"])
        self.probe_seed = int(raw["probe_seed"])

    @property
    def variables(self) -> list[str]:
        return [self.y, *self.x]

    @property
    def columns(self) -> list[str]:
        return [ENTITY, TIME, *self.variables]

    def policies(self):
        from panelprep.clean import Policies

        return Policies(duplicates="drop-exact") if self.dedupe else Policies()

    def data_files(self) -> int:
        """Data files prepare writes: clean, one per transform, and the dropped-rows ledger."""
        return 1 + len(TRANSFORMS) + 1

    def probe(self, n: int) -> np.ndarray:
        rng = np.random.default_rng(self.probe_seed)
        return np.sort(rng.choice(n, size=min(PROBE_ROWS, n), replace=False))


def _floor(spec: Spec) -> tuple[Any, dict]:
    import pyarrow.parquet as pq

    def run():
        table = pq.read_table(spec.data, columns=spec.columns)
        for i in range(spec.data_files()):
            pq.write_table(table, spec.out / f"copy{i}.parquet", compression=PARQUET_COMPRESSION)
        return {"files_written": spec.data_files(), "rows_written_each": table.num_rows}

    return run, {}


def naive_clean(frame, spec: Spec):
    """Exact repeats dropped (when generated), then listwise deletion over the variables."""
    if spec.dedupe:
        frame = frame.drop_duplicates(keep="first")
    complete = frame[spec.variables].notna().all(axis=1).to_numpy()
    dropped = frame.loc[~complete, [ENTITY, TIME]].copy()
    dropped["reason"] = "listwise-missing"
    return frame.loc[complete].reset_index(drop=True), dropped


def naive_compute(frame, spec: Spec) -> dict[str, Any]:
    """The hand-written pandas/numpy within, between and quasi files.

    Swamy-Arora in its unbalanced form (between regression on entity means
    weighted by sqrt(T_i), denominator ``n - tr[(W'PW)^-1 W'ZZ'W]``), as a
    user following the published formula would write it with numpy.
    """
    import pandas as pd

    clean, dropped = naive_clean(frame, spec)
    names = spec.variables
    groups = clean.groupby(ENTITY, sort=True)
    means = groups[names].transform("mean")
    demeaned = clean[names] - means
    between = groups[names].mean()
    t = groups.size().to_numpy().astype(np.float64)
    between["n_obs"] = t.astype(np.int64)
    between = between.reset_index()
    t_row = groups[spec.y].transform("size").to_numpy()

    n, n_ent, k = len(clean), len(between), len(spec.x)
    yw = demeaned[spec.y].to_numpy()
    xw = demeaned[spec.x].to_numpy()
    _, ssr_w, _, _ = np.linalg.lstsq(xw, yw, rcond=None)
    s2e = float(ssr_w[0]) / (n - n_ent - k)

    root_t = np.sqrt(t)
    w = np.column_stack([np.ones(n_ent), between[spec.x].to_numpy()])
    yb = between[spec.y].to_numpy()
    _, ssr_b, _, _ = np.linalg.lstsq(w * root_t[:, None], yb * root_t, rcond=None)
    wpw = w.T @ (w * t[:, None])
    wzw = w.T @ (w * (t * t)[:, None])
    trace = float(np.trace(np.linalg.solve(wpw, wzw)))
    s2u = max((float(ssr_b[0]) - (n_ent - k - 1) * s2e) / (n - trace), 0.0)

    pooled_x = np.column_stack([np.ones(n), clean[spec.x].to_numpy()])
    pooled_coef, _, _, _ = np.linalg.lstsq(pooled_x, clean[spec.y].to_numpy(), rcond=None)

    theta = 1.0 - np.sqrt(s2e / (t * s2u + s2e))
    theta_row = pd.Series(theta, index=between[ENTITY]).reindex(clean[ENTITY]).to_numpy()
    quasi = clean[names] - means.mul(theta_row, axis=0)
    keys = clean[[ENTITY, TIME]]
    within_table = pd.concat([keys, demeaned], axis=1)[t_row > 1].reset_index(drop=True)
    quasi_table = pd.concat([keys, quasi], axis=1)
    quasi_table["const"] = 1.0 - theta_row
    quasi_table["theta"] = theta_row
    return {
        "tables": {"clean": clean, "within": within_table, "between": between,
                   "quasi": quasi_table, "dropped": dropped},
        "sigma2_entity": s2u, "sigma2_idiosyncratic": s2e,
        "pooled_coef": pooled_coef.tolist(),
    }


def _probe_quasi(spec: Spec, quasi_y: np.ndarray, theta_row: np.ndarray) -> dict:
    rows = spec.probe(len(quasi_y))
    return {"probe_quasi_y": quasi_y[rows].tolist(), "probe_theta": theta_row[rows].tolist()}


def _naive(spec: Spec) -> tuple[Any, dict]:
    import pandas as pd

    def run():
        frame = pd.read_parquet(spec.data, columns=spec.columns)
        result = naive_compute(frame, spec)
        for name, table in result["tables"].items():
            table.to_parquet(spec.out / f"{name}.parquet", index=False,
                             compression=PARQUET_COMPRESSION)
        quasi = result["tables"]["quasi"]
        return {"files_written": len(result["tables"]),
                "sigma2_entity": result["sigma2_entity"],
                "sigma2_idiosyncratic": result["sigma2_idiosyncratic"],
                **_probe_quasi(spec, quasi[spec.y].to_numpy(), quasi["theta"].to_numpy())}

    return run, {}


def _ours_summary(spec: Spec, prep, quasi_file: Path | None = None) -> dict:
    comp = prep.summary.get("components") or {}
    out = {"verdict": prep.verdict, "sigma2_entity": comp.get("sigma2_entity"),
           "sigma2_idiosyncratic": comp.get("sigma2_idiosyncratic"),
           "steps_peak_kib": _steps_peak_kib(prep.summary)}
    import pandas as pd

    from panelprep.names import DEFAULT_NAMES

    quasi = prep.tables.get("quasi") if quasi_file is None else pd.read_parquet(
        quasi_file, columns=[spec.y, DEFAULT_NAMES.theta])
    if quasi is not None:
        theta = quasi[DEFAULT_NAMES.theta].to_numpy()
        out.update(_probe_quasi(spec, quasi[spec.y].to_numpy(), theta))
    return out


def _ours_api(spec: Spec) -> tuple[Any, dict]:
    from panelprep.prepare import prepare

    def run():
        prep = prepare(spec.data, spec.out / "prepared", entity=ENTITY, time=TIME, y=spec.y,
                       x=spec.x, transforms=list(TRANSFORMS), force=True,
                       policies=spec.policies())
        # the probe reads the quasi file written, as a user of the files would: building
        # prep.tables would hold every output table in memory at once
        info = _ours_summary(spec, prep, spec.out / "prepared" / "quasi.parquet")
        info["files_written"] = len(prep.summary.get("files", []))
        return info

    return run, {}


def _ours_cli(spec: Spec) -> tuple[Any, dict]:
    exe = shutil.which("panelprep") or str(Path(sys.executable).with_name("panelprep"))
    command = [exe, "prepare", str(spec.data), "--entity", ENTITY, "--time", TIME,
               "--y", spec.y, "--x", ",".join(spec.x), "--out", str(spec.out / "prepared"),
               "--transform", ",".join(TRANSFORMS), "--force", "--quiet"]
    if spec.dedupe:
        command += ["--duplicates", "drop-exact"]

    def run():
        done = subprocess.run(command, capture_output=True, text=True, check=False)
        if done.returncode != 0:
            raise RuntimeError(f"CLI exit {done.returncode}: {done.stderr[-2000:]}")
        summary = json.loads((spec.out / "prepared" / "diagnostics.json").read_text())
        return {"exit_code": done.returncode,
                "files_written": len(list((spec.out / "prepared").glob("*.parquet"))),
                "steps_peak_kib": _steps_peak_kib(summary)}

    return run, {"peak_from_children": True}


def _steps_peak_kib(summary: dict) -> int:
    """The largest per-step peak of a run's ``run.steps``.

    A preparation resets the resident high-water mark at each step (to tell
    each step's peak), so the process's ``VmHWM`` or ``ru_maxrss`` at the
    end holds only the last step's; the run's peak is the largest of them.
    """
    steps = summary.get("run", {}).get("steps", [])
    return max((int(step["peak_rss_bytes"]) // 1024 for step in steps), default=0)


def _load_frame(spec: Spec):
    import pandas as pd

    return pd.read_parquet(spec.data, columns=spec.columns)


def _naive_compute(spec: Spec) -> tuple[Any, dict]:
    frame = _load_frame(spec)

    def run():
        result = naive_compute(frame, spec)
        quasi = result["tables"]["quasi"]
        return {"sigma2_entity": result["sigma2_entity"],
                "sigma2_idiosyncratic": result["sigma2_idiosyncratic"],
                **_probe_quasi(spec, quasi[spec.y].to_numpy(), quasi["theta"].to_numpy())}

    return run, {}


def _ours_compute(spec: Spec) -> tuple[Any, dict]:
    from panelprep.prepare import PrepareOptions, prepare_frame

    frame = _load_frame(spec)
    options = PrepareOptions(entity=[ENTITY], time=TIME, y=spec.y, x=spec.x,
                             transforms=list(TRANSFORMS), policies=spec.policies())

    def run():
        return _ours_summary(spec, prepare_frame(frame, options))

    return run, {}


def _audit(spec: Spec) -> tuple[Any, dict]:
    import panelprep

    frame = _load_frame(spec)

    def run():
        report = panelprep.audit(frame, entity=ENTITY, time=TIME, vars=spec.variables)
        return {"verdict": report.verdict, "findings": [f.id for f in report.findings]}

    return run, {}


def _block(spec: Spec):
    """The complete-case block and its integer codes, built before the clock starts."""
    import pandas as pd

    clean, _ = naive_clean(_load_frame(spec), spec)
    entity_codes, _ = pd.factorize(clean[ENTITY], sort=True)
    period_codes, _ = pd.factorize(clean[TIME], sort=True)
    values = np.asfortranarray(clean[spec.variables].to_numpy(dtype=np.float64))
    return values, entity_codes.astype(np.int64), period_codes.astype(np.int64)


def _twoway_ours(spec: Spec) -> tuple[Any, dict]:
    from panelprep import transforms

    values, ent, per = _block(spec)
    n_ent, n_per = int(ent.max()) + 1, int(per.max()) + 1

    def run():
        block, result = transforms.twoway(values, ent, per, n_ent, n_per, tol=TWOWAY_TOL)
        rows = spec.probe(len(block))
        return {"method": result.method, "iterations": result.iterations,
                "precision": result.precision, "converged": result.converged,
                "probe_twoway": block[rows].tolist(), "rows": len(block)}

    return run, {}


def naive_twoway(values: np.ndarray, entity_codes: np.ndarray, period_codes: np.ndarray,
                 tol: float, max_sweeps: int = NAIVE_MAX_SWEEPS):
    """Alternating projections with pandas: entity demeaning, then period demeaning, repeated.

    Stops when, within one sweep, the largest entity or period mean removed
    is below ``tol`` times the column's root mean square (the same scale as
    ``TwowayResult.precision``), for every column.
    """
    import pandas as pd

    current = pd.DataFrame(values)
    scale = np.sqrt((values ** 2).mean(axis=0))
    scale = np.where(scale > 0, scale, 1.0)
    sweeps = 0
    change = np.inf
    while sweeps < max_sweeps:
        step_e = current.groupby(entity_codes).transform("mean")
        current = current - step_e
        step_t = current.groupby(period_codes).transform("mean")
        current = current - step_t
        sweeps += 1
        change = max(float((step_e.abs().max().to_numpy() / scale).max()),
                     float((step_t.abs().max().to_numpy() / scale).max()))
        if change < tol:
            break
    return current.to_numpy(), sweeps, change


def _twoway_naive(spec: Spec) -> tuple[Any, dict]:
    values, ent, per = _block(spec)

    def run():
        block, sweeps, change = naive_twoway(values, ent, per, TWOWAY_TOL)
        rows = spec.probe(len(block))
        return {"sweeps": sweeps, "last_change": change, "converged": change < TWOWAY_TOL,
                "probe_twoway": block[rows].tolist(), "rows": len(block)}

    return run, {}


def _within_ours(spec: Spec) -> tuple[Any, dict]:
    from panelprep import transforms

    values, ent, _ = _block(spec)
    counts = np.bincount(ent)

    def run():
        block = transforms.within(values, ent, counts)
        return {"rows": len(block)}

    return run, {}


def _errors_ours(spec: Spec) -> tuple[Any, dict]:
    from panelprep.evidence import error_structure

    # the factorised years stand in for the period grid: a year no entity has would join
    # its neighbours, which would change the statistics, not the cost measured here
    values, ent, per = _block(spec)
    counts = np.bincount(ent)

    def run():
        out = error_structure(values[:, 0], values[:, 1:], ent, counts, per)
        return {key: out[key]["statistic"] for key in out} | {"rows": len(ent)}

    return run, {}


def _revised_copy(spec: Spec) -> Path:
    """A later vintage of the data, written before the clock starts: 1 % of y restated, 1 % of rows gone."""
    import pyarrow.parquet as pq

    frame = pq.read_table(spec.data, columns=spec.columns).to_pandas()
    rng = np.random.default_rng(spec.probe_seed)
    restated = rng.random(len(frame)) < 0.01
    frame.loc[restated, spec.y] = frame.loc[restated, spec.y] + 1.0
    frame = frame[rng.random(len(frame)) >= 0.01]
    path = spec.out / "revised.parquet"
    frame.to_parquet(path, index=False, compression=PARQUET_COMPRESSION)
    return path


def _compare_floor(spec: Spec) -> tuple[Any, dict]:
    import pyarrow.parquet as pq

    revised = _revised_copy(spec)

    def run():
        rows = [pq.read_table(p, columns=spec.columns).to_pandas().shape[0]
                for p in (spec.data, revised)]
        return {"rows": rows}

    return run, {}


def _compare(spec: Spec) -> tuple[Any, dict]:
    from panelprep.compare import compare_files

    revised = _revised_copy(spec)

    def run():
        result = compare_files(spec.data, revised, ENTITY, TIME, spec.variables)
        rows = result.to_dict()["rows"]
        return {"removed": rows["removed"], "changed_cells": result.n_changed,
                "verdict": result.verdict}

    return run, {}


SETUP = {
    "floor": _floor, "naive": _naive, "ours_api": _ours_api, "ours_cli": _ours_cli,
    "naive_compute": _naive_compute, "ours_compute": _ours_compute, "audit": _audit,
    "twoway_ours": _twoway_ours, "twoway_naive": _twoway_naive, "within_ours": _within_ours,
    "errors_ours": _errors_ours,
    "compare_floor": _compare_floor, "compare": _compare,
}


def code_version() -> dict[str, Any]:
    """The commit of the tree being measured and whether panelprep/ differs from it."""
    root = Path(__file__).resolve().parents[1]

    def git(*argv: str) -> str | None:
        try:
            done = subprocess.run(["git", "-C", str(root), *argv], capture_output=True,
                                  text=True, check=False, timeout=30)
        except (OSError, subprocess.TimeoutExpired):
            return None
        return done.stdout.strip() if done.returncode == 0 else None

    status = git("status", "--porcelain", "--", "panelprep")
    return {"commit": git("rev-parse", "--short", "HEAD"),
            "panelprep_modified": None if status is None else bool(status)}


def child_main(case: str, raw_spec: str) -> None:
    """Run one case once in this fresh process and print one JSON line."""
    spec = Spec(json.loads(raw_spec))
    spec.out.mkdir(parents=True, exist_ok=True)
    version = code_version()
    run, flags = SETUP[case](spec)
    baseline = _status_kib("VmRSS")
    load = os.getloadavg()[0]
    cpu_began = os.times()
    began = time.perf_counter()
    info = run()
    seconds = time.perf_counter() - began
    cpu_ended = os.times()
    if flags.get("peak_from_children"):
        cpu = (cpu_ended.children_user - cpu_began.children_user
               + cpu_ended.children_system - cpu_began.children_system)
    else:
        cpu = cpu_ended.user - cpu_began.user + cpu_ended.system - cpu_began.system
    if flags.get("peak_from_children"):
        import resource

        peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
        baseline = 0
    else:
        peak = _status_kib("VmHWM")
    # a run that reset the high-water mark per step reports its steps' peaks
    peak = max(peak, int(info.pop("steps_peak_kib", 0) or 0))
    print("RESULT " + json.dumps({"seconds": seconds, "cpu_seconds": cpu, "peak_kib": peak,
                                  "baseline_kib": baseline, "load_1min": load, "code": version,
                                  "info": info}))


# -------------------------------------------------------------------- parent


def run_case(case: str, spec: dict[str, Any], reps: int) -> dict[str, Any]:
    seconds, cpu, loads, peaks, baselines, infos, codes = [], [], [], [], [], [], []
    for rep in range(reps):
        out = Path(spec["out"]) / f"{case}-{rep}"
        if out.exists():
            shutil.rmtree(out)
        raw = json.dumps({**spec, "out": str(out)})
        done = subprocess.run([sys.executable, __file__, "--child", case, "--spec", raw],
                              capture_output=True, text=True, check=False)
        shutil.rmtree(out, ignore_errors=True)
        line = next((ln for ln in done.stdout.splitlines() if ln.startswith("RESULT ")), None)
        if done.returncode != 0 or line is None:
            raise SystemExit(f"case {case} failed (exit {done.returncode}):\n{done.stderr[-4000:]}")
        result = json.loads(line[len("RESULT "):])
        seconds.append(result["seconds"])
        cpu.append(result["cpu_seconds"])
        loads.append(result["load_1min"])
        peaks.append(result["peak_kib"] / 1024)
        baselines.append(result["baseline_kib"] / 1024)
        infos.append(result["info"])
        codes.append(result["code"])
    return {
        "description": CASES[case],
        "seconds": seconds,
        "median_seconds": statistics.median(seconds),
        "cpu_seconds": cpu,
        "median_cpu_seconds": statistics.median(cpu),
        "load_1min_at_start": loads,
        "peak_rss_mib": max(peaks),
        "peak_rss_mib_each": peaks,
        "rss_before_timing_mib": max(baselines),
        "info": infos[-1],
        "code": codes,
    }


def _probe_difference(a: dict, b: dict, key: str) -> float | None:
    if key not in a or key not in b:
        return None
    left, right = np.asarray(a[key], dtype=float), np.asarray(b[key], dtype=float)
    if left.shape != right.shape:
        return None
    scale = np.maximum(np.abs(right), 1.0)
    return float(np.max(np.abs(left - right) / scale))


def run_size(args: argparse.Namespace, workdir: Path, rows: int, entities: int,
             cases: list[str]) -> dict[str, Any]:
    import pyarrow.parquet as pq

    path = data_path(workdir, args, rows, entities)
    generation = ensure_data(path, args, rows, entities)
    y_name, x_names = variable_names(args.vars)
    spec = {"data": str(path), "out": str(workdir / "out"), "y": y_name, "x": x_names,
            "dedupe": args.dup_share > 0, "probe_seed": args.seed + 1}
    meta = pq.ParquetFile(path).metadata
    results: dict[str, Any] = {}
    for case in cases:
        if not args.quiet:
            print(f"  {rows:,} rows: {case} x{args.reps}", file=sys.stderr, flush=True)
        results[case] = run_case(case, spec, args.reps)
        results[case]["rows_per_second"] = meta.num_rows / results[case]["median_seconds"]
    agree = agreement(results, y_name)
    for res in results.values():
        res["info"] = {k: v for k, v in res["info"].items() if not k.startswith("probe_")}
    return {
        "data": {"path": str(path), "file_mib": path.stat().st_size / 2**20,
                 "rows": meta.num_rows, "entities_requested": entities,
                 "generation_seconds_untimed": generation},
        "cases": results,
        "ratios": ratios(results),
        "agreement": agree,
    }


def _ratio(results: dict, top: str, bottom: str, key: str = "median_seconds") -> float | None:
    if top in results and bottom in results and results[bottom][key] > 0:
        return results[top][key] / results[bottom][key]
    return None


def ratios(results: dict) -> dict[str, float | None]:
    return {
        "ours_api/floor": _ratio(results, "ours_api", "floor"),
        "ours_cli/floor": _ratio(results, "ours_cli", "floor"),
        "naive/ours_api": _ratio(results, "naive", "ours_api"),
        "naive_compute/ours_compute": _ratio(results, "naive_compute", "ours_compute"),
        "twoway_naive/twoway_ours": _ratio(results, "twoway_naive", "twoway_ours"),
        "twoway_ours/within_ours": _ratio(results, "twoway_ours", "within_ours"),
        "peak ours_api/floor": _ratio(results, "ours_api", "floor", "peak_rss_mib"),
        "peak ours_cli/floor": _ratio(results, "ours_cli", "floor", "peak_rss_mib"),
        "compare/compare_floor": _ratio(results, "compare", "compare_floor"),
    }


def agreement(results: dict, y_name: str) -> dict[str, float | None]:
    """Largest relative difference between our outputs and the naive ones on probe rows."""
    info = {case: r["info"] for case, r in results.items()}
    out: dict[str, float | None] = {}
    if "ours_compute" in info and "naive_compute" in info:
        a, b = info["ours_compute"], info["naive_compute"]
        out["quasi_y"] = _probe_difference(a, b, "probe_quasi_y")
        out["theta"] = _probe_difference(a, b, "probe_theta")
        if a.get("sigma2_entity") is not None:
            out["sigma2_entity"] = abs(a["sigma2_entity"] - b["sigma2_entity"]) / max(
                abs(b["sigma2_entity"]), 1e-300)
            out["sigma2_idiosyncratic"] = abs(
                a["sigma2_idiosyncratic"] - b["sigma2_idiosyncratic"]) / max(
                abs(b["sigma2_idiosyncratic"]), 1e-300)
    if "twoway_ours" in info and "twoway_naive" in info:
        out["twoway"] = _probe_difference(info["twoway_ours"], info["twoway_naive"],
                                          "probe_twoway")
    return out


def targets(size: dict[str, Any], scaling: dict[str, Any] | None) -> list[dict[str, Any]]:
    r = size["ratios"]
    items = [
        ("prepare (API) within 1.5x the floor", r["ours_api/floor"], "<=", 1.5),
        ("prepare (CLI) within 1.5x the floor", r["ours_cli/floor"], "<=", 1.5),
        ("computation alone >= 3x faster than naive", r["naive_compute/ours_compute"], ">=", 3.0),
        ("two-way >= 10x faster than naive alternating projections",
         r["twoway_naive/twoway_ours"], ">=", 10.0),
        ("two-way within 3x our within time", r["twoway_ours/within_ours"], "<=", 3.0),
        ("peak RSS of prepare (API) <= 2x the floor's peak", r["peak ours_api/floor"], "<=", 2.0),
        ("peak RSS of prepare (CLI) <= 2x the floor's peak", r["peak ours_cli/floor"], "<=", 2.0),
        ("compare within 3x reading both vintages", r["compare/compare_floor"], "<=", 3.0),
    ]
    if scaling is not None:
        growth = scaling["growth"].get("ours_api")
        if growth is not None:
            items.append(("linear growth of prepare: time/row at largest <= 1.25x at smallest",
                          growth["time_per_row_ratio_largest_vs_smallest"], "<=", 1.25))
    out = []
    for name, value, op, bound in items:
        met = None if value is None else (value <= bound if op == "<=" else value >= bound)
        out.append({"target": name, "measured": value, "bound": f"{op} {bound:g}", "met": met})
    return out


def scaling_run(args: argparse.Namespace, workdir: Path, cases: list[str],
                main: dict[str, Any] | None) -> dict[str, Any]:
    rows_per_entity = args.rows / args.entities
    sizes = {}
    for rows in SCALING_ROWS:
        entities = max(1, round(rows / rows_per_entity))
        if (main is not None and rows == args.rows and entities == args.entities
                and all(case in main["cases"] for case in cases)):
            # the main run measured this size already: reuse it rather than run it again
            sizes[str(rows)] = {**main, "cases": {c: main["cases"][c] for c in cases},
                                "reused_from_main": True}
            continue
        sizes[str(rows)] = run_size(args, workdir, rows, entities, cases)
    growth = {}
    first, last = str(SCALING_ROWS[0]), str(SCALING_ROWS[-1])
    for case in cases:
        per_row = {size: res["cases"][case]["median_seconds"] / res["data"]["rows"]
                   for size, res in sizes.items()}
        logs = np.log([sizes[s]["data"]["rows"] for s in per_row])
        secs = np.log([sizes[s]["cases"][case]["median_seconds"] for s in per_row])
        slope = float(np.polyfit(logs, secs, 1)[0])
        growth[case] = {
            "seconds_per_million_rows": {s: v * 1e6 for s, v in per_row.items()},
            "time_per_row_ratio_largest_vs_smallest": per_row[last] / per_row[first],
            "log_log_slope": slope,
        }
    return {"rows_per_entity": rows_per_entity, "sizes": sizes, "growth": growth}


def machine() -> dict[str, Any]:
    import numpy
    import pandas
    import pyarrow

    cpu = platform.processor() or ""
    try:
        with open("/proc/cpuinfo") as handle:
            for line in handle:
                if line.startswith("model name"):
                    cpu = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    ram = None
    try:
        with open("/proc/meminfo") as handle:
            for line in handle:
                if line.startswith("MemTotal:"):
                    ram = int(line.split()[1]) / 2**20
                    break
    except OSError:
        pass
    try:
        import panelprep

        version = panelprep.__version__
    except ImportError:
        version = None
    return {
        "cpu_model": cpu, "cores": os.cpu_count(),
        "cores_usable": len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else None,
        "ram_gib": ram, "platform": platform.platform(),
        "python": platform.python_version(), "numpy": numpy.__version__,
        "pandas": pandas.__version__, "pyarrow": pyarrow.__version__,
        "panelprep": version,
    }


# -------------------------------------------------------------------- output


def _fmt(value: float | None, spec: str) -> str:
    return "-" if value is None else format(value, spec)


def table_lines(size: dict[str, Any]) -> list[str]:
    results, r = size["cases"], size["ratios"]
    vs_floor = {"ours_api": r["ours_api/floor"], "ours_cli": r["ours_cli/floor"]}
    naive_over = {"naive": r["naive/ours_api"], "naive_compute": r["naive_compute/ours_compute"],
                  "twoway_naive": r["twoway_naive/twoway_ours"]}
    head = (f"{'case':<14} {'seconds (median)':>16} {'cpu s':>8} {'rows/s':>12} "
            f"{'peak RSS MiB':>13} {'ours/floor':>10} {'naive/ours':>10}")
    lines = [head, "-" * len(head)]
    for case, res in results.items():
        lines.append(
            f"{case:<14} {res['median_seconds']:>16.3f} {res['median_cpu_seconds']:>8.2f} "
            f"{res['rows_per_second']:>12,.0f} "
            f"{res['peak_rss_mib']:>13,.0f} {_fmt(vs_floor.get(case), '.2f'):>10} "
            f"{_fmt(naive_over.get(case), '.2f'):>10}"
        )
    return lines


def print_report(document: dict[str, Any]) -> None:
    main = document["main"]
    cfg = document["config"]
    print(f"panel: {main['data']['rows']:,} rows, {cfg['entities']:,} entities requested, "
          f"{cfg['vars']} numeric variables, file {main['data']['file_mib']:.0f} MiB, "
          f"reps {cfg['reps']}")
    print("\n".join(table_lines(main)))
    print(f"two-way / within (ours): {_fmt(main['ratios']['twoway_ours/within_ours'], '.2f')}")
    if main["agreement"]:
        print("agreement with naive (max relative difference on probe rows): " + ", ".join(
            f"{k} {_fmt(v, '.1e')}" for k, v in main["agreement"].items()))
    if document.get("scaling"):
        print("\nscaling (seconds per million rows):")
        growth = document["scaling"]["growth"]
        sizes = list(document["scaling"]["sizes"])
        print(f"{'case':<14} " + " ".join(f"{int(s):>12,}" for s in sizes)
              + f" {'last/first':>10} {'slope':>6}")
        for case, g in growth.items():
            print(f"{case:<14} " + " ".join(
                f"{g['seconds_per_million_rows'][s]:>12.3f}" for s in sizes)
                + f" {g['time_per_row_ratio_largest_vs_smallest']:>10.2f}"
                + f" {g['log_log_slope']:>6.2f}")
    print("\ntargets:")
    for t in document["targets"]:
        mark = "n/a" if t["met"] is None else ("met" if t["met"] else "MISSED")
        print(f"  [{mark:>6}] {t['target']}: {_fmt(t['measured'], '.2f')} ({t['bound']})")


def parse_args(argv: list[str] | None = None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--rows", type=int, default=10_000_000)
    parser.add_argument("--entities", type=int, default=200_000)
    parser.add_argument("--vars", type=int, default=8,
                        help="numeric columns: the first is y, the rest are regressors")
    parser.add_argument("--gap-share", type=float, default=0.05,
                        help="share of non-first year slots of each entity left out")
    parser.add_argument("--dup-share", type=float, default=0.0,
                        help="share of rows repeated exactly; >0 runs with drop-exact")
    parser.add_argument("--missing-share", type=float, default=0.01,
                        help="share of rows with one variable missing")
    parser.add_argument("--seed", type=int, default=20240601)
    parser.add_argument("--reps", type=int, default=3)
    parser.add_argument("--cases", default=None,
                        help=f"comma-separated subset of {', '.join(CASES)}")
    parser.add_argument("--scaling", action="store_true",
                        help=f"also run {', '.join(f'{r:,}' for r in SCALING_ROWS)} rows "
                             "at the same rows per entity")
    parser.add_argument("--scaling-cases", default=",".join(SCALING_CASES))
    parser.add_argument("--skip-main", action="store_true",
                        help="with --scaling: only the scaling run")
    parser.add_argument("--workdir", default=None,
                        help="where data and outputs go (default: a temporary folder)")
    parser.add_argument("--regenerate", action="store_true",
                        help="write the panel again even if the same file exists")
    parser.add_argument("--json", default=None, help="write the results here")
    parser.add_argument("--quiet", action="store_true", help="no progress lines on stderr")
    parser.add_argument("--child", default=None, help=argparse.SUPPRESS)
    parser.add_argument("--spec", default=None, help=argparse.SUPPRESS)
    return parser.parse_args(argv)


def _case_list(text: str | None, default: list[str]) -> list[str]:
    if text is None:
        return default
    chosen = [c.strip() for c in text.split(",") if c.strip()]
    unknown = [c for c in chosen if c not in CASES]
    if unknown:
        raise SystemExit(f"unknown case(s) {unknown}; choose from {', '.join(CASES)}")
    return chosen


def main(argv: list[str] | None = None) -> int:
    args = parse_args(argv)
    if args.child:
        child_main(args.child, args.spec)
        return 0
    own = args.workdir is None
    workdir = Path(args.workdir or tempfile.mkdtemp(prefix="panelprep-bench-"))
    workdir.mkdir(parents=True, exist_ok=True)
    cases = _case_list(args.cases, list(CASES))
    document: dict[str, Any] = {
        "benchmark": "panelprep: speed and memory of the preparation flow",
        "date": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
        "machine": machine(),
        "config": {"rows": args.rows, "entities": args.entities, "vars": args.vars,
                   "gap_share": args.gap_share, "dup_share": args.dup_share,
                   "missing_share": args.missing_share, "seed": args.seed, "reps": args.reps,
                   "transforms": list(TRANSFORMS), "twoway_tol": TWOWAY_TOL,
                   "duplicates_policy": "drop-exact" if args.dup_share > 0 else "fail (default)",
                   "compression": PARQUET_COMPRESSION, "command": sys.argv},
    }
    try:
        if not args.skip_main:
            document["main"] = run_size(args, workdir, args.rows, args.entities, cases)
        scaling = None
        if args.scaling:
            scaling = scaling_run(args, workdir, _case_list(args.scaling_cases, []),
                                  document.get("main"))
            document["scaling"] = scaling
        if "main" not in document and scaling is not None:
            document["main"] = scaling["sizes"][str(SCALING_ROWS[-1])]
        document["targets"] = targets(document["main"], scaling)
    finally:
        if own:
            shutil.rmtree(workdir, ignore_errors=True)
    print_report(document)
    if args.json:
        Path(args.json).parent.mkdir(parents=True, exist_ok=True)
        Path(args.json).write_text(json.dumps(document, indent=2) + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
