"""Shifting or scaling a variable moves nothing it should not move.

The model ``y = a + X b + u + e`` has an intercept, and every transform and
test the package builds on it either has a constant (pooled, between,
quasi-demeaned with the constant column ``1 - theta_i``) or works within
entities.  So, in exact arithmetic (common practice; the textbook
equivariance of least squares with an intercept):

* adding a constant ``c`` to a regressor or to the response changes no
  variance component, no theta, no finding and no test statistic; the within
  and two-way files are unchanged, the between file moves by ``c`` and the
  quasi file by ``(1 - theta_i) c`` in that column;
* multiplying a regressor by ``s`` changes none of them either and scales
  that column of every file by ``s``; multiplying the response by ``s``
  scales the variances by ``s^2`` (their square roots by ``|s|``) and the
  response column of every file by ``s``.

Float64 holds ``x + c`` only to ``eps |c|``, so the comparisons allow an
error of that order: a shift of ``1e12`` SDs leaves about 4 digits of the
spread, and the tolerances below follow from that (not from the code under
test).  The reference is the same preparation on the unshifted, unscaled
data.
"""

from __future__ import annotations

import json
import subprocess

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from panelprep.prepare import PrepareOptions, prepare_frame
from tests.conftest import examples
from tests.test_cli_audit import COMMAND

EPS = np.finfo(float).eps
VARIABLES = ["y", "x1", "x2", "x3"]


def _panel(seed: int, n_entities: int, n_periods: int) -> pd.DataFrame:
    """An unbalanced panel with an entity effect, a time-invariant x3 and holes."""
    rng = np.random.default_rng(seed)
    entity = np.repeat(np.arange(n_entities), n_periods)
    year = np.tile(np.arange(2000, 2000 + n_periods), n_entities)
    keep = rng.random(len(entity)) < 0.85
    keep[::n_periods] = keep[1::n_periods] = True
    entity, year = entity[keep], year[keep]
    effect = rng.normal(0.0, 1.5, n_entities)
    x1 = rng.normal(size=len(entity)) + 0.4 * effect[entity]
    x2 = rng.normal(size=len(entity)) + 0.2 * (year - 2000)
    x3 = rng.normal(size=n_entities)[entity]
    y = 1.0 + x1 - 0.5 * x2 + 0.3 * x3 + effect[entity] + rng.normal(size=len(entity))
    return pd.DataFrame({"firm": [f"f{e:03d}" for e in entity], "year": year,
                         "y": y, "x1": x1, "x2": x2, "x3": x3})


def _prepare(frame: pd.DataFrame):
    options = PrepareOptions(entity=["firm"], time="year", y="y", x=["x1", "x2", "x3"],
                             transforms=["within", "between", "quasi", "twoway"],
                             fail_on="error",
                             severities={"var-fixed-within": "info"})
    return prepare_frame(frame, options)


def _finding_key(summary: dict) -> list[tuple]:
    return sorted((f["id"], f["severity"], f["count"]) for f in summary["findings"]
                  if f["id"] != "variance-beyond-float-range")


def _statistics(summary: dict) -> dict[str, float | None]:
    evidence = summary["evidence"]
    return {name: evidence[name]["statistic"]
            for name in ("breusch_pagan", "honda", "mundlak", "hausman", "wooldridge",
                         "born_breitung", "pesaran_cd")}


def _close(actual, expected, rtol, atol=0.0) -> bool:
    if expected is None or actual is None:
        return actual is expected
    return abs(actual - expected) <= atol + rtol * abs(expected)


def _assert_tables(base, moved, frame, column: str, shift: float, factor: float,
                   atol: float) -> None:
    """Every output file, the moved column mapped back, equals the reference.

    Errors are measured in units of the variable's SD in the reference data.
    """
    theta = base.components.theta_
    for name in ("within", "between", "quasi", "twoway"):
        before, after = base.tables[name], moved.tables[name]
        assert len(before) == len(after), name
        for var in VARIABLES:
            if var not in before.columns:
                continue
            expected = before[var].to_numpy()
            got = after[var].to_numpy()
            if var == column:
                if name == "between":
                    offset = shift
                elif name == "quasi":
                    codes = base.sample_index.entity_codes
                    offset = (1.0 - theta[codes]) * shift
                else:
                    offset = 0.0
                got = got / factor - offset
            spread = float(frame[var].std())
            # theta is known to ``atol`` only, and the quasi file holds theta_i * c
            level = abs(shift) if name == "quasi" and var == column else 0.0
            np.testing.assert_allclose(got, expected, rtol=0, atol=atol * (spread + level),
                                       err_msg=f"{name}.{var}")


@settings(max_examples=examples(25), deadline=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(
    seed=st.integers(0, 2**31 - 1),
    column=st.sampled_from(VARIABLES),
    sd_multiple=st.floats(1.0, 12.0).map(lambda e: 10.0**e),
    sign=st.sampled_from([-1.0, 1.0]),
)
def test_shift_changes_nothing_but_the_level(seed, column, sd_multiple, sign):
    frame = _panel(seed, n_entities=20, n_periods=6)
    base = _prepare(frame)
    shift = sign * sd_multiple * float(frame[column].std())
    moved_frame = frame.assign(**{column: frame[column] + shift})
    moved = _prepare(moved_frame)
    # x + c carries only eps |c| of x: the data themselves moved by that much
    rtol = 1e-8 + 200 * EPS * sd_multiple
    assert moved.verdict == base.verdict
    assert _finding_key(moved.summary) == _finding_key(base.summary)
    a, b = moved.components, base.components
    assert _close(a.sigma2_entity_, b.sigma2_entity_, rtol, atol=rtol * b.sigma2_idiosyncratic_)
    assert _close(a.sigma2_idiosyncratic_, b.sigma2_idiosyncratic_, rtol)
    np.testing.assert_allclose(a.theta_, b.theta_, rtol=0, atol=rtol)
    for name, value in _statistics(base.summary).items():
        assert _close(_statistics(moved.summary)[name], value, 1e3 * rtol, atol=1e3 * rtol), name
    # the moved column of every file, shifted back, to the rounding of x + c
    actual_shift = float((moved_frame[column] - frame[column]).mean())
    _assert_tables(base, moved, frame, column, actual_shift, 1.0, atol=rtol * 10 + 1e-9)


@settings(max_examples=examples(25), deadline=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(
    seed=st.integers(0, 2**31 - 1),
    column=st.sampled_from(VARIABLES),
    power=st.integers(-300, 300),
)
def test_scaling_by_a_power_of_ten_scales_and_changes_nothing_else(seed, column, power):
    frame = _panel(seed, n_entities=20, n_periods=6)
    base = _prepare(frame)
    factor = 10.0**power
    moved = _prepare(frame.assign(**{column: frame[column] * factor}))
    rtol = 1e-9
    assert moved.verdict == base.verdict
    assert _finding_key(moved.summary) == _finding_key(base.summary)
    a, b = moved.components, base.components
    unit = factor if column == "y" else 1.0
    assert _close(a.sigma_entity_, b.sigma_entity_ * unit, rtol,
                  atol=rtol * b.sigma_idiosyncratic_ * unit)
    assert _close(a.sigma_idiosyncratic_, b.sigma_idiosyncratic_ * unit, rtol)
    np.testing.assert_allclose(a.theta_, b.theta_, rtol=0, atol=1e-10)
    for name, value in _statistics(base.summary).items():
        assert _close(_statistics(moved.summary)[name], value, 1e-7, atol=1e-7), name
    # a variance outside float64's normal range is null with a finding, never a silent 0
    reported = moved.summary["components"]["sigma2_entity"]
    if b.sigma2_entity_ > 0:
        true_log10 = np.log10(b.sigma2_entity_) + 2 * np.log10(unit)
        normal = np.log10(np.finfo(float).tiny) < true_log10 < np.log10(np.finfo(float).max)
        if reported is None:
            assert "variance-beyond-float-range" in {f["id"] for f in moved.summary["findings"]}
            # only at the edge of the range may the two roundings disagree
            assert not normal or min(abs(true_log10 - np.log10(np.finfo(float).tiny)),
                                     abs(true_log10 - np.log10(np.finfo(float).max))) < 1e-6
        else:
            assert _close(np.log10(reported), true_log10, 0.0, atol=1e-8)
    else:
        assert reported == 0.0
    _assert_tables(base, moved, frame, column, 0.0, factor, atol=1e-9)


def test_the_reported_case_a_regressor_shifted_by_3e7():
    """The reported case: + 3e7 on x2 gave an entity variance 26 % low, with no finding."""
    frame = _panel(7, n_entities=20, n_periods=6)
    base = _prepare(frame).components
    for shift in (1e7, 3e7, 1e8, 1e10):
        moved = _prepare(frame.assign(x2=frame["x2"] + shift)).components
        assert moved.sigma2_entity_ == pytest.approx(base.sigma2_entity_, rel=1e-5), shift
        # x3 is time-invariant in both; nothing else is dropped or under-identified
        assert [f["id"] for f in moved.findings_] == ["regressor-dropped-within"]
        assert moved.dropped_within_ == base.dropped_within_ == ["x3"]


def _write(path, frame: pd.DataFrame) -> None:
    frame.to_csv(path, index=False, float_format="%.17g")


def _components_cli(path, *extra) -> subprocess.CompletedProcess:
    return subprocess.run([*COMMAND, "components", str(path), "-e", "firm", "-t", "year",
                           "--y", "y", "--x", "x1,x2", "--json", *extra],
                          capture_output=True, text=True, timeout=120, check=False)


def test_cli_components_and_gate_do_not_move_with_a_large_shift(tmp_path):
    frame = _panel(11, n_entities=20, n_periods=6).drop(columns="x3")
    _write(tmp_path / "base.csv", frame)
    _write(tmp_path / "shifted.csv", frame.assign(x2=frame["x2"] + 1e10))
    base, shifted = _components_cli(tmp_path / "base.csv"), _components_cli(tmp_path / "shifted.csv")
    assert base.returncode == shifted.returncode == 0, shifted.stderr
    a, b = json.loads(shifted.stdout), json.loads(base.stdout)
    assert a["sigma2_entity"] == pytest.approx(b["sigma2_entity"], rel=1e-5)
    assert a["sigma2_idiosyncratic"] == pytest.approx(b["sigma2_idiosyncratic"], rel=1e-5)
    # the audit too: + 1e10 once gave 'x2 never changes within an entity'
    findings = {}
    for name in ("base", "shifted"):
        done = subprocess.run([*COMMAND, "audit", str(tmp_path / f"{name}.csv"), "-e", "firm",
                               "-t", "year", "--vars", "y,x1,x2",
                               "--report", str(tmp_path / f"{name}.json")],
                              capture_output=True, text=True, timeout=120, check=False)
        assert done.returncode == 0, done.stdout + done.stderr
        report = json.loads((tmp_path / f"{name}.json").read_text(encoding="utf-8"))
        findings[name] = sorted((f["id"], f["severity"], f["count"]) for f in report["findings"])
    assert findings["shifted"] == findings["base"]
    assert "var-fixed-within" not in {fid for fid, _, _ in findings["shifted"]}


def test_cli_tiny_values_keep_theta(tmp_path):
    """All variables times 1e-300 once gave s2 = 0 and theta = 0 (0.74 unscaled)."""
    frame = _panel(3, n_entities=20, n_periods=6).drop(columns="x3")
    _write(tmp_path / "base.csv", frame)
    tiny = frame.assign(**{v: frame[v] * 1e-300 for v in ("y", "x1", "x2")})
    _write(tmp_path / "tiny.csv", tiny)
    base, scaled = _components_cli(tmp_path / "base.csv"), _components_cli(tmp_path / "tiny.csv")
    assert base.returncode == 0 and scaled.returncode == 0, scaled.stderr
    a, b = json.loads(scaled.stdout), json.loads(base.stdout)
    assert b["theta"]["median"] > 0.1
    assert a["theta"]["median"] == pytest.approx(b["theta"]["median"], abs=1e-10)
    assert a["sigma_entity"] == pytest.approx(b["sigma_entity"] * 1e-300, rel=1e-9)
    # s2 ~ 1e-600 is below float64: null and said so, never a silent 0
    assert a["sigma2_entity"] is None
    assert "variance-beyond-float-range" in {f["id"] for f in a["findings"]}


def test_cli_components_applies_the_gate_to_an_underidentified_fit(tmp_path):
    """One period: no within degrees of freedom; two entities: no between ones."""
    one_period = pd.DataFrame({"firm": ["a", "b", "c", "d"], "year": [2020] * 4,
                               "y": [1.0, 2.0, 4.0, 3.5], "x1": [0.5, 1.0, 3.0, 1.5],
                               "x2": [1.0, 0.0, 2.0, 5.0]})
    _write(tmp_path / "one_period.csv", one_period)
    two_entities = pd.DataFrame({"firm": ["a"] * 4 + ["b"] * 4, "year": list(range(4)) * 2,
                                 "y": [1.0, 2.5, 2.0, 4.0, 3.0, 5.5, 4.0, 6.0],
                                 "x1": [0.1, 0.9, 0.4, 1.6, 0.2, 1.1, 0.3, 2.0],
                                 "x2": [1.0, 0.5, 0.7, 0.1, 1.2, 0.2, 0.9, 0.4]})
    _write(tmp_path / "two.csv", two_entities)
    for name in ("one_period.csv", "two.csv"):
        done = subprocess.run([*COMMAND, "components", str(tmp_path / name), "-e", "firm", "-t",
                               "year", "--y", "y", "--x", "x1,x2"],
                              capture_output=True, text=True, timeout=120, check=False)
        assert done.returncode == 1, (name, done.stdout, done.stderr)
        assert "components-underidentified" in done.stderr
        assert done.stdout == ""
