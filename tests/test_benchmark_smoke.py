"""The benchmark script runs end to end at a tiny size and reports every case.

No timing is asserted: this only guards against the script rotting as the
package changes (a renamed option, a case that no longer runs).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

SCRIPT = Path(__file__).resolve().parents[1] / "benchmarks" / "run_benchmark.py"

EXPECTED_CASES = {
    "floor", "naive", "ours_api", "ours_cli", "naive_compute", "ours_compute", "audit",
    "twoway_ours", "twoway_naive", "within_ours", "errors_ours", "compare_floor", "compare",
}


def test_benchmark_runs_at_tiny_size(tmp_path: Path) -> None:
    out = tmp_path / "bench.json"
    done = subprocess.run(
        [sys.executable, str(SCRIPT), "--rows", "20000", "--entities", "400", "--vars", "4",
         "--dup-share", "0.01", "--reps", "1", "--workdir", str(tmp_path / "work"),
         "--json", str(out), "--quiet"],
        capture_output=True, text=True, timeout=300, check=False,
    )
    assert done.returncode == 0, done.stderr[-3000:]
    document = json.loads(out.read_text())
    cases = document["main"]["cases"]
    assert set(cases) == EXPECTED_CASES
    for name, case in cases.items():
        assert len(case["seconds"]) == 1, name
        assert case["peak_rss_mib"] > 0, name
    # prepare passed its gate (exact repeats dropped by policy) and wrote its five data files
    assert cases["ours_api"]["info"]["verdict"] == "pass"
    assert cases["ours_api"]["info"]["files_written"] == 5
    assert cases["ours_cli"]["info"]["files_written"] == 5
    # the naive computation is an outside check of the same quantities (pandas groupby
    # means and numpy least squares): theta and the quasi-demeaned response must agree
    agreement = document["main"]["agreement"]
    assert agreement["theta"] < 1e-8
    assert agreement["quasi_y"] < 1e-8
    assert agreement["twoway"] < 1e-6
    for key in ("cpu_model", "cores", "ram_gib", "python", "numpy", "pandas", "pyarrow"):
        assert key in document["machine"], key
    assert {t["target"] for t in document["targets"]}


def test_the_dask_engine_benchmark_runs_at_tiny_size(tmp_path: Path) -> None:
    script = SCRIPT.with_name("dask_engine.py")
    out = tmp_path / "dask.json"
    done = subprocess.run(
        [sys.executable, str(script), "--rows", "6000", "--entities", "300", "--vars", "3",
         "--files", "3", "--partitions", "2", "--worker-memory", "1GiB",
         "--workdir", str(tmp_path / "work"), "--json", str(out)],
        capture_output=True, text=True, timeout=600, check=False,
    )
    assert done.returncode == 0, done.stderr[-3000:]
    results = json.loads(out.read_text())["results"]
    assert [r["case"] for r in results] == ["local", "dask, 1 worker", "dask, 2 workers"]
    assert [r["exit_code"] for r in results] == [0, 0, 0], results
    assert all(r["rows"] == 6000 and r["driver_peak_mib"] > 0 for r in results)
    assert all(r["worker_peak_mib"] > 0 for r in results[1:])
