"""The dask engine against the local engine: seconds, rows per second and peak memory.

Generates the synthetic panel of ``run_benchmark.py`` (without repeated rows,
so the gate passes), writes it as Parquet files, then prepares it (within,
between, quasi; ``--no-evidence``, which the dask engine needs) with the
local engine and with the dask engine on a fresh ``distributed.LocalCluster``
of 1 and of 2 worker processes.  Prints one table; ``--json`` keeps it.
Peak memory is a resident high-water mark: the run's steps in this process
(the local engine; the dask engine's driver) and the largest worker's.

    python benchmarks/dask_engine.py --rows 1000000 --entities 20000 --workdir /tmp/dbench
"""

from __future__ import annotations

import argparse
import json
import logging
import resource
import shutil
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from run_benchmark import generate_panel, variable_names


def _peak_mib() -> float:
    """This process's resident high-water mark (a fresh worker's is its run's)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _run_peak_mib(prep) -> float:
    """The run's own peak in this process: the largest of its steps' high-water marks
    (reset at each step), so the panel generated before it does not count."""
    return max(s.get("peak_rss_bytes") or 0 for s in prep.summary["run"]["steps"]) / 2**20


def _keys(args: argparse.Namespace, data: Path, out: Path) -> dict:
    y, x = variable_names(args.vars)
    return {"input.path": data, "output.dir": out, "panel.entity": "firm_id",
            "panel.time": "year", "model.y": y, "model.x": x, "output.evidence": False,
            "output.force": True}


def _local(args: argparse.Namespace, data: Path, work: Path) -> dict:
    from panelprep.config import RunFile
    from panelprep.prepare import run_from_file

    single = work / "whole.parquet"
    started = time.perf_counter()
    prep = run_from_file(RunFile().merged(_keys(args, single, work / "out-local")))
    seconds = time.perf_counter() - started
    return {"case": "local", "seconds": seconds, "rows": prep.summary["input"]["rows"],
            "driver_peak_mib": _run_peak_mib(prep), "worker_peak_mib": None}


def _dask(args: argparse.Namespace, data: Path, work: Path, workers: int) -> dict:
    from distributed import Client, LocalCluster

    from panelprep.config import RunFile
    from panelprep.prepare import run_from_file

    with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                      memory_limit=args.worker_memory, dashboard_address=":0",
                      silence_logs=logging.ERROR) as cluster:
        keys = {**_keys(args, data, work / f"out-dask{workers}"), "engine.kind": "dask",
                "engine.cluster": cluster.scheduler_address,
                "engine.partitions": args.partitions}
        started = time.perf_counter()
        prep = run_from_file(RunFile().merged(keys))
        seconds = time.perf_counter() - started
        with Client(cluster.scheduler_address) as client:
            peaks = client.run(_peak_mib)
    return {"case": f"dask, {workers} worker{'s' if workers > 1 else ''}", "seconds": seconds,
            "rows": prep.summary["input"]["rows"], "driver_peak_mib": _run_peak_mib(prep),
            "worker_peak_mib": max(peaks.values())}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--entities", type=int, default=20_000)
    parser.add_argument("--vars", type=int, default=4)
    parser.add_argument("--files", type=int, default=8, help="Parquet files of the input")
    parser.add_argument("--partitions", type=int, default=None)
    parser.add_argument("--worker-memory", default="4GiB")
    parser.add_argument("--workdir", type=Path, required=True)
    parser.add_argument("--json", type=Path, default=None)
    args = parser.parse_args()

    import numpy as np
    import pyarrow.parquet as pq

    work = args.workdir
    if work.exists():
        shutil.rmtree(work)
    folder = work / "files"
    folder.mkdir(parents=True)
    table = generate_panel(args.rows, args.entities, args.vars, gap_share=0.05, dup_share=0.0,
                           missing_share=0.01, seed=1)
    pq.write_table(table, work / "whole.parquet")
    for i, rows in enumerate(np.array_split(np.arange(table.num_rows), args.files)):
        pq.write_table(table.take(rows), folder / f"part-{i:03d}.parquet")
    del table
    results = [_local(args, folder, work), _dask(args, folder, work, 1),
               _dask(args, folder, work, 2)]
    print(f"{'case':<18} {'seconds':>9} {'rows / s':>12} {'driver peak MiB':>16} "
          f"{'worker peak MiB':>16}")
    for r in results:
        worker = "" if r["worker_peak_mib"] is None else f"{r['worker_peak_mib']:,.0f}"
        print(f"{r['case']:<18} {r['seconds']:>9.2f} {r['rows'] / r['seconds']:>12,.0f} "
              f"{r['driver_peak_mib']:>16,.0f} {worker:>16}")
    if args.json is not None:
        args.json.write_text(json.dumps({"args": {k: str(v) for k, v in vars(args).items()},
                                         "results": results}, indent=2))


if __name__ == "__main__":
    main()
