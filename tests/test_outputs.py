"""Output files are exactly what they claim, checked through real processes.

Three promises: the columns panelprep adds never share a name with another
column (a clash is exit 2 before anything is read in full, and the run file
renames ours); rows are numbered one way everywhere (data rows counted from
1, in finding examples, ``dropped`` and every row-level file); and OLS on the
regressor columns of any file is well defined, with each file's column roles
in its metadata and diagnostics.json.
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from panelprep.demo import write_demo_csv
from panelprep.names import DEFAULT_NAMES as N

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
DATA_FILES = ("clean", "within", "between", "quasi", "twoway", "dropped")


def _command() -> list[str]:
    beside = Path(sys.executable).with_name("panelprep")
    found = str(beside) if beside.exists() else shutil.which("panelprep")
    return [found] if found else [sys.executable, "-c", "from panelprep.cli import main; main()"]


COMMAND = _command()
ALL = ("--transform", "within,between,quasi,twoway")


@dataclass
class Run:
    returncode: int
    stdout: str
    stderr: str
    out: Path


def _panel(regressors: list[str]) -> pd.DataFrame:
    """Invented firms: 6 firms x 5 years, y and the named regressors, all varying within."""
    rng = np.random.default_rng(7)
    firms = np.repeat([f"F{i:02d}" for i in range(6)], 5)
    years = np.tile(np.arange(2010, 2015), 6)
    frame = pd.DataFrame({"firm_id": firms, "year": years})
    for name in ["sales", *regressors]:
        frame[name] = np.round(rng.normal(10, 2, len(frame)), 3)
    return frame


def _write(path: Path, frame: pd.DataFrame) -> Path:
    frame.to_csv(path, index=False)
    return path


def _run_file(folder: Path, data: Path, x: list[str], extra: str = "") -> Path:
    path = folder / f"{data.stem}.toml"
    xs = ", ".join(f'"{v}"' for v in x)
    path.write_text(f'[input]\npath = "{data}"\n[panel]\nentity = "firm_id"\ntime = "year"\n'
                    f'[model]\ny = "sales"\nx = [{xs}]\n[output]\ndir = "{data.stem}-out"\n'
                    'transforms = ["within", "between", "quasi", "twoway"]\n' + extra,
                    encoding="utf-8")
    return path


def _jobs(root: Path) -> dict[str, list]:
    common = _write(root / "common.csv", _panel(["const", "theta", "n_obs", "input_row"]))
    ours = _write(root / "ours.csv", _panel(["capital", N.intercept, N.entity_rows]))
    lagged = _panel(["capital"])
    lagged["capital_lag1"] = lagged["capital"] * 2
    lagged = _write(root / "lagged.csv", lagged)
    renamed = _run_file(root, ours, ["capital", N.intercept, N.entity_rows],
                        '[names]\nintercept = "my_intercept"\nentity_rows = "my_rows"\n')
    planted = write_demo_csv(root / "firms.csv")
    assert planted["conflicting_duplicate_keys"] > 0
    windowed = pd.read_csv(FIXTURES / "missing_keys.csv", dtype=str)
    windowed = _write(root / "windowed.csv", windowed)
    keys = ("-e", "firm_id", "-t", "year", "--y", "sales")
    odd = _panel(["capital", "staff"])
    odd["founded"] = 1990 + odd["firm_id"].str[1:].astype(int)  # fixed per firm
    odd["inputs"] = odd["capital"] + odd["staff"]  # an exact sum of two regressors before it
    odd = _write(root / "odd.csv", odd)
    return {
        "odd-csv": ["prepare", odd, *keys, "--x", "capital,founded,staff,inputs", *ALL,
                    "--format", "csv"],
        "common": ["prepare", common, *keys, "--x", "const,theta,n_obs,input_row", *ALL],
        "clash": ["prepare", ours, *keys, "--x", f"capital,{N.intercept},{N.entity_rows}", *ALL],
        "renamed": ["prepare", "--config", renamed],
        "lag-clash": ["prepare", lagged, *keys, "--x", "capital,capital_lag1",
                      "--lag", "capital:1"],
        "lag-renamed": ["prepare", lagged, *keys, "--x", "capital,capital_lag1,capital_L1",
                        "--lag", "capital:1", "--names", "lag={var}_L{k}", *ALL],
        "demo": ["demo", root / "demo"],
        "conflict-audit": ["audit", FIXTURES / "conflicting_duplicates.csv", "-e", "firm_id",
                           "-t", "year", "--report", root / "conflict.json"],
        "keep-first": ["prepare", FIXTURES / "conflicting_duplicates.csv", *keys,
                       "--x", "capital,staff", "--duplicates", "keep-first"],
        "keep-last": ["prepare", FIXTURES / "conflicting_duplicates.csv", *keys,
                      "--x", "capital,staff", "--duplicates", "keep-last"],
        "demo-audit": ["audit", root / "firms.csv", "-e", "firm_id", "-t", "year",
                       "--vars", "sales,capital,staff", "--report", root / "demo-audit.json"],
        "repeat-audit": ["audit", FIXTURES / "exact_duplicates.csv", "-e", "firm_id", "-t",
                         "year", "--report", root / "repeat.json"],
        "drop-exact": ["prepare", FIXTURES / "exact_duplicates.csv", *keys, "--x", "capital",
                       "--duplicates", "drop-exact"],
        "windowed": ["prepare", windowed, *keys, "--x", "capital,staff",
                     "--window", "2020,"],
    }


def _run(name: str, args: list, root: Path) -> Run:
    out = root / f"{name}-out"
    if args[0] == "prepare" and "--config" not in args:
        args = [*args, "--out", out]
    if "--config" in args:
        out = root / f"{Path(args[-1]).stem}-out"
    if args[0] == "demo":
        out = Path(args[1]) / "out"
    done = subprocess.run([*COMMAND, *map(str, args), "--quiet"], capture_output=True,
                          text=True, timeout=600, check=False, cwd=root)
    return Run(done.returncode, done.stdout, done.stderr, out)


@pytest.fixture(scope="module")
def runs(tmp_path_factory) -> dict[str, Run]:
    root = tmp_path_factory.mktemp("outputs")
    jobs = _jobs(root)
    with ThreadPoolExecutor(max_workers=4) as pool:
        futures = {name: pool.submit(_run, name, args, root) for name, args in jobs.items()}
        found = {name: future.result() for name, future in futures.items()}
    found["root"] = root
    return found


def unusable(run: Run) -> str:
    assert run.returncode == 2, run.stderr
    lines = run.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("panelprep: error: "), run.stderr
    assert "Traceback" not in run.stderr and "internal error" not in run.stderr
    assert not run.out.exists()
    return lines[0]


def _every_file_reads(out: Path) -> dict[str, pd.DataFrame]:
    tables = {}
    for name in DATA_FILES:
        table = pq.read_table(out / f"{name}.parquet")  # fails on a repeated column name
        assert len(set(table.column_names)) == len(table.column_names)
        tables[name] = table.to_pandas()
    return tables


# --- names the tool adds ----------------------------------------------------------


def test_common_names_for_regressors_pass_and_every_file_reads(runs):
    # const, theta, n_obs and input_row used to be names panelprep added itself
    run = runs["common"]
    assert run.returncode == 0, run.stderr
    tables = _every_file_reads(run.out)
    for name in ("clean", "within", "quasi", "twoway"):
        assert {"const", "theta", "n_obs", "input_row"} <= set(tables[name].columns)
    # the user's const is the user's data, ours is apart
    quasi = tables["quasi"]
    assert not np.allclose(quasi["const"], quasi[N.intercept])


def test_a_clash_with_our_names_is_exit_2_naming_both_and_the_keys(runs):
    line = unusable(runs["clash"])
    for fragment in (repr(N.intercept), repr(N.entity_rows), "names.intercept",
                     "names.entity_rows", "ours.csv", "intercept column (quasi file)",
                     "rows-per-entity column (between file)"):
        assert fragment in line, line


def test_renaming_ours_in_the_run_file_makes_the_same_data_run(runs):
    run = runs["renamed"]
    assert run.returncode == 0, run.stderr
    tables = _every_file_reads(run.out)
    assert {N.intercept, "my_intercept"} <= set(tables["quasi"].columns)
    assert {N.entity_rows, "my_rows"} <= set(tables["between"].columns)
    # the between file's rows per entity: 5 years per firm, by construction of _panel
    assert (tables["between"]["my_rows"] == 5).all()
    roles = _roles(run.out / "quasi.parquet")
    assert roles[N.intercept] == "regressor" and roles["my_intercept"] == "intercept"


def test_a_lag_whose_name_the_file_has_is_exit_2(runs):
    line = unusable(runs["lag-clash"])
    for fragment in ("'capital_lag1'", "--lag capital:1", "names.lag"):
        assert fragment in line, line


def test_a_lag_template_renames_the_derived_column(runs):
    run = runs["lag-renamed"]
    assert run.returncode == 0, run.stderr
    clean = _every_file_reads(run.out)["clean"]
    data = pd.read_csv(runs["root"] / "lagged.csv")
    # the file's own capital_lag1 (2 x capital) is kept as it was
    rows = clean[N.row].to_numpy() - 1
    np.testing.assert_array_equal(clean["capital_lag1"], data["capital_lag1"].iloc[rows])
    # capital_L1 is the previous year's capital of the same firm (pandas groupby shift)
    expected = data.groupby("firm_id")["capital"].shift(1).iloc[rows].to_numpy()
    np.testing.assert_array_equal(clean["capital_L1"].to_numpy(), expected)


# --- one row numbering ------------------------------------------------------------


def test_key_conflict_examples_name_every_row_of_the_key(runs):
    run = runs["conflict-audit"]
    assert run.returncode == 1, run.stderr
    report = json.loads((runs["root"] / "conflict.json").read_text(encoding="utf-8"))
    conflict = next(f for f in report["findings"] if f["id"] == "key-conflict")
    # fixtures/conflicting_duplicates.csv by hand: 00102/2020 on file lines 7, 8 and 15,
    # 00104/2022 on lines 19 and 20; data rows count from 1 after the header line
    assert [(e["firm_id"], e["year"], e["rows"]) for e in conflict["examples"]] == [
        ("00102", 2020, [6, 7, 14]), ("00104", 2022, [18, 19])]


@pytest.mark.parametrize(("job", "kept"), [("keep-first", {6, 18}), ("keep-last", {14, 19})])
def test_example_rows_match_the_dropped_and_clean_files(runs, job, kept):
    run = runs[job]
    assert run.returncode == 0, run.stderr
    report = json.loads((runs["root"] / "conflict.json").read_text(encoding="utf-8"))
    conflict = next(f for f in report["findings"] if f["id"] == "key-conflict")
    in_conflict = {r for e in conflict["examples"] for r in e["rows"]}
    dropped = pd.read_parquet(run.out / "dropped.parquet")
    clean = pd.read_parquet(run.out / "clean.parquet")
    assert set(dropped[N.row]) == in_conflict - kept
    assert in_conflict & set(clean[N.row]) == kept
    # every row number, in either file, points at that row of the input as pandas reads it
    data = pd.read_csv(FIXTURES / "conflicting_duplicates.csv", dtype={"firm_id": str})
    for table in (dropped, clean):
        source = data.iloc[table[N.row].to_numpy() - 1].reset_index(drop=True)
        pd.testing.assert_series_equal(source["firm_id"], table["firm_id"], check_names=False)
        assert (source["year"].to_numpy() == table["year"].astype(int).to_numpy()).all()
    values = clean.merge(data.reset_index().assign(**{N.row: lambda d: d["index"] + 1}),
                         on=N.row, suffixes=("", "_input"))
    np.testing.assert_array_equal(values["capital"], values["capital_input"])


def test_demo_rows_agree_between_the_audit_and_the_preparation(runs):
    # the demo merges conflicting keys by their mean on the key's first row
    assert runs["demo"].returncode == 0, runs["demo"].stderr
    report = json.loads((runs["root"] / "demo-audit.json").read_text(encoding="utf-8"))
    conflict = next(f for f in report["findings"] if f["id"] == "key-conflict")
    out = runs["demo"].out
    dropped = pd.read_parquet(out / "dropped.parquet")
    clean = pd.read_parquet(out / "clean.parquet")
    merged = dropped.loc[dropped[N.reason] == "duplicate-key-merged", N.row]
    for example in conflict["examples"]:
        first, *rest = example["rows"]
        assert first in set(clean[N.row]) or first in set(dropped[N.row])
        assert set(rest) <= set(merged)


def test_examples_after_a_pre_audit_step_name_rows_of_the_input(runs):
    # the window drops rows before the audit; missing keys must still point at input rows
    run = runs["windowed"]
    assert run.returncode == 1, run.stderr
    # a failed gate writes its diagnostics beside --out, never into it
    failed = run.out.with_name(run.out.name + ".failed")
    diagnostics = json.loads((failed / "diagnostics.json").read_text(encoding="utf-8"))
    finding = next(f for f in diagnostics["findings"] if f["id"] == "key-missing")
    data = pd.read_csv(runs["root"] / "windowed.csv", dtype=str)
    for example in finding["examples"]:
        row = data.iloc[example["row"] - 1]
        blank = [pd.isna(row[c]) or not row[c].strip() for c in ("firm_id", "year")]
        assert any(blank), example
        assert blank[0] or example["firm_id"] == row["firm_id"], example


# --- files that are directly estimable ---------------------------------------------


def _roles(path: Path) -> dict[str, str]:
    meta = json.loads(pq.read_schema(path).metadata[b"panelprep"])
    return {c["name"]: c["role"] for c in meta["columns"]}


def test_demo_within_leaves_founded_out_and_says_why(runs):
    out = runs["demo"].out
    tables = _every_file_reads(out)
    diagnostics = json.loads((out / "diagnostics.json").read_text(encoding="utf-8"))
    for name, reason in (("within", "no-within-variation"), ("twoway", "no-twoway-variation")):
        assert "founded" not in tables[name].columns
        left = diagnostics["transforms"][name]["regressors_left_out"]
        assert [(r["name"], r["reason"]) for r in left] == [("founded", reason)]
    # founded varies across firms: the between and quasi files keep it
    assert "founded" in tables["between"].columns and "founded" in tables["quasi"].columns
    assert diagnostics["transforms"]["quasi"]["regressors_left_out"] == []


def test_ols_on_every_regressor_column_of_every_file_is_well_defined(runs):
    out = runs["demo"].out
    diagnostics = json.loads((out / "diagnostics.json").read_text(encoding="utf-8"))
    listed = {f["name"]: f["columns"] for f in diagnostics["files"]}
    for name in ("within", "between", "quasi", "twoway"):
        table = pd.read_parquet(out / f"{name}.parquet")
        roles = _roles(out / f"{name}.parquet")
        assert list(roles) == list(table.columns)
        assert [c["name"] for c in listed[f"{name}.parquet"]] == list(table.columns)
        assert {r for r in roles.values()} <= {"key", "response", "regressor", "intercept",
                                               "weight", "auxiliary"}
        assert list(roles.values()).count("response") == 1
        design = [c for c, r in roles.items() if r in ("regressor", "intercept")]
        X = table[design].to_numpy(dtype=float)
        if name == "between":  # the between regression takes a constant of its own
            X = np.column_stack([np.ones(len(X)), X])
        # numpy's SVD rank (another route than the pivoted QR / Gram-Schmidt in panelprep)
        assert np.linalg.matrix_rank(X) == X.shape[1], name
    roles = _roles(out / "quasi.parquet")
    assert roles[N.intercept] == "intercept" and roles[N.theta] == "auxiliary"
    assert _roles(out / "between.parquet")[N.entity_rows] == "weight"
    assert _roles(out / "clean.parquet")[N.row] == "auxiliary"
    assert _roles(out / "dropped.parquet") == {N.row: "auxiliary", "firm_id": "key",
                                               "year": "key", N.reason: "auxiliary",
                                               N.step: "auxiliary"}


def test_the_intercept_column_says_what_it_is_and_the_readme_fit_runs(runs):
    out = runs["demo"].out
    meta = json.loads(pq.read_schema(out / "quasi.parquet").metadata[b"panelprep"])
    column = next(c for c in meta["columns"] if c["name"] == N.intercept)
    assert column["role"] == "intercept"
    assert "1 - theta_i" in column["meaning"] and "no column of ones" in column["meaning"]
    diagnostics = json.loads((out / "diagnostics.json").read_text(encoding="utf-8"))
    listed = next(f for f in diagnostics["files"] if f["name"] == "quasi.parquet")["columns"]
    assert next(c for c in listed if c["name"] == N.intercept) == column
    quasi = pd.read_parquet(out / "quasi.parquet")
    assert (quasi[N.intercept] == 1 - quasi[N.theta]).all()
    # the README's regression on the quasi file, run as written on the demo's output
    readme = (Path(__file__).resolve().parent.parent / "README.md").read_text(encoding="utf-8")
    block = next(b for b in re.findall(r"```python\n(.*?)```", readme, re.DOTALL)
                 if "lstsq" in b)
    names = {"__name__": "readme"}
    code = (block.replace('"prepared/quasi.parquet"', repr(str(out / "quasi.parquet")))
            .replace('"capital", "staff"', '"capital", "staff", "capital_lag1", "founded"'))
    exec(code, names)  # noqa: S102 - the README's own lines, as a user would run them
    import statsmodels.api as sm

    # statsmodels OLS on the same columns and no added constant gives the same coefficients
    design = quasi[[N.intercept, "capital", "staff", "capital_lag1", "founded"]]
    fit = sm.OLS(quasi["sales"], design, hasconst=True).fit()
    assert names["coef"] == pytest.approx(fit.params.to_numpy(), rel=1e-8)


def test_every_row_level_file_traces_rows_back_to_the_input(runs):
    out = runs["demo"].out
    data = pd.read_csv(runs["root"] / "firms.csv", dtype={"firm_id": str})
    for name in ("clean", "within", "quasi", "twoway"):
        table = pd.read_parquet(out / f"{name}.parquet")
        source = data.iloc[table[N.row].to_numpy() - 1]
        # ids were normalised (trim-fold): compare folded, and the years exactly
        assert (source["firm_id"].str.strip().str.casefold().to_numpy()
                == table["firm_id"].str.casefold().to_numpy()).all(), name
        assert (source["year"].to_numpy() == table["year"].to_numpy()).all(), name
    clean = pd.read_parquet(out / "clean.parquet")
    dropped = pd.read_parquet(out / "dropped.parquet")
    # rows read = kept + dropped, each input row exactly once (counted from 1)
    assert sorted([*clean[N.row], *dropped[N.row]]) == list(range(1, len(data) + 1))


def test_csv_outputs_list_roles_and_left_out_regressors_in_diagnostics(runs):
    run = runs["odd-csv"]
    assert run.returncode == 0, run.stderr
    diagnostics = json.loads((run.out / "diagnostics.json").read_text(encoding="utf-8"))
    listed = {f["name"]: f["columns"] for f in diagnostics["files"]}
    left = {name: [(r["name"], r["reason"]) for r in info["regressors_left_out"]]
            for name, info in diagnostics["transforms"].items()}
    # by construction: founded is fixed per firm, inputs = capital + staff exactly
    assert left == {
        "within": [("founded", "no-within-variation"), ("inputs", "collinear")],
        "twoway": [("founded", "no-twoway-variation"), ("inputs", "collinear")],
        "between": [("inputs", "collinear")],
        "quasi": [("inputs", "collinear")],
    }
    for name in ("clean", "within", "between", "quasi", "twoway"):
        table = pd.read_csv(run.out / f"{name}.csv")
        assert [c["name"] for c in listed[f"{name}.csv"]] == list(table.columns), name
        roles = {c["name"]: c["role"] for c in listed[f"{name}.csv"]}
        design = [c for c, r in roles.items() if r in ("regressor", "intercept")]
        X = table[design].to_numpy(dtype=float)
        if name == "between":
            X = np.column_stack([np.ones(len(X)), X])
        if name != "clean":  # clean keeps every variable as read
            # numpy's SVD rank, another route than panelprep's
            assert np.linalg.matrix_rank(X) == X.shape[1], name
    assert "inputs" in pd.read_csv(run.out / "clean.csv").columns


def test_repeat_examples_match_the_dropped_and_clean_files(runs):
    assert runs["repeat-audit"].returncode == 0  # a repeat is a warning in the audit
    report = json.loads((runs["root"] / "repeat.json").read_text(encoding="utf-8"))
    repeated = next(f for f in report["findings"] if f["id"] == "row-repeated")
    run = runs["drop-exact"]
    assert run.returncode == 0, run.stderr
    dropped = pd.read_parquet(run.out / "dropped.parquet")
    clean = pd.read_parquet(run.out / "clean.parquet")
    # drop-exact removes the later copies and keeps the rows they repeat
    assert sorted(dropped[N.row]) == sorted(e["row"] for e in repeated["examples"])
    assert {e["repeats_row"] for e in repeated["examples"]} <= set(clean[N.row])
