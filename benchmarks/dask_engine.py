"""The dask engine against the local engine: seconds, rows per second and peak memory.

Generates the synthetic panel of ``run_benchmark.py`` (without repeated rows,
so the gate passes), writes it as one Parquet file and as a folder of Parquet
files, then prepares it (within, between, quasi; ``--no-evidence``, which the
dask engine needs) with the installed ``panelprep prepare`` command, each case
in a process of its own:

- ``local``: the local engine on the single file.  On a panel larger than the
  machine's memory the memory guard refuses it (exit 2); the table then says
  so and shows the guard's line.
- ``dask1``, ``dask2``: the dask engine on the folder, against a fresh
  ``distributed.LocalCluster`` of 1 or 2 worker processes with
  ``--worker-memory`` each (dask spills to disk above 60 % of it).

Peaks are resident high-water marks: the command's own (the largest of its
steps' peaks, from its diagnostics.json; for the dask engine, the driver) and
the largest worker's (``VmHWM`` of each worker process read after the run,
or the largest resident size sampled each second while it ran, if larger).
The workers' bytes held on disk by spilling are sampled each second too; the
table shows the largest sum seen.

    python benchmarks/dask_engine.py --rows 1000000 --entities 20000 --workdir /tmp/dbench
    python benchmarks/dask_engine.py --rows 60000000 --entities 1200000 --vars 8 \\
        --cases local,dask2 --worker-memory 6GiB --workdir /var/tmp/dbench-60m
"""

from __future__ import annotations

import argparse
import json
import logging
import os
import platform
import shutil
import subprocess
import sys
import threading
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from run_benchmark import generate_panel, variable_names

CASES = ("local", "dask1", "dask2")


def _status_mib(field: str) -> float:
    """``VmHWM`` (resident high-water mark) or ``VmRSS`` of this process, in MiB.

    Not ``getrusage``: its ``ru_maxrss`` keeps the high-water mark of the
    process image before ``exec``, so a worker started from this script's
    process would show the peak of the panel's generation.
    """
    with open("/proc/self/status") as handle:
        for line in handle:
            if line.startswith(field + ":"):
                return int(line.split()[1]) / 1024
    return 0.0


def _peak_mib() -> float:
    return _status_mib("VmHWM")


def _worker_now(dask_worker) -> tuple[float, int]:
    """This worker's resident MiB now and the bytes it holds on disk, spilled."""
    spilled = getattr(dask_worker.data, "spilled_total", None)
    return _status_mib("VmRSS"), 0 if spilled is None else int(spilled.disk)


def _command(args: argparse.Namespace, data: Path, out: Path, extra: list[str]) -> list[str]:
    y, x = variable_names(args.vars)
    panelprep = Path(sys.executable).with_name("panelprep")
    return [str(panelprep), "prepare", str(data), "--entity", "firm_id", "--time", "year",
            "--y", y, "--x", ",".join(x), "--out", str(out), "--force", "--no-evidence",
            "--quiet", *extra]


def _finish(case: str, done: subprocess.CompletedProcess, seconds: float, out: Path,
            rows: int) -> dict:
    result = {"case": case, "exit_code": done.returncode, "seconds": seconds, "rows": rows,
              "driver_peak_mib": None, "worker_peak_mib": None, "spilled_peak_mib": None}
    if done.returncode != 0:
        result["stderr"] = done.stderr.strip().splitlines()[-1:] if done.stderr else []
        return result
    summary = json.loads((out / "diagnostics.json").read_text())
    result["rows"] = summary["input"]["rows"]
    result["driver_peak_mib"] = max(
        s.get("peak_rss_bytes") or 0 for s in summary["run"]["steps"]) / 2**20
    return result


def _local(args: argparse.Namespace, work: Path, rows: int) -> dict:
    out = work / "out-local"
    started = time.perf_counter()
    done = subprocess.run(_command(args, work / "whole.parquet", out, []), capture_output=True,
                          text=True, check=False)
    return _finish("local", done, time.perf_counter() - started, out, rows)


def _dask(args: argparse.Namespace, work: Path, rows: int, workers: int) -> dict:
    from distributed import Client, LocalCluster

    out = work / f"out-dask{workers}"
    spill = work / "spill"
    with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                      memory_limit=args.worker_memory, dashboard_address=":0",
                      local_directory=str(spill), silence_logs=logging.ERROR) as cluster, \
            Client(cluster.scheduler_address) as client:
        extra = ["--engine", "dask", "--cluster", cluster.scheduler_address]
        if args.partitions:
            extra += ["--partitions", str(args.partitions)]
        seen = {"spilled": 0, "resident": 0.0}
        running = threading.Event()
        running.set()

        def sample() -> None:
            # each second: the workers' spilled bytes and resident memory (a worker the
            # nanny restarts takes its own high-water mark with it; these samples do not)
            while running.is_set():
                try:
                    now = client.run(_worker_now).values()
                except (OSError, TimeoutError):  # a worker restarting: the next sample will do
                    now = []
                seen["spilled"] = max(seen["spilled"], sum(disk for _, disk in now))
                seen["resident"] = max([seen["resident"], *(rss for rss, _ in now)])
                time.sleep(1.0)

        sampler = threading.Thread(target=sample, daemon=True)
        sampler.start()
        started = time.perf_counter()
        done = subprocess.run(_command(args, work / "files", out, extra), capture_output=True,
                              text=True, check=False)
        seconds = time.perf_counter() - started
        running.clear()
        sampler.join()
        peaks = client.run(_peak_mib)
    result = _finish(f"dask, {workers} worker{'s' if workers > 1 else ''}", done, seconds, out,
                     rows)
    result["worker_peak_mib"] = max([*peaks.values(), seen["resident"]])
    result["spilled_peak_mib"] = seen["spilled"] / 2**20
    return result


def _generate(args: argparse.Namespace, work: Path) -> int:
    import numpy as np
    import pyarrow.parquet as pq

    if work.exists():
        shutil.rmtree(work)
    folder = work / "files"
    folder.mkdir(parents=True)
    table = generate_panel(args.rows, args.entities, args.vars, gap_share=0.05, dup_share=0.0,
                           missing_share=0.01, seed=1)
    pq.write_table(table, work / "whole.parquet")
    for i, rows in enumerate(np.array_split(np.arange(table.num_rows), args.files)):
        pq.write_table(table.take(rows), folder / f"part-{i:03d}.parquet")
    return table.num_rows


def _machine() -> dict:
    memory = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    return {"cores": os.cpu_count(), "ram_gib": round(memory / 2**30, 1),
            "python": platform.python_version(), "platform": platform.platform()}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--entities", type=int, default=20_000)
    parser.add_argument("--vars", type=int, default=4)
    parser.add_argument("--files", type=int, default=8, help="Parquet files of the input")
    parser.add_argument("--partitions", type=int, default=None)
    parser.add_argument("--worker-memory", default="4GiB")
    parser.add_argument("--cases", default=",".join(CASES),
                        help=f"comma-separated, of {', '.join(CASES)}")
    parser.add_argument("--reuse", action="store_true",
                        help="keep the input already in --workdir (same arguments)")
    parser.add_argument("--workdir", type=Path, required=True)
    parser.add_argument("--json", type=Path, default=None)
    args = parser.parse_args()
    cases = [c.strip() for c in args.cases.split(",") if c.strip()]
    if unknown := sorted(set(cases) - set(CASES)):
        parser.error(f"--cases: unknown {', '.join(unknown)}")

    work = args.workdir
    if args.reuse and (work / "whole.parquet").exists():
        import pyarrow.parquet as pq
        rows = pq.ParquetFile(work / "whole.parquet").metadata.num_rows
    else:
        rows = _generate(args, work)
    results = []
    for case in cases:
        result = _local(args, work, rows) if case == "local" else \
            _dask(args, work, rows, int(case[-1]))
        results.append(result)
        print(f"# {case}: exit {result['exit_code']} in {result['seconds']:.1f} s",
              file=sys.stderr, flush=True)
        shutil.rmtree(work / "spill", ignore_errors=True)
        for out in work.glob("out-*"):
            # the run's diagnostics (its steps' times and peaks) outlive its data files
            if (out / "diagnostics.json").exists():
                shutil.copy(out / "diagnostics.json", work / f"diagnostics-{case}.json")
            shutil.rmtree(out, ignore_errors=True)

    def mib(value: float | None) -> str:
        return "" if value is None else f"{value:,.0f}"

    print(f"{'case':<18} {'exit':>4} {'seconds':>9} {'rows / s':>12} {'driver peak MiB':>16} "
          f"{'worker peak MiB':>16} {'spilled MiB':>12}")
    for r in results:
        rate = f"{r['rows'] / r['seconds']:,.0f}" if r["exit_code"] == 0 else ""
        print(f"{r['case']:<18} {r['exit_code']:>4} {r['seconds']:>9.2f} {rate:>12} "
              f"{mib(r['driver_peak_mib']):>16} {mib(r['worker_peak_mib']):>16} "
              f"{mib(r['spilled_peak_mib']):>12}")
        for line in r.get("stderr", []):
            print(f"    {line}")
    if args.json is not None:
        args.json.write_text(json.dumps({"args": {k: str(v) for k, v in vars(args).items()},
                                         "machine": _machine(), "results": results}, indent=2))


if __name__ == "__main__":
    main()
