"""The dask engine against the local engine, on a real ``distributed.LocalCluster``.

Every comparison runs the same preparation twice, once in this process
(``engine.kind = local``) and once on a cluster of two worker processes
(``engine.kind = dask``), and asks for the same findings, counts, ledger,
steps and components, and data values equal to 1e-10 relative (each
column's largest magnitude sets the scale of a value near 0).  The local
engine is the reference here; it is itself checked against outside
sources elsewhere (statsmodels and plain pandas in tests/test_components.py,
tests/test_fixtures_manifest.py, tests/test_outputs.py).
"""

from __future__ import annotations

import json
import logging
import math
import os
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from panelprep.checks import CHECKS
from panelprep.config import RunFile
from panelprep.errors import InputError
from panelprep.partitioned import VARIATION_CHECKS
from panelprep.prepare import run_from_file
from panelprep.runlog import RunLog

FIXTURES = Path(__file__).parent.parent / "fixtures"
MANIFEST = json.loads((FIXTURES / "expected.json").read_text())["fixtures"]
RTOL = 1e-10
DATA_FILES = ("clean", "within", "between", "quasi", "dropped")


@pytest.fixture(scope="module")
def cluster():
    """Two single-threaded worker processes of 1 GiB each, for the whole module."""
    from distributed import LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, memory_limit="1GiB",
                      dashboard_address=":0", silence_logs=logging.ERROR) as running:
        yield running


def _run(data, out: Path, engine: str, cluster=None, partitions: int | None = None,
         **keys):
    given = {"input.path": data, "output.dir": out, "output.evidence": False,
             "engine.kind": engine, **keys}
    if engine == "dask":
        given["engine.cluster"] = cluster.scheduler_address
        given["engine.partitions"] = partitions
    return run_from_file(RunFile().merged(given))


def _close(a, b, where: str) -> None:
    """Equal structures; floats to RTOL, or within 1e-9 for values that are rounding noise
    (a denominator that is 0 in exact arithmetic; the fixtures' values are 1 to 1000)."""
    if isinstance(a, dict):
        assert isinstance(b, dict) and a.keys() == b.keys(), f"{where}: {a} != {b}"
        for key in a:
            _close(a[key], b[key], f"{where}.{key}")
    elif isinstance(a, list):
        assert isinstance(b, list) and len(a) == len(b), f"{where}: {a} != {b}"
        for i, (x, y) in enumerate(zip(a, b)):
            _close(x, y, f"{where}[{i}]")
    elif isinstance(a, float) and isinstance(b, float):
        assert math.isclose(a, b, rel_tol=RTOL, abs_tol=1e-9), f"{where}: {a} != {b}"
    else:
        assert a == b, f"{where}: {a!r} != {b!r}"


def _dataset(folder: Path) -> pd.DataFrame:
    # the parts of a dataset folder, read as one table (_common_metadata is skipped)
    return pq.read_table(folder).to_pandas()


def _same_data(local: pd.DataFrame, dask: pd.DataFrame, order: list[str], name: str) -> None:
    assert list(local.columns) == list(dask.columns), name
    assert len(local) == len(dask), name
    local = local.sort_values(order, kind="stable").reset_index(drop=True)
    dask = dask.sort_values(order, kind="stable").reset_index(drop=True)
    for column in local.columns:
        left, right = local[column], dask[column]
        if pd.api.types.is_float_dtype(left.dtype):
            scale = max(float(np.nanmax(np.abs(left.to_numpy()))) if len(left) else 0.0, 1e-300)
            np.testing.assert_allclose(right.to_numpy(), left.to_numpy(), rtol=RTOL,
                                       atol=RTOL * scale, err_msg=f"{name}.{column}")
        else:
            assert left.astype(str).tolist() == right.astype(str).tolist(), f"{name}.{column}"


def _compare(local_prep, dask_prep, entity: list[str], same_input: bool = True) -> None:
    a, b = local_prep.summary, dask_prep.summary
    assert a["verdict"] == b["verdict"]
    for key in ("findings", "gate", "panel", "keys", "samples", "steps", "dropped", "sample",
                "transforms", "cautions", "components", "variables"):
        assert (key in a) == (key in b), key
        if key in a:
            _close(a[key], b[key], key)
    # the same file read by both (or the same rows split into several files for the dask run)
    shared = ("path", "sha256", "rows", "format") if same_input else ("rows",)
    assert {k: a["input"][k] for k in shared} == {k: b["input"][k] for k in shared}
    if a["verdict"] == "fail":
        assert b["files"] == [] == a["files"]
        return
    local_files = {f["name"].split(".")[0]: f for f in a["files"]}
    dask_files = {f["name"]: f for f in b["files"]}
    assert local_files.keys() == dask_files.keys() == set(DATA_FILES)
    for name in DATA_FILES:
        assert local_files[name]["rows"] == dask_files[name]["rows"], name
        assert local_files[name]["columns"] == dask_files[name]["columns"], name
        local = pq.read_table(local_prep.written_to / f"{name}.parquet").to_pandas()
        dask = _dataset(dask_prep.written_to / name)
        order = entity if name == "between" else ["pp_row"]
        _same_data(local, dask, order, name)


def _fixture_keys(name: str) -> dict:
    spec = MANIFEST[name]
    y, *x = spec["variables"]
    keys = {"panel.entity": spec["entity"], "panel.time": spec["time"], "model.y": y,
            "model.x": x}
    if spec["delimiter"] != ",":
        keys["input.delimiter"] = spec["delimiter"]
    if spec["decimal"] == ",":
        keys["input.decimal_comma"] = True
    return keys


@pytest.mark.parametrize("name", sorted(MANIFEST))
def test_every_fixture_gives_the_local_engines_results(name, tmp_path, cluster):
    keys = _fixture_keys(name)
    local = _run(FIXTURES / name, tmp_path / "local", "local", **keys)
    dask = _run(FIXTURES / name, tmp_path / "dask", "dask", cluster, 3, **keys)
    _compare(local, dask, [keys["panel.entity"]])


def test_every_check_adds_up_across_partitions():
    # a check without a tally would be missing from the dask engine's findings
    untallied = [c.id for c in CHECKS if c.tally is None or c.finish is None]
    assert sorted(untallied) == sorted(VARIATION_CHECKS)


def _random_panel(seed: int, n_entities: int = 60, n_periods: int = 12) -> pd.DataFrame:
    """An unbalanced panel with holes, singletons, exact repeated rows and missing values."""
    rng = np.random.default_rng(seed)
    entity = np.repeat(np.arange(n_entities), n_periods)
    period = np.tile(np.arange(n_periods), n_entities)
    keep = rng.random(len(entity)) < 0.6
    keep[np.arange(n_entities) * n_periods] = True
    frame = pd.DataFrame({"firm": [f"F{e:03d}" for e in entity[keep]],
                          "year": 2000 + period[keep]})
    n = len(frame)
    effect = rng.normal(size=n_entities)[entity[keep]]
    frame["capital"] = rng.normal(size=n) * 50 + 1e6 + 20 * effect
    frame["staff"] = rng.normal(size=n) + period[keep] * 0.1
    frame["sales"] = 2 * frame["capital"] - 3 * frame["staff"] + effect + rng.normal(size=n)
    frame.loc[rng.random(n) < 0.05, "staff"] = np.nan
    frame.loc[rng.random(n) < 0.03, "sales"] = np.nan
    repeats = frame.sample(n=5, random_state=seed)
    # ids that differ only by case or spaces, and rows without an entity
    lookalike = frame[frame["firm"] == "F001"].assign(firm=" f001")
    unkeyed = frame.sample(n=3, random_state=seed + 2).assign(firm=None)
    singles = frame.sample(n=3, random_state=seed + 3).assign(firm=["S1", "S2", "S3"])
    frame = pd.concat([frame, repeats, lookalike, unkeyed, singles], ignore_index=True)
    return frame.sample(frac=1.0, random_state=seed + 1).reset_index(drop=True)


def _parquet_with_nan(frame: pd.DataFrame, path: Path, nan_rows: np.ndarray) -> Path:
    """``frame`` as Parquet with NaN stored (not null) in ``staff`` at ``nan_rows``."""
    staff = frame["staff"].to_numpy(copy=True)
    mask = np.isnan(staff)
    staff[nan_rows] = np.nan
    mask[nan_rows] = False
    table = pa.table({
        "firm": pa.array(frame["firm"].tolist(), pa.string()),
        "year": pa.array(frame["year"].to_numpy()),
        "capital": pa.array(frame["capital"].to_numpy()),
        "staff": pa.array(staff, mask=mask),
        "sales": pa.array(frame["sales"].to_numpy(), from_pandas=True),
    })
    pq.write_table(table, path)
    return path


KEYS = {"panel.entity": "firm", "panel.time": "year", "model.y": "sales",
        "model.x": ["capital", "staff"]}


@pytest.mark.parametrize("seed", [1, 2])
def test_random_unbalanced_panels_in_parquet_files_give_the_same_results(seed, tmp_path,
                                                                          cluster):
    frame = _random_panel(seed)
    nan_rows = np.random.default_rng(seed).choice(len(frame), 4, replace=False)
    single = _parquet_with_nan(frame, tmp_path / "panel.parquet", nan_rows)
    folder = tmp_path / "parts"
    folder.mkdir()
    # the same rows in four files, read in name order: the same row numbers
    for i, piece in enumerate(np.array_split(np.arange(len(frame)), 4)):
        part = frame.iloc[piece].reset_index(drop=True)
        _parquet_with_nan(part, folder / f"piece-{i}.parquet", np.flatnonzero(
            np.isin(piece, nan_rows)))
    # exact repeats and rows without a key fail the gate by default; keep them warnings so
    # the files are written
    keys = {**KEYS, "checks.severity": {"row-repeated": "warning", "key-missing": "warning"}}
    local = _run(single, tmp_path / "local", "local", **keys)
    assert local.verdict == "pass"
    found = {f["id"] for f in local.summary["findings"]}
    assert {"row-repeated", "key-missing", "entity-id-lookalike", "values-nan-missing",
            "values-missing", "period-holes", "entity-single-obs"} <= found
    dask = _run(folder, tmp_path / "dask", "dask", cluster, 5, **keys)
    _compare(local, dask, ["firm"], same_input=False)
    # one sha256 for the four files, not the single file's
    assert dask.summary["input"]["files"] == 4


def test_a_failed_gate_writes_the_same_diagnostics_and_leaves_out_alone(tmp_path, cluster):
    frame = _random_panel(3)
    csv_folder = tmp_path / "csv"
    csv_folder.mkdir()
    for i, piece in enumerate(np.array_split(np.arange(len(frame)), 3)):
        frame.iloc[piece].to_csv(csv_folder / f"part-{i}.csv", index=False)
    whole = tmp_path / "whole.csv"
    frame.to_csv(whole, index=False)
    local = _run(whole, tmp_path / "local", "local", **KEYS)
    dask = _run(str(csv_folder / "part-*.csv"), tmp_path / "dask", "dask", cluster, 4, **KEYS)
    assert local.verdict == dask.verdict == "fail"
    assert not (tmp_path / "dask").exists()
    assert (tmp_path / "dask.failed" / "diagnostics.json").exists()
    _compare(local, dask, ["firm"], same_input=False)


def test_hive_partitions_read_their_keys_from_the_folder_names(tmp_path, cluster):
    frame = _random_panel(4).dropna()
    frame = frame.drop_duplicates().reset_index(drop=True)
    local = _run(_parquet(frame, tmp_path / "whole.parquet"), tmp_path / "local", "local",
                 **KEYS)
    hive = tmp_path / "hive"
    # one folder per year, the rows of each in input order: the row numbers then follow
    # the folders' order, so the comparison is on the (firm, year) keys
    for year, rows in frame.groupby("year"):
        where = hive / f"year={year}"
        where.mkdir(parents=True)
        rows.drop(columns="year").to_parquet(where / "data.parquet", index=False)
    dask = _run(hive, tmp_path / "dask", "dask", cluster, 3, **KEYS)
    assert dask.summary["panel"] == local.summary["panel"]
    _close(local.summary["components"], dask.summary["components"], "components")
    within = _dataset(dask.written_to / "within")
    assert len(within) == local.summary["transforms"]["within"]["rows"]


def _parquet(frame: pd.DataFrame, path: Path) -> Path:
    frame.to_parquet(path, index=False)
    return path


def test_every_part_and_the_common_metadata_carry_the_provenance(tmp_path, cluster):
    frame = _random_panel(5).dropna().drop_duplicates()
    data = _parquet(frame, tmp_path / "panel.parquet")
    dask = _run(data, tmp_path / "out", "dask", cluster, 3, **KEYS)
    for name in DATA_FILES:
        folder = dask.written_to / name
        parts = sorted(folder.glob("part-*.parquet"))
        assert parts and [p.name for p in parts] == [
            f"part-{i:05d}.parquet" for i in range(len(parts))]
        common = pq.read_schema(folder / "_common_metadata").metadata[b"panelprep"]
        for part in parts:
            assert pq.read_schema(part).metadata[b"panelprep"] == common
        provenance = json.loads(common)
        assert provenance["file"] == name
        if name in ("clean", "within", "quasi"):
            # each part holds whole entities, sorted by entity and period
            for part in parts:
                rows = pq.read_table(part, columns=["firm", "year"]).to_pandas()
                assert rows.equals(rows.sort_values(["firm", "year"], kind="stable")), part
            firms = [set(pq.read_table(p, columns=["firm"]).column(0).to_pylist())
                     for p in parts]
            assert sum(len(f) for f in firms) == len(set().union(*firms))
        assert provenance["options"]["engine.kind"] == "dask"
        assert "engine.cluster" not in provenance["options"]
    assert not list(tmp_path.glob(".panelprep-partial-*"))


def test_unsupported_options_are_refused_with_one_line(tmp_path, cluster):
    frame = _random_panel(6)
    data = _parquet(frame, tmp_path / "panel.parquet")
    for extra, named in [({"clean.singletons": "drop"}, "--singletons drop"),
                         ({"output.transforms": ["within", "twoway"]}, "--transform twoway"),
                         ({"output.method": "amemiya"}, "--method amemiya"),
                         ({"output.evidence": True}, "--no-evidence")]:
        keys = {**KEYS, **extra}
        given = {"input.path": data, "output.dir": tmp_path / "out", "output.evidence": False,
                 "engine.kind": "dask", "engine.cluster": cluster.scheduler_address, **keys}
        with pytest.raises(InputError, match=named):
            run_from_file(RunFile().merged(given))
    assert not (tmp_path / "out").exists()


def test_the_command_without_dask_installed_says_how_to_install_it(tmp_path):
    data = _parquet(_random_panel(7), tmp_path / "panel.parquet")
    # the dask packages made unimportable in the child, as in a base install
    script = (
        "import sys\n"
        "class Block:\n"
        "    def find_spec(self, name, path=None, target=None):\n"
        "        if name.split('.')[0] in ('dask', 'distributed'):\n"
        "            raise ImportError(f'No module named {name!r}', name=name)\n"
        "sys.meta_path.insert(0, Block())\n"
        "from panelprep.cli import main\n"
        "sys.argv = ['panelprep', *sys.argv[1:]]\n"
        "main()\n")
    done = subprocess.run(
        [sys.executable, "-c", script, "prepare", str(data), "-e", "firm", "-t", "year",
         "--y", "sales", "--x", "capital,staff", "-o", str(tmp_path / "out"),
         "--no-evidence", "--engine", "dask"],
        capture_output=True, text=True, timeout=120, check=False)
    assert done.returncode == 2, done.stderr
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1
    assert "pip install 'panelprep[dask]'" in lines[0]
    assert not (tmp_path / "out").exists()


def test_the_base_install_imports_no_dask():
    script = ("import sys, panelprep.cli, panelprep.prepare, panelprep.engine; "
              "print(sorted(m for m in sys.modules if m.split('.')[0] in ('dask', 'distributed')))")
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                          timeout=120, check=True)
    assert done.stdout.strip() == "[]", done.stdout


def test_every_part_of_a_dataset_has_one_schema(tmp_path, cluster):
    frame = _random_panel(8).dropna().drop_duplicates()
    data = _parquet(frame, tmp_path / "panel.parquet")
    dask = _run(data, tmp_path / "out", "dask", cluster, 4, **KEYS)
    for name in DATA_FILES:
        schemas = {pq.read_schema(p).remove_metadata().to_string()
                   for p in (dask.written_to / name).glob("part-*.parquet")}
        assert len(schemas) == 1, name
        assert isinstance(pq.read_table(dask.written_to / name), pa.Table)


class _KillingLog(RunLog):
    """A run log that kills one worker process (SIGKILL) when the run reaches ``step``."""

    def __init__(self, cluster, step: str) -> None:
        super().__init__()
        self.cluster, self.step, self.killed = cluster, step, False

    def __call__(self, step: str, what: str, rows: int | None = None) -> None:
        super().__call__(step, what, rows)
        if step == self.step and not self.killed:
            from distributed import Client

            with Client(self.cluster.scheduler_address) as client:
                pids = client.run(os.getpid)
            os.kill(min(pids.values()), signal.SIGKILL)
            self.killed = True


@pytest.mark.parametrize("step", ["moments", "write"])
def test_a_worker_killed_mid_run_still_ends_in_a_complete_folder(step, tmp_path):
    from distributed import LocalCluster

    frame = _random_panel(9).dropna().drop_duplicates()
    data = _parquet(frame, tmp_path / "panel.parquet")
    local = _run(data, tmp_path / "local", "local", **KEYS)
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, memory_limit="1GiB",
                      dashboard_address=":0", silence_logs=logging.CRITICAL) as own:
        log = _KillingLog(own, step)
        given = {"input.path": data, "output.dir": tmp_path / "dask", "output.evidence": False,
                 "engine.kind": "dask", "engine.cluster": own.scheduler_address,
                 "engine.partitions": 6, **KEYS}
        # the scheduler runs the dead worker's tasks again elsewhere (its results too)
        dask = run_from_file(RunFile().merged(given), progress=log)
    assert log.killed
    _compare(local, dask, ["firm"])
    assert not list(tmp_path.glob(".panelprep-partial-*"))


def _command(args: list[str], env_progress: str | None = None) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k != "PANELPREP_PROGRESS"}
    if env_progress is not None:
        env["PANELPREP_PROGRESS"] = env_progress
    # the installed command, as a scheduler runs it
    command = str(Path(sys.executable).with_name("panelprep"))
    return subprocess.run([command, *args], capture_output=True, text=True, timeout=300,
                          check=False, env=env)


def test_the_command_shows_stages_and_partitions_on_stderr_and_nothing_with_quiet(
        tmp_path, cluster):
    frame = _random_panel(10).dropna().drop_duplicates()
    folder = tmp_path / "in"
    folder.mkdir()
    for i, piece in enumerate(np.array_split(np.arange(len(frame)), 2)):
        frame.iloc[piece].to_parquet(folder / f"p{i}.parquet", index=False)
    base = [str(folder), "-e", "firm", "-t", "year", "--y", "sales", "--x", "capital,staff",
            "--no-evidence", "--engine", "dask", "--cluster", cluster.scheduler_address,
            "--partitions", "4"]
    shown = _command(["prepare", *base, "-o", str(tmp_path / "a"), "--progress", "plain"])
    assert shown.returncode == 0, shown.stderr
    steps = [line.split()[3].rstrip(":") for line in shown.stderr.splitlines()]
    for step in ("read", "grid", "shuffle", "audit", "scaling", "moments", "components",
                 "designs", "write"):
        assert step in steps, shown.stderr
    assert "of 4 partitions done" in shown.stderr
    assert "written to" in shown.stdout
    quiet = _command(["prepare", *base, "-o", str(tmp_path / "b"), "--quiet"])
    assert quiet.returncode == 0, quiet.stderr
    assert quiet.stderr == ""
    assert (tmp_path / "b" / "within" / "_common_metadata").exists()


def test_decimals_float64_does_not_hold_give_the_same_finding(tmp_path, cluster):
    from decimal import Decimal

    frame = _random_panel(11).dropna().drop_duplicates().reset_index(drop=True)
    # decimals float64 does not hold exactly, in two of the files (values-decimal-rounded)
    capital = [Decimal(f"{v:.2f}") for v in frame["capital"]]
    capital[3] = capital[len(capital) - 2] = Decimal("99999999999999.99")
    table = pa.Table.from_pandas(frame.drop(columns="capital"), preserve_index=False)
    table = table.append_column("capital", pa.array(capital, pa.decimal128(16, 2)))
    whole = tmp_path / "decimals.parquet"
    pq.write_table(table, whole)
    folder = tmp_path / "parts"
    folder.mkdir()
    for i, rows in enumerate(np.array_split(np.arange(table.num_rows), 3)):
        pq.write_table(table.take(rows), folder / f"part-{i}.parquet")
    local = _run(whole, tmp_path / "local", "local", **KEYS)
    assert "values-decimal-rounded" in {f["id"] for f in local.summary["findings"]}
    dask = _run(folder, tmp_path / "dask", "dask", cluster, 3, **KEYS)
    _compare(local, dask, ["firm"], same_input=False)


def test_a_time_value_off_every_grid_is_one_line_without_a_misleading_row(tmp_path, cluster):
    frame = _random_panel(12).dropna().drop_duplicates().reset_index(drop=True)
    frame["year"] = frame["year"].astype(str) + "Q1"
    frame.loc[7, "year"] = "2003Q5"
    data = _parquet(frame, tmp_path / "quarters.parquet")
    with pytest.raises(InputError, match="2003Q5") as raised:
        _run(data, tmp_path / "dask", "dask", cluster, 2, **KEYS)
    assert " at row " not in str(raised.value)
    assert not (tmp_path / "dask").exists()


def _files_of(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in folder.rglob("*") if p.is_file()}


def test_a_task_the_scheduler_gives_up_is_one_line_and_the_previous_folder_stays(tmp_path):
    """A task whose worker dies while running it more often than the scheduler allows
    (here: at once, ``allowed-failures`` 0) ends the run in one line naming the cluster;
    the folder of the previous run is left byte for byte as it was."""
    import dask
    from distributed import Client, LocalCluster
    from distributed.diagnostics.plugin import WorkerPlugin

    class DieOnMoments(WorkerPlugin):
        """Ends the worker's process as soon as it starts a partition's moments task."""

        def transition(self, key, start, finish, **kwargs):
            if finish == "executing" and "moments_part" in str(key):
                os._exit(1)

    frame = _random_panel(4).dropna().drop_duplicates()
    data = _parquet(frame, tmp_path / "panel.parquet")
    out = tmp_path / "out"
    _run(data, out, "local", **KEYS)
    before = _files_of(out)
    with dask.config.set({"distributed.scheduler.allowed-failures": 0}), \
            LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                         memory_limit="1GiB", dashboard_address=":0",
                         silence_logs=logging.CRITICAL) as own:
        with Client(own.scheduler_address) as client:
            client.register_plugin(DieOnMoments(), name="die-on-moments")
        given = {"input.path": data, "output.dir": out, "output.evidence": False,
                 "output.force": True, "engine.kind": "dask",
                 "engine.cluster": own.scheduler_address, "engine.partitions": 4, **KEYS}
        with pytest.raises(InputError) as failed:
            run_from_file(RunFile().merged(given))
    message = str(failed.value)
    assert "\n" not in message
    assert message.startswith("the dask cluster failed (KilledWorker")
    assert message.endswith(f"{out} was left as it was")
    assert _files_of(out) == before
    assert not list(tmp_path.glob(".panelprep-partial-*"))
    assert not (tmp_path / "out.failed").exists()


def _longest_array(value, seen: set[int] | None = None) -> int:
    """The length of the longest array anywhere in ``value`` (dicts, lists, tuples,
    dataclass-like objects' attributes, pandas objects)."""
    seen = set() if seen is None else seen
    if id(value) in seen:
        return 0
    seen.add(id(value))
    if isinstance(value, np.ndarray):
        return len(value) if value.ndim else 0
    if isinstance(value, (pd.DataFrame, pd.Series, pd.Index)):
        return len(value)
    if isinstance(value, dict):
        return max((_longest_array(v, seen) for v in value.values()), default=0)
    if isinstance(value, (list, tuple, set)):
        return max((_longest_array(v, seen) for v in value), default=0)
    if hasattr(value, "__dict__"):
        return _longest_array(vars(value), seen)
    return 0


def test_no_pass_hands_the_driver_an_array_as_long_as_the_rows(tmp_path, cluster,
                                                                monkeypatch):
    """What the driver gathers from the partitions is per entity or smaller (counts,
    means, factors, tallies), never row-long: 40 entities, 50 periods, 2 partitions
    of about 1,000 rows each, and nothing the driver receives longer than 100."""
    from panelprep import partitioned

    rng = np.random.default_rng(5)
    entity = np.repeat(np.arange(40), 50)
    frame = pd.DataFrame({"firm": [f"F{e:02d}" for e in entity],
                          "year": 1950 + np.tile(np.arange(50), 40)})
    frame["capital"] = rng.normal(size=len(frame)) + entity
    frame["staff"] = rng.normal(size=len(frame))
    frame["sales"] = frame["capital"] - frame["staff"] + rng.normal(size=len(frame))
    data = _parquet(frame, tmp_path / "panel.parquet")
    received: dict[str, int] = {}
    run_pass = partitioned._run_pass

    def measured(client, progress, step, what, task, states, *constants):
        results = run_pass(client, progress, step, what, task, states, *constants)
        received[step] = _longest_array(results)
        return results

    monkeypatch.setattr(partitioned, "_run_pass", measured)
    _run(data, tmp_path / "dask", "dask", cluster, partitions=2, **KEYS)
    assert {"audit", "moments", "designs", "write"} <= set(received)
    assert max(received.values()) <= 100, received
