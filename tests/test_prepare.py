"""The preparation flow end to end: variance components and estimation-ready files.

Outside checks:

* Grunfeld investment data (``statsmodels.datasets.grunfeld``, the 10 firms
  without American Steel, 1935-1954) against the published Swamy-Arora
  random-effects example (Baltagi, Econometric Analysis of Panel Data,
  Table 2.1: entity-effect SD 84.20, idiosyncratic SD 52.77, theta = 0.8612, random-effects
  slopes 0.1098 and 0.3081 with intercept -57.83, within slopes 0.1101 and
  0.3101; values from memory).
* The same quantities computed another way: the textbook balanced
  Swamy-Arora formulas in numpy, statsmodels GLS with the error covariance
  ``s2_u ZZ' + s2_e I``, and least squares with explicit entity (and period)
  dummies (numpy / statsmodels).
"""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import statsmodels.api as sm
from typer.testing import CliRunner

import panelprep
from panelprep._version import __version__
from panelprep.cli import app
from panelprep.names import DEFAULT_NAMES as N
from panelprep.prepare import PrepareOptions, prepare, prepare_frame

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
DATA_FILES = ("clean", "within", "between", "quasi", "twoway")
# what a preparation writes besides data files, also when the gate fails
DIAGNOSTICS = {"diagnostics.json", "diagnostics.txt", "report.html"}
GRUNFELD = ["--entity", "firm", "--time", "year", "--y", "invest", "--x", "value,capital"]


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def run_cli(*args: str) -> subprocess.CompletedProcess:
    """``panelprep ARGS`` in a fresh interpreter, importing the panelprep under test."""
    env = {**os.environ, "PYTHONPATH": str(Path(panelprep.__file__).resolve().parent.parent)}
    code = "from panelprep.cli import main; main()"
    return subprocess.run([sys.executable, "-c", code, *map(str, args)], check=False,
                          capture_output=True, text=True, env=env, timeout=300)


def invoke(*args: str):
    """The same command line in this process (fast; exit codes as typer sets them)."""
    return CliRunner().invoke(app, [str(a) for a in args])


def _lstsq(table: pd.DataFrame, y: str, x: list[str]) -> np.ndarray:
    return np.linalg.lstsq(table[x].to_numpy(float), table[y].to_numpy(float), rcond=None)[0]


@pytest.fixture(scope="module")
def grunfeld_csv(tmp_path_factory) -> Path:
    """Grunfeld without American Steel: 10 firms x 20 years, year as an integer."""
    from statsmodels.datasets import grunfeld

    frame = grunfeld.load_pandas().data
    frame = frame[frame["firm"] != "American Steel"].reset_index(drop=True)
    frame["year"] = frame["year"].astype(np.int64)
    assert frame.shape[0] == 200 and frame["firm"].nunique() == 10
    path = tmp_path_factory.mktemp("grunfeld") / "grunfeld.csv"
    frame[["firm", "year", "invest", "value", "capital"]].to_csv(path, index=False)
    return path


@pytest.fixture(scope="module")
def grunfeld_run(grunfeld_csv, tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("run") / "out"
    done = run_cli("prepare", grunfeld_csv, *GRUNFELD, "--out", out,
                   "--transform", "within,between,quasi,twoway")
    assert done.returncode == 0, done.stderr
    return out


@pytest.fixture(scope="module")
def diagnostics(grunfeld_run) -> dict:
    return json.loads((grunfeld_run / "diagnostics.json").read_text(encoding="utf-8"))


# --- Grunfeld through the command line ------------------------------------------------------


def test_writes_every_file(grunfeld_run):
    expected = {f"{name}.parquet" for name in (*DATA_FILES, "dropped")}
    assert {p.name for p in grunfeld_run.iterdir()} == expected | DIAGNOSTICS | {"run.toml"}


def test_swamy_arora_components_match_the_published_example(diagnostics):
    comp = diagnostics["components"]
    assert comp["method"] == "swamy-arora"
    # Baltagi, Table 2.1 (values from memory): entity-effect SD 84.20, idiosyncratic SD 52.77, theta 0.8612
    assert np.sqrt(comp["sigma2_entity"]) == pytest.approx(84.20, abs=0.005)
    assert np.sqrt(comp["sigma2_idiosyncratic"]) == pytest.approx(52.77, abs=0.005)
    for stat in ("min", "median", "max"):
        assert comp["theta"][stat] == pytest.approx(0.8612, abs=5e-5)
    assert comp["truncated_negative"] is False
    s2u, s2e = comp["sigma2_entity"], comp["sigma2_idiosyncratic"]
    assert comp["entity_share"] == pytest.approx(s2u / (s2u + s2e), rel=1e-12)


def test_swamy_arora_equals_the_balanced_textbook_formulas(grunfeld_csv, diagnostics):
    # Balanced Swamy-Arora, written out in numpy: s2_e = SSR of the within regression over
    # N T - N - K; s2_1 = T x SSR of the regression of entity means on [1, xbar] over N - K - 1;
    # s2_u = (s2_1 - s2_e) / T.  theta = 1 - sqrt(s2_e / s2_1).
    frame = pd.read_csv(grunfeld_csv).sort_values(["firm", "year"])
    n_ent, t = 10, 20
    y = frame["invest"].to_numpy().reshape(n_ent, t)
    x = frame[["value", "capital"]].to_numpy().reshape(n_ent, t, 2)
    yw = (y - y.mean(axis=1, keepdims=True)).ravel()
    xw = (x - x.mean(axis=1, keepdims=True)).reshape(-1, 2)
    bw = np.linalg.lstsq(xw, yw, rcond=None)[0]
    s2e = np.sum((yw - xw @ bw) ** 2) / (n_ent * t - n_ent - 2)
    xb = np.column_stack([np.ones(n_ent), x.mean(axis=1)])
    bb = np.linalg.lstsq(xb, y.mean(axis=1), rcond=None)[0]
    s2_1 = t * np.sum((y.mean(axis=1) - xb @ bb) ** 2) / (n_ent - 3)
    comp = diagnostics["components"]
    assert comp["sigma2_idiosyncratic"] == pytest.approx(s2e, rel=1e-10)
    assert comp["sigma2_entity"] == pytest.approx((s2_1 - s2e) / t, rel=1e-10)
    assert comp["theta"]["median"] == pytest.approx(1 - np.sqrt(s2e / s2_1), rel=1e-10)


def test_quasi_file_gives_the_random_effects_slopes(grunfeld_run, grunfeld_csv, diagnostics):
    quasi = pd.read_parquet(grunfeld_run / "quasi.parquet")
    coef = _lstsq(quasi, "invest", ["value", "capital", N.intercept])
    # Baltagi, Table 2.1 random effects (values from memory): 0.1098, 0.3081, const -57.83
    np.testing.assert_allclose(coef[:2], [0.1098, 0.3081], atol=5e-5)
    assert coef[2] == pytest.approx(-57.83, abs=5e-3)
    # the same slopes by statsmodels GLS with Omega = s2_u ZZ' + s2_e I on the raw data
    raw = pd.read_csv(grunfeld_csv)
    comp = diagnostics["components"]
    same = raw["firm"].to_numpy()[:, None] == raw["firm"].to_numpy()[None, :]
    omega = comp["sigma2_entity"] * same + comp["sigma2_idiosyncratic"] * np.eye(len(raw))
    gls = sm.GLS(raw["invest"], sm.add_constant(raw[["value", "capital"]]), sigma=omega).fit()
    np.testing.assert_allclose(coef, gls.params[["value", "capital", "const"]], rtol=1e-8)


def test_within_file_gives_the_fixed_effects_slopes(grunfeld_run, grunfeld_csv):
    within = pd.read_parquet(grunfeld_run / "within.parquet")
    coef = _lstsq(within, "invest", ["value", "capital"])
    # Baltagi, Table 2.1 within (values from memory): 0.1101, 0.3101
    np.testing.assert_allclose(coef, [0.1101, 0.3101], atol=5e-5)
    # least squares with firm dummies (statsmodels OLS) gives the same slopes
    raw = pd.read_csv(grunfeld_csv)
    dummies = pd.get_dummies(raw["firm"], dtype=float)
    lsdv = sm.OLS(raw["invest"], pd.concat([raw[["value", "capital"]], dummies], axis=1)).fit()
    np.testing.assert_allclose(coef, lsdv.params[["value", "capital"]], rtol=1e-8)


def test_components_fields(diagnostics):
    comp = diagnostics["components"]
    for name in ("method", "sigma2_entity", "sigma2_idiosyncratic", "entity_share", "theta",
                 "truncated_negative"):
        assert name in comp, name
    assert set(comp["theta"]) >= {"min", "median", "max"}


def test_diagnostics_list_files_with_rows_and_sha256(grunfeld_run, grunfeld_csv, diagnostics):
    files = {f["name"]: f for f in diagnostics["files"]}
    assert set(files) == {f"{name}.parquet" for name in (*DATA_FILES, "dropped")}
    for name, entry in files.items():
        path = grunfeld_run / name
        assert entry["sha256"] == _sha256(path), name
        assert entry["rows"] == pq.ParquetFile(path).metadata.num_rows, name
    assert files["clean.parquet"]["rows"] == 200 and files["between.parquet"]["rows"] == 10
    assert files["dropped.parquet"]["rows"] == 0
    assert diagnostics["input"]["sha256"] == _sha256(grunfeld_csv)


def test_every_parquet_file_carries_provenance(grunfeld_run, grunfeld_csv, diagnostics):
    for path in sorted(grunfeld_run.glob("*.parquet")):
        meta = json.loads(pq.read_schema(path).metadata[b"panelprep"])
        for key in ("transform", "method", "components", "theta", "input_sha256", "options",
                    "version"):
            assert key in meta, (path.name, key)
        assert meta["method"] == "swamy-arora"
        assert meta["version"] == __version__
        assert meta["input_sha256"] == _sha256(grunfeld_csv)
        assert meta["components"] == diagnostics["components"]
        assert meta["theta"] == diagnostics["components"]["theta"]
        assert meta["options"]["model.y"] == "invest"
        assert meta["options"]["model.x"] == ["value", "capital"]
        if path.stem in diagnostics["transforms"]:
            assert meta["transform"] == path.stem
            assert meta["transform_info"] == diagnostics["transforms"][path.stem]
        else:
            assert meta["transform"] is None


def test_data_files_are_byte_identical_across_runs(grunfeld_run, grunfeld_csv, tmp_path):
    again = tmp_path / "again"
    result = invoke("prepare", grunfeld_csv, *GRUNFELD, "--out", again,
                    "--transform", "within,between,quasi,twoway")
    assert result.exit_code == 0, result.output
    for name in (*DATA_FILES, "dropped"):
        assert (again / f"{name}.parquet").read_bytes() == \
            (grunfeld_run / f"{name}.parquet").read_bytes(), name


def test_log_states_the_degrees_of_freedom_and_clustering(grunfeld_run, diagnostics):
    text = (grunfeld_run / "diagnostics.txt").read_text(encoding="utf-8")
    assert diagnostics["transforms"]["within"]["entities_absorbed"] == 10
    lines = text.lower().splitlines()
    assert any("degrees of freedom" in line and " 10 " in line for line in lines), text
    assert any("cluster" in line and "entit" in line for line in lines), text


# --- the same through the API ---------------------------------------------------------------


def test_api_writes_the_same_files(grunfeld_run, grunfeld_csv, tmp_path):
    prep = prepare(grunfeld_csv, tmp_path / "api", entity="firm", time="year", y="invest",
                   x=["value", "capital"], transforms="within,between,quasi,twoway")
    assert prep.verdict == "pass"
    for name in (*DATA_FILES, "dropped"):
        pd.testing.assert_frame_equal(pd.read_parquet(tmp_path / "api" / f"{name}.parquet"),
                                      pd.read_parquet(grunfeld_run / f"{name}.parquet"))
    assert np.sqrt(prep.summary["components"]["sigma2_entity"]) == pytest.approx(84.20, abs=0.005)


def test_prepare_frame_in_memory(grunfeld_csv):
    frame = pd.read_csv(grunfeld_csv, dtype={"firm": str})
    prep = prepare_frame(frame, PrepareOptions(entity=["firm"], time="year", y="invest",
                                               x=["value", "capital"]))
    assert set(prep.tables) == {"clean", "within", "between", "quasi", "dropped"}
    coef = _lstsq(prep.tables["quasi"], "invest", ["value", "capital", N.intercept])
    # Baltagi, Table 2.1 random effects (values from memory)
    np.testing.assert_allclose(coef[:2], [0.1098, 0.3081], atol=5e-5)
    assert coef[2] == pytest.approx(-57.83, abs=5e-3)
    assert prep.components.theta_ == pytest.approx(np.full(10, 0.8612), abs=5e-5)


# --- exit codes and the output folder -------------------------------------------------------


def test_gate_failure_writes_only_diagnostics(tmp_path):
    # conflicting_duplicates.csv: 2 keys on 5 rows disagree; with no policy the gate fails
    out = tmp_path / "out"
    result = invoke("prepare", FIXTURES / "conflicting_duplicates.csv", "--entity", "firm_id",
                    "--time", "year", "--y", "sales", "--x", "capital,staff", "--out", out)
    assert result.exit_code == 1, result.output
    assert not out.exists()
    failed = tmp_path / "out.failed"
    assert {p.name for p in failed.iterdir()} == DIAGNOSTICS
    summary = json.loads((failed / "diagnostics.json").read_text(encoding="utf-8"))
    assert summary["verdict"] == "fail"
    assert "key-conflict" in {f["id"] for f in summary["findings"]}


def test_missing_column_is_exit_2(tmp_path):
    out = tmp_path / "out"
    done = run_cli("prepare", FIXTURES / "clean_balanced.csv", "--entity", "firm_id", "--time",
                   "year", "--y", "sales", "--x", "capital,no_such_column", "--out", out)
    assert done.returncode == 2
    assert "no_such_column" in done.stderr and "Traceback" not in done.stderr
    assert len(done.stderr.strip().splitlines()) == 1
    assert not out.exists()


def _clean_balanced(out: Path, *extra: str):
    return invoke("prepare", FIXTURES / "clean_balanced.csv", "--entity", "firm_id", "--time",
                  "year", "--y", "sales", "--x", "capital,staff", "--out", out, *extra)


def test_non_empty_folder_needs_force(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / "keep.txt").write_text("earlier work\n")
    result = _clean_balanced(out)
    assert result.exit_code == 2
    assert [p.name for p in out.iterdir()] == ["keep.txt"]
    result = _clean_balanced(out, "--force")
    assert result.exit_code == 0, result.output
    names = {p.name for p in out.iterdir()}
    assert "keep.txt" not in names and {"clean.parquet", "diagnostics.json"} <= names


def test_output_folder_equal_to_or_containing_the_input_is_refused(tmp_path):
    data = tmp_path / "panel.csv"
    data.write_bytes((FIXTURES / "clean_balanced.csv").read_bytes())
    before = _sha256(data)
    args = ("--entity", "firm_id", "--time", "year", "--y", "sales", "--x", "capital,staff")
    for out in (tmp_path, data):
        result = invoke("prepare", data, *args, "--out", out, "--force")
        assert result.exit_code == 2, (out, result.output)
    assert data.exists() and _sha256(data) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["panel.csv"]


# --- singletons, time-invariant regressors, csv ---------------------------------------------


def test_singletons_leave_the_within_file_and_are_counted(tmp_path):
    # singletons.csv: 00103, 00104 and 00106 have one row each, 10 rows in the other firms
    out = tmp_path / "out"
    result = invoke("prepare", FIXTURES / "singletons.csv", "--entity", "firm_id", "--time",
                    "year", "--y", "sales", "--x", "capital", "--out", out)
    assert result.exit_code == 0, result.output
    summary = json.loads((out / "diagnostics.json").read_text(encoding="utf-8"))
    within = pd.read_parquet(out / "within.parquet")
    assert len(within) == 10
    assert not within["firm_id"].isin(["00103", "00104", "00106"]).any()
    assert len(pd.read_parquet(out / "clean.parquet")) == 13
    assert len(pd.read_parquet(out / "quasi.parquet")) == 13
    assert summary["transforms"]["within"]["singletons_dropped"] == 3
    assert summary["transforms"]["within"]["entities_absorbed"] == 3


def test_time_invariant_regressor_stays_in_quasi_and_leaves_the_within_regression(tmp_path):
    # time_invariant.csv: founded is fixed within every firm (1987, 1995, 2003, 1979)
    out = tmp_path / "out"
    result = invoke("prepare", FIXTURES / "time_invariant.csv", "--entity", "firm_id", "--time",
                    "year", "--y", "sales", "--x", "founded,staff", "--out", out)
    assert result.exit_code == 0, result.output
    summary = json.loads((out / "diagnostics.json").read_text(encoding="utf-8"))
    assert summary["components"]["dropped_within"] == ["founded"]
    assert "regressor-dropped-within" in {f["id"] for f in summary["findings"]}
    text = (out / "diagnostics.txt").read_text(encoding="utf-8")
    assert any("founded" in line and "within" in line for line in text.splitlines())
    quasi = pd.read_parquet(out / "quasi.parquet")
    theta = quasi[N.theta].to_numpy()
    clean = pd.read_parquet(out / "clean.parquet")
    # founded survives quasi-demeaning as (1 - theta) x founded, one value per firm
    np.testing.assert_allclose(quasi["founded"], (1 - theta) * clean["founded"], rtol=1e-12)
    for path in out.glob("*.parquet"):
        table = pd.read_parquet(path)
        numbers = table.select_dtypes("number")
        assert np.isfinite(numbers.to_numpy(float)).all(), path.name


def test_csv_format_writes_the_same_values(grunfeld_run, grunfeld_csv, tmp_path):
    out = tmp_path / "csv"
    result = invoke("prepare", grunfeld_csv, *GRUNFELD, "--out", out, "--format", "csv",
                    "--transform", "within,between,quasi,twoway")
    assert result.exit_code == 0, result.output
    summary = json.loads((out / "diagnostics.json").read_text(encoding="utf-8"))
    for entry in summary["files"]:
        assert entry["sha256"] == _sha256(out / entry["name"])
    for name in DATA_FILES:
        written = pd.read_csv(out / f"{name}.csv", dtype={"firm": str})
        reference = pd.read_parquet(grunfeld_run / f"{name}.parquet")
        assert list(written.columns) == list(reference.columns), name
        assert written["firm"].tolist() == reference["firm"].astype(str).tolist()
        numbers = reference.select_dtypes("number").columns
        np.testing.assert_allclose(written[numbers].to_numpy(float),
                                   reference[numbers].to_numpy(float), rtol=1e-15, atol=0)


def _encodings(path: Path) -> dict[str, tuple[str, bool]]:
    """Each column's codec and whether its first row group holds a dictionary page."""
    group = pq.ParquetFile(path).metadata.row_group(0)
    columns = (group.column(j) for j in range(group.num_columns))
    return {c.path_in_schema: (c.compression, c.dictionary_page_offset is not None)
            for c in columns}


def test_parquet_codec_is_an_option_and_only_key_columns_get_dictionaries(
        grunfeld_run, grunfeld_csv, tmp_path):
    encodings = _encodings(grunfeld_run / "quasi.parquet")
    assert {codec for codec, _ in encodings.values()} == {"ZSTD"}
    assert [c for c, (_, dictionary) in encodings.items() if dictionary] == ["firm", "year"]
    out = tmp_path / "lz4"
    result = invoke("prepare", grunfeld_csv, *GRUNFELD, "--out", out, "--compression", "lz4")
    assert result.exit_code == 0, result.output
    assert {codec for codec, _ in _encodings(out / "within.parquet").values()} == {"LZ4"}
    pd.testing.assert_frame_equal(pd.read_parquet(out / "within.parquet"),
                                  pd.read_parquet(grunfeld_run / "within.parquet"))
    bad = invoke("prepare", grunfeld_csv, *GRUNFELD, "--out", tmp_path / "x",
                 "--compression", "brotli")
    assert bad.exit_code == 2
    assert "zstd" in bad.output and not (tmp_path / "x").exists()


# --- two-way file against dummies on a random unbalanced panel -------------------------------


def _random_unbalanced_csv(path: Path, seed: int = 11) -> pd.DataFrame:
    """Invented firm-year panel with gaps, uneven spans and two single-row firms."""
    rng = np.random.default_rng(seed)
    n_firms, n_years = 30, 8
    rows = []
    for firm in range(n_firms):
        present = rng.random(n_years) < 0.65
        present[rng.integers(n_years)] = True
        if firm >= n_firms - 2:
            present[:] = False
            present[rng.integers(n_years)] = True
        rows += [(f"c{firm:03d}", 2010 + t) for t in np.flatnonzero(present)]
    frame = pd.DataFrame(rows, columns=["firm", "year"])
    n = len(frame)
    firm_effect = rng.normal(0, 2, n_firms)[frame["firm"].str[1:].astype(int)]
    year_effect = rng.normal(0, 1, n_years)[frame["year"] - 2010]
    frame["x1"] = rng.normal(size=n) + 0.4 * firm_effect
    frame["x2"] = rng.normal(size=n) + 0.5 * year_effect
    frame["y"] = 1.5 * frame["x1"] - 0.7 * frame["x2"] + firm_effect + year_effect + \
        rng.normal(0, 0.5, n)
    frame = frame.iloc[rng.permutation(n)]
    frame.to_csv(path, index=False, float_format="%.17g")
    return pd.read_csv(path, dtype={"firm": str})


def test_twoway_file_equals_entity_and_period_dummies(tmp_path):
    raw = _random_unbalanced_csv(tmp_path / "panel.csv")
    prep = prepare(tmp_path / "panel.csv", tmp_path / "out", entity="firm", time="year", y="y",
                   x="x1,x2", transforms="within,twoway")
    assert prep.verdict == "pass"
    twoway = pd.read_parquet(tmp_path / "out" / "twoway.parquet")
    singles = raw.groupby("firm")["year"].transform("size") == 1
    assert len(twoway) == int((~singles).sum())
    slopes = _lstsq(twoway, "y", ["x1", "x2"])
    # numpy least squares on x with a full set of firm and year dummies (rank deficient by
    # one; the slopes are still identified); single-row firms change nothing there
    design = np.column_stack([raw[["x1", "x2"]].to_numpy(),
                              pd.get_dummies(raw["firm"], dtype=float).to_numpy(),
                              pd.get_dummies(raw["year"], dtype=float).to_numpy()])
    reference = np.linalg.lstsq(design, raw["y"].to_numpy(), rcond=None)[0][:2]
    np.testing.assert_allclose(slopes, reference, rtol=0, atol=1e-8)
    within = pd.read_parquet(tmp_path / "out" / "within.parquet")
    design = np.column_stack([raw[["x1", "x2"]].to_numpy(),
                              pd.get_dummies(raw["firm"], dtype=float).to_numpy()])
    reference = np.linalg.lstsq(design, raw["y"].to_numpy(), rcond=None)[0][:2]
    np.testing.assert_allclose(_lstsq(within, "y", ["x1", "x2"]), reference, rtol=0, atol=1e-8)


# --- lags through the flow -------------------------------------------------------------------


def _grunfeld_lagged(grunfeld_csv: Path) -> pd.DataFrame:
    """value one year earlier by plain pandas (Grunfeld is balanced, so one row is one year)."""
    raw = pd.read_csv(grunfeld_csv, dtype={"firm": str}).sort_values(["firm", "year"])
    raw["value_lag1"] = raw.groupby("firm")["value"].shift(1)
    return raw


def test_lagged_regressor_through_the_flow(grunfeld_csv, tmp_path):
    from panelprep.lags import Shift

    prep = prepare(grunfeld_csv, tmp_path / "out", entity="firm", time="year", y="invest",
                   x=["value_lag1", "capital"], transforms="within,quasi",
                   shifts=[Shift("value", 1, "lag")])
    assert prep.verdict == "pass"
    clean = pd.read_parquet(tmp_path / "out" / "clean.parquet")
    dropped = pd.read_parquet(tmp_path / "out" / "dropped.parquet")
    # 1935 has no earlier year: one row per firm leaves by listwise deletion
    assert len(clean) == 190 and len(dropped) == 10
    assert set(dropped["year"]) == {1935} and set(dropped[N.reason]) == {"listwise-missing"}
    merged = clean.merge(_grunfeld_lagged(grunfeld_csv), on=["firm", "year"], suffixes=("", "_ref"))
    np.testing.assert_array_equal(merged["value_lag1"], merged["value_lag1_ref"])


def test_window_keeps_lags_that_reach_before_it(grunfeld_csv, tmp_path):
    from panelprep.clean import Policies
    from panelprep.lags import Shift

    prep = prepare(grunfeld_csv, tmp_path / "out", entity="firm", time="year", y="invest",
                   x=["value_lag1", "capital"], transforms="within",
                   shifts=[Shift("value", 1, "lag")], policies=Policies(window=("1940", None)))
    assert prep.verdict == "pass"
    clean = pd.read_parquet(tmp_path / "out" / "clean.parquet")
    # the window asks for 1940-1954 (15 years x 10 firms); 1940's lag is 1939, in the file
    assert int(clean["year"].min()) == 1940 and len(clean) == 150
    merged = clean.merge(_grunfeld_lagged(grunfeld_csv), on=["firm", "year"], suffixes=("", "_ref"))
    np.testing.assert_array_equal(merged["value_lag1"], merged["value_lag1_ref"])


def test_cleaning_policies_from_the_command_line(tmp_path):
    # conflicting_duplicates.csv with keep-last: rows 6, 7 (00102/2020) and 18 (00104/2022)
    # give way to the later rows 14 and 19 (hand count, see test_clean.py; rows from 1 here)
    out = tmp_path / "dup"
    result = invoke("prepare", FIXTURES / "conflicting_duplicates.csv", "--entity", "firm_id",
                    "--time", "year", "--y", "sales", "--x", "capital,staff", "--out", out,
                    "--duplicates", "keep-last")
    assert result.exit_code == 0, result.output
    dropped = pd.read_parquet(out / "dropped.parquet")
    assert sorted(dropped[N.row]) == [6, 7, 18]
    # singletons.csv with --singletons drop: rows 9, 10 and 13 are the three one-row firms
    out = tmp_path / "single"
    result = invoke("prepare", FIXTURES / "singletons.csv", "--entity", "firm_id", "--time",
                    "year", "--y", "sales", "--x", "capital", "--out", out,
                    "--singletons", "drop")
    assert result.exit_code == 0, result.output
    dropped = pd.read_parquet(out / "dropped.parquet")
    assert sorted(dropped[N.row]) == [9, 10, 13]
    assert len(pd.read_parquet(out / "clean.parquet")) == 10


def test_files_written_in_pieces_equal_one_piece_and_pandas(tmp_path, monkeypatch):
    import panelprep.prepare as flow

    _random_unbalanced_csv(tmp_path / "panel.csv")  # shuffled rows, two single-row firms
    args = {"entity": "firm", "time": "year", "y": "y", "x": "x1,x2",
            "transforms": "within,quasi"}
    whole = prepare(tmp_path / "panel.csv", tmp_path / "whole", **args)
    monkeypatch.setattr(flow, "PIECE_ROWS", 7)
    pieces = prepare(tmp_path / "panel.csv", tmp_path / "pieces", **args)
    assert whole.verdict == pieces.verdict == "pass"
    for name in ("within", "quasi"):
        one = pd.read_parquet(tmp_path / "whole" / f"{name}.parquet")
        many = pd.read_parquet(tmp_path / "pieces" / f"{name}.parquet")
        assert pq.ParquetFile(tmp_path / "pieces" / f"{name}.parquet").num_row_groups > 5
        pd.testing.assert_frame_equal(one, many, check_exact=True)
    # outside check: pandas groupby demeaning of the clean file, single-row firms left out
    clean = pd.read_parquet(tmp_path / "whole" / "clean.parquet")
    multi = clean[clean.groupby("firm")["y"].transform("size") > 1]
    demeaned = multi[["y", "x1", "x2"]] - multi.groupby("firm")[["y", "x1", "x2"]].transform("mean")
    within_file = pd.read_parquet(tmp_path / "pieces" / "within.parquet")
    assert within_file[N.row].tolist() == multi[N.row].tolist()
    np.testing.assert_allclose(within_file[["y", "x1", "x2"]].to_numpy(),
                               demeaned.to_numpy(), rtol=0, atol=1e-12)
