"""Tests of the error-structure evidence: Wooldridge, Born-Breitung and Pesaran CD.

Outside references: statsmodels OLS with cluster-robust covariance on the
explicit first-difference regressions (lags found by a pandas merge on
(entity, period - 1), not by panelprep), statsmodels LSDV residuals and pandas
group sums for the Born-Breitung moment, a direct numpy loop over entity pairs
for CD, and simulated panels with known AR(1) errors and known common shocks
for size and power.
"""

from __future__ import annotations

import json
import math
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from panelprep import dependence
from panelprep.dependence import (
    born_breitung_lm,
    panel_steps,
    pesaran_cd,
    read_error_structure,
    standard_error_advice,
)
from panelprep.evidence import CAUTION, collect_evidence, error_structure


def _panel(rng, n_entities, n_periods, rho=0.0, shock=0.0, hole_share=0.0, k=2,
           shuffle=False):
    """y = x b + c_i + u_it, u AR(1) with coefficient rho plus a common shock f_t * g_i.

    The entity effect is correlated with the regressors' entity means.  A
    share of rows is then dropped at random (holes), and the rows may be
    shuffled so that nothing relies on their order.
    """
    entity = np.repeat(np.arange(n_entities), n_periods)
    period = np.tile(np.arange(n_periods), n_entities)
    x_level = rng.normal(size=(n_entities, k))
    X = x_level[entity] + rng.normal(size=(len(entity), k))
    effect = x_level.sum(axis=1) + rng.normal(size=n_entities)
    innovations = rng.normal(size=(n_entities, n_periods + 20))
    u = np.zeros_like(innovations)
    for t in range(1, innovations.shape[1]):    # loop over periods of the simulation only
        u[:, t] = rho * u[:, t - 1] + innovations[:, t]
    u = u[:, 20:].reshape(-1)
    common = rng.normal(size=n_periods)
    loading = rng.uniform(0.5, 1.5, size=n_entities)
    y = X @ np.linspace(1.0, -0.5, k) + effect[entity] + u + shock * common[period] * loading[entity]
    keep = rng.random(len(entity)) >= hole_share
    entity, period, X, y = entity[keep], period[keep], X[keep], y[keep]
    # re-densify entity codes (an entity may have lost every row)
    entity = pd.factorize(entity, sort=True)[0].astype(np.int64)
    period = period - period.min()
    if shuffle:
        order = rng.permutation(len(y))
        entity, period, X, y = entity[order], period[order], X[order], y[order]
    return y, X, entity, period, np.bincount(entity)


# --- Wooldridge against statsmodels on the explicit regressions -------------------


def _statsmodels_wooldridge(y, X, entity, period):
    """The two regressions of Wooldridge's test written out with pandas and statsmodels."""
    k = X.shape[1]
    cols = [f"x{j}" for j in range(k)]
    frame = pd.DataFrame(X, columns=cols).assign(y=y, entity=entity, period=period)
    lagged = frame.assign(period=frame["period"] + 1)
    both = frame.merge(lagged, on=["entity", "period"], suffixes=("", "_lag"))
    dy = both["y"] - both["y_lag"]
    dX = np.column_stack([both[c] - both[f"{c}_lag"] for c in cols])
    first = sm.OLS(dy.to_numpy(), sm.add_constant(dX, has_constant="add")).fit()
    resid = both[["entity", "period"]].assign(r=first.resid)
    pairs = resid.merge(resid.assign(period=resid["period"] + 1), on=["entity", "period"],
                        suffixes=("", "_lag"))
    aux = sm.OLS(pairs["r"].to_numpy(), pairs["r_lag"].to_numpy()).fit(
        cov_type="cluster", cov_kwds={"groups": pairs["entity"].to_numpy()})
    return aux, len(both), len(pairs), pairs["entity"].nunique()


@pytest.mark.parametrize(("rho", "hole_share", "seed"), [(0.0, 0.0, 1), (0.3, 0.15, 2),
                                                          (-0.2, 0.3, 3)])
def test_wooldridge_matches_statsmodels_cluster_ols(rho, hole_share, seed):
    rng = np.random.default_rng(seed)
    y, X, entity, period, counts = _panel(rng, 40, 7, rho=rho, hole_share=hole_share,
                                          shuffle=True)
    out = error_structure(y, X, entity, counts, period)["wooldridge"]
    aux, n_diff, n_pairs, n_groups = _statsmodels_wooldridge(y, X, entity, period)
    # statsmodels OLS, cluster-robust covariance (G/(G-1) (N-1)/(N-K) correction)
    assert out["differences"] == n_diff and out["pairs"] == n_pairs
    assert out["entities"] == n_groups and out["df_denominator"] == n_groups - 1
    assert out["coefficient"] == pytest.approx(aux.params[0], rel=1e-9)
    assert out["std_error"] == pytest.approx(aux.bse[0], rel=1e-9)
    wald = aux.f_test((np.array([[1.0]]), np.array([-0.5])))
    assert out["statistic"] == pytest.approx(float(np.squeeze(wald.fvalue)), rel=1e-9)
    # statsmodels refers a clustered Wald test to F(1, G - 1) as well
    assert wald.df_denom == n_groups - 1
    assert out["p_value"] == pytest.approx(float(wald.pvalue), rel=1e-9)


def test_wooldridge_never_differences_across_a_hole():
    # entity 0 seen at 0, 1, 3, 4, 5: differences at 1, 4, 5 (not at 3, across the hole);
    # only (4, 5) is a pair of consecutive differences.  Entity 1 seen at 0..3: three
    # differences and two pairs.  (Rows already sorted, so sorted position = row.)
    entity = np.array([0, 0, 0, 0, 0, 1, 1, 1, 1])
    period = np.array([0, 1, 3, 4, 5, 0, 1, 2, 3])
    steps = panel_steps(entity, period)
    assert steps.order.tolist() == list(range(9))
    assert steps.follows.tolist() == [False, True, False, True, True,
                                      False, True, True, True]
    rng = np.random.default_rng(0)
    y, x = rng.normal(size=9), rng.normal(size=(9, 1))
    out = error_structure(y, x, entity, np.bincount(entity), period)["wooldridge"]
    assert out["differences"] == 6 and out["pairs"] == 3 and out["entities"] == 2


def test_wooldridge_rows_in_any_order_give_the_same_answer():
    rng = np.random.default_rng(5)
    y, X, entity, period, counts = _panel(rng, 30, 6, rho=0.2, hole_share=0.1)
    first = error_structure(y, X, entity, counts, period)
    order = rng.permutation(len(y))
    second = error_structure(y[order], X[order], entity[order], counts, period[order])
    for key in ("wooldridge", "born_breitung", "pesaran_cd"):
        assert second[key]["statistic"] == pytest.approx(first[key]["statistic"], rel=1e-9)


# --- Born-Breitung against an LSDV fit and pandas group sums ----------------------


def test_born_breitung_matches_lsdv_residuals_and_group_sums():
    rng = np.random.default_rng(8)
    y, X, entity, period, counts = _panel(rng, 25, 6, rho=0.3, hole_share=0.2)
    out = error_structure(y, X, entity, counts, period)["born_breitung"]
    # statsmodels OLS with entity dummies: its residuals are the within residuals
    dummies = (entity[:, None] == np.arange(len(counts))[None, :]).astype(float)
    resid = sm.OLS(y, np.column_stack([X, dummies])).fit().resid
    frame = pd.DataFrame({"entity": entity, "period": period, "e": resid})
    pairs = frame.merge(frame.assign(period=frame["period"] + 1), on=["entity", "period"],
                        suffixes=("", "_lag"))
    products = (pairs["e"] * pairs["e_lag"]).groupby(pairs["entity"]).sum()
    m = pairs.groupby("entity").size()
    per_entity = frame.groupby("entity").agg(T=("e", "size"), ss=("e", lambda v: (v**2).sum()))
    per_entity["products"] = products
    per_entity["m"] = m
    per_entity = per_entity.fillna(0.0)
    # the moment of the module docstring: sum of consecutive products + m_i/(T_i(T_i-1)) SS_i
    s = per_entity["products"] + per_entity["m"] / (per_entity["T"] * (per_entity["T"] - 1)) \
        * per_entity["ss"]
    expected = s.sum() / math.sqrt((s**2).sum())
    assert out["statistic"] == pytest.approx(expected, rel=1e-8)
    assert out["pairs"] == len(pairs)


def test_born_breitung_moment_is_unbiased_under_the_null_with_holes():
    # E[S_i] = 0 under serially independent errors, with holes: the average of sum_i S_i
    # over many draws of pure noise (no regressors) is near 0 relative to its spread.
    rng = np.random.default_rng(13)
    entity = np.repeat(np.arange(200), 5)
    period = np.tile(np.arange(5), 200)
    keep = rng.random(len(entity)) >= 0.25
    entity, period = entity[keep], period[keep]
    entity = pd.factorize(entity, sort=True)[0]
    counts = np.bincount(entity)
    steps = panel_steps(entity, period)
    stats = []
    for _ in range(200):
        e = rng.normal(size=len(entity)) * rng.uniform(0.5, 2.0, size=len(counts))[entity]
        within = e - (np.bincount(entity, e) / counts)[entity]
        stats.append(born_breitung_lm(within, entity, counts, steps)["statistic"])
    # the mean of 200 N(0,1) draws has sd 0.07; the uncorrected moment would sit near -9
    assert abs(np.mean(stats)) < 0.25
    assert 0.8 < np.std(stats) < 1.2


# --- Pesaran CD against a direct loop over pairs ----------------------------------


def _loop_cd(resid, entity, period, min_common=3):
    """CD by a numpy loop over pairs: each pair's correlation over its common periods."""
    series = {g: dict(zip(period[entity == g], resid[entity == g])) for g in np.unique(entity)}
    keys = sorted(series)
    total, pairs, rhos = 0.0, 0, []
    for a in range(len(keys)):
        for b in range(a + 1, len(keys)):
            common = sorted(set(series[keys[a]]) & set(series[keys[b]]))
            if len(common) < min_common:
                continue
            u = np.array([series[keys[a]][t] for t in common])
            v = np.array([series[keys[b]][t] for t in common])
            if np.ptp(u) == 0 or np.ptp(v) == 0:
                continue
            rho = np.corrcoef(u, v)[0, 1]
            total += math.sqrt(len(common)) * rho
            rhos.append(rho)
            pairs += 1
    return total / math.sqrt(pairs), pairs, float(np.mean(rhos))


@pytest.mark.parametrize(("hole_share", "block_cells"), [(0.0, None), (0.3, None), (0.3, 40)])
def test_cd_matches_a_loop_over_pairs(hole_share, block_cells, monkeypatch):
    if block_cells is not None:
        # blocks of 2 periods for 15 entities: the sums run over several period blocks
        monkeypatch.setattr(dependence, "_CD_BLOCK_CELLS", block_cells)
    rng = np.random.default_rng(21)
    n_entities, n_periods = 15, 9
    entity = np.repeat(np.arange(n_entities), n_periods)
    period = np.tile(np.arange(n_periods), n_entities)
    keep = rng.random(len(entity)) >= hole_share
    entity, period = entity[keep], period[keep]
    resid = rng.normal(size=len(entity)) + 0.4 * rng.normal(size=n_periods)[period]
    counts = np.bincount(entity)
    out = pesaran_cd(resid, entity, period, counts)
    expected, pairs, mean_rho = _loop_cd(resid, entity, period)
    assert out["method"] == ("per-period sums" if hole_share == 0 else
                             "pairs over common periods")
    assert out["pairs"] == pairs
    assert out["statistic"] == pytest.approx(expected, rel=1e-9)
    assert out["mean_correlation"] == pytest.approx(mean_rho, rel=1e-9)
    assert out["entity_cap"] is None
    if hole_share == 0:
        # the published normalisation sqrt(2 / (N (N - 1))) with all pairs used
        assert pairs == n_entities * (n_entities - 1) // 2


def test_cd_cap_uses_the_entities_with_most_rows(monkeypatch):
    rng = np.random.default_rng(4)
    sizes = np.array([3, 8, 5, 8, 2, 7, 6, 4, 8, 5])
    entity = np.repeat(np.arange(10), sizes)
    period = np.concatenate([rng.choice(10, size=s, replace=False) for s in sizes])
    resid = rng.normal(size=len(entity))
    monkeypatch.setattr(dependence, "CD_MAX_ENTITIES", 4)
    out = pesaran_cd(resid, entity, period, np.bincount(entity))
    # the four with most rows: 8, 8, 8 (codes 1, 3, 8) and 7 (code 5)
    chosen = np.isin(entity, [1, 3, 5, 8])
    expected, pairs, _ = _loop_cd(resid[chosen], entity[chosen], period[chosen])
    assert out["entity_cap"] == 4 and out["entities"] == 4 and out["entities_in_sample"] == 10
    assert out["pairs"] == pairs
    assert out["statistic"] == pytest.approx(expected, rel=1e-9)
    assert "capped" in out["basis"]


def test_cd_skips_pairs_with_too_few_common_periods_and_constant_series():
    # entity 2 shares only two periods with the others; entity 3 is constant
    entity = np.array([0] * 5 + [1] * 5 + [2] * 2 + [3] * 4)
    period = np.array([0, 1, 2, 3, 4] * 2 + [3, 4] + [0, 1, 2, 3])
    rng = np.random.default_rng(0)
    resid = rng.normal(size=len(entity))
    resid[entity == 3] = 0.25
    out = pesaran_cd(resid, entity, period, np.bincount(entity))
    assert out["pairs"] == 1
    expected, pairs, _ = _loop_cd(resid, entity, period)
    assert pairs == 1 and out["statistic"] == pytest.approx(expected, rel=1e-9)


# --- size and power with known errors ----------------------------------------------


def _rejection_rates(reps, seed, **panel):
    rng = np.random.default_rng(seed)
    hits = {"wooldridge": 0, "born_breitung": 0, "pesaran_cd": 0}
    for _ in range(reps):
        y, X, entity, period, counts = _panel(rng, **panel)
        out = error_structure(y, X, entity, counts, period)
        for key in hits:
            hits[key] += out[key]["p_value"] < 0.05
    return {key: value / reps for key, value in hits.items()}


@pytest.mark.parametrize("hole_share", [0.0, 0.15])
def test_size_without_serial_correlation_or_common_shocks(hole_share):
    rates = _rejection_rates(250, 31, n_entities=60, n_periods=8, hole_share=hole_share)
    # nominal 5%; the binomial sd over 250 draws is 1.4 points
    for key, rate in rates.items():
        assert 0.015 <= rate <= 0.095, (key, rate)


@pytest.mark.parametrize("hole_share", [0.0, 0.15])
def test_power_against_ar1_errors(hole_share):
    rates = _rejection_rates(100, 32, n_entities=60, n_periods=8, rho=0.4,
                             hole_share=hole_share)
    assert rates["wooldridge"] >= 0.8 and rates["born_breitung"] >= 0.8
    # AR(1) errors alone do not make entities move together
    assert rates["pesaran_cd"] <= 0.12


@pytest.mark.parametrize("hole_share", [0.0, 0.15])
def test_power_against_a_common_shock(hole_share):
    rates = _rejection_rates(100, 33, n_entities=40, n_periods=8, shock=0.5,
                             hole_share=hole_share)
    assert rates["pesaran_cd"] >= 0.9


# --- undefined cases, JSON, reading --------------------------------------------------


def _no_nan(obj) -> None:
    json.dumps(obj, allow_nan=False)


def test_duplicated_cells_give_notes():
    entity = np.array([0, 0, 0, 1, 1, 1])
    period = np.array([0, 1, 1, 0, 1, 2])
    y = np.arange(6.0) ** 2
    out = error_structure(y, np.arange(6.0)[:, None] % 2, entity, np.bincount(entity), period)
    for key in ("wooldridge", "born_breitung", "pesaran_cd"):
        assert out[key]["statistic"] is None and "share an entity and a period" in out[key]["note"]
    _no_nan(out)


def test_one_entity_gives_notes_not_a_statistic():
    rng = np.random.default_rng(3)
    entity, period = np.zeros(8, dtype=np.int64), np.arange(8)
    out = error_structure(rng.normal(size=8), rng.normal(size=(8, 1)), entity,
                          np.bincount(entity), period)
    for key in ("wooldridge", "born_breitung", "pesaran_cd"):
        assert out[key]["statistic"] is None and out[key]["note"], key
    _no_nan(out)


def test_two_periods_and_exact_fit_give_notes_not_nan():
    entity = np.repeat(np.arange(10), 2)
    period = np.tile(np.arange(2), 10)
    rng = np.random.default_rng(2)
    x = rng.normal(size=(20, 1))
    out = error_structure(rng.normal(size=20), x, entity, np.bincount(entity), period)
    assert out["wooldridge"]["statistic"] is None and out["wooldridge"]["note"]
    assert out["pesaran_cd"]["statistic"] is None and out["pesaran_cd"]["note"]
    _no_nan(out)
    entity = np.repeat(np.arange(10), 5)
    period = np.tile(np.arange(5), 10)
    x = rng.normal(size=(50, 1))
    y = 2.0 * x[:, 0] + rng.normal(size=10)[entity]
    exact = error_structure(y, x, entity, np.bincount(entity), period)
    for key in ("wooldridge", "born_breitung", "pesaran_cd"):
        assert exact[key]["statistic"] is None and "exactly" in exact[key]["note"]
    _no_nan(exact)


def test_collect_evidence_carries_the_three_tests_and_their_reading():
    rng = np.random.default_rng(9)
    y, X, entity, period, counts = _panel(rng, 50, 8, rho=0.5, shock=0.8, hole_share=0.1)
    comps = SimpleNamespace(sigma2_entity_=1.0, sigma2_idiosyncratic_=1.0, theta_=0.5)
    out = collect_evidence(y, X, entity, counts, comps, ["a", "b"], period_codes=period)
    _no_nan(out)
    assert {"wooldridge", "born_breitung", "pesaran_cd", "standard_errors"} <= set(out)
    text = " ".join(out["reading"])
    assert "Wooldridge" in text and "Born-Breitung" in text and "Pesaran CD" in text
    assert out["reading"][-1] == CAUTION
    assert out["reading"][-2] == out["standard_errors"]
    assert "serially correlated" in out["standard_errors"]
    assert "clustering by entity does not allow" in out["standard_errors"]
    without = collect_evidence(y, X, entity, counts, comps, ["a", "b"])
    assert "wooldridge" not in without and "standard_errors" not in without


def _test_block(p, **extra):
    return {"statistic": 2.0, "p_value": p, "note": None, "basis": "some pairs", **extra}


@pytest.mark.parametrize(("w_p", "cd_p", "serial", "dependent"), [
    (0.001, 0.5, "look serially correlated", "no evidence of cross-sectional"),
    (0.5, 0.001, "no evidence of serial correlation", "does not allow"),
    (None, None, "could not be tested", None),
])
def test_reading_of_outcomes_for_standard_errors(w_p, cd_p, serial, dependent):
    evidence = {
        "wooldridge": _test_block(w_p, coefficient=-0.2, df_denominator=40,
                                  note=None if w_p is not None else "too short"),
        "born_breitung": _test_block(w_p, note=None if w_p is not None else "too short"),
        "pesaran_cd": _test_block(cd_p, mean_correlation=0.1,
                                  note=None if cd_p is not None else "too short"),
    }
    advice = standard_error_advice(evidence, 0.05)
    assert serial in advice
    if dependent:
        assert dependent in advice
    lines = read_error_structure(evidence, 0.05)
    assert lines[-1] == advice
    assert len(lines) == 4
    assert standard_error_advice({}, 0.05) is None


# --- through prepare: JSON, text log and HTML report -------------------------------


def test_prepare_writes_the_three_tests_on_grunfeld(tmp_path):
    from statsmodels.datasets import grunfeld

    from panelprep.prepare import prepare

    frame = grunfeld.load_pandas().data
    frame = frame[frame["firm"] != "American Steel"].reset_index(drop=True)
    frame["year"] = frame["year"].astype(np.int64)
    # a hole: drop one firm-year, so a difference across it must not be formed
    frame = frame.drop(index=frame.index[(frame["firm"] == "Chrysler")
                                         & (frame["year"] == 1945)])
    data = tmp_path / "grunfeld.csv"
    frame[["firm", "year", "invest", "value", "capital"]].to_csv(data, index=False)
    prep = prepare(data, tmp_path / "out", entity="firm", time="year", y="invest",
                   x=["value", "capital"], transforms="within")
    assert prep.verdict == "pass"
    summary = json.loads((tmp_path / "out" / "diagnostics.json").read_text(encoding="utf-8"))
    evidence = summary["evidence"]
    entity = pd.factorize(frame["firm"], sort=True)[0]
    period = (frame["year"] - frame["year"].min()).to_numpy()
    y = frame["invest"].to_numpy(float)
    X = frame[["value", "capital"]].to_numpy(float)
    # Wooldridge: statsmodels cluster OLS on the explicit regressions (merge-built lags)
    aux, n_diff, n_pairs, _ = _statsmodels_wooldridge(y, X, entity, period)
    assert evidence["wooldridge"]["differences"] == n_diff == 200 - 10 - 2
    assert evidence["wooldridge"]["pairs"] == n_pairs
    assert evidence["wooldridge"]["coefficient"] == pytest.approx(aux.params[0], rel=1e-8)
    # CD: statsmodels LSDV residuals, numpy loop over the 45 pairs
    dummies = (entity[:, None] == np.arange(10)[None, :]).astype(float)
    resid = sm.OLS(y, np.column_stack([X, dummies])).fit().resid
    expected, pairs, _ = _loop_cd(resid, entity, period)
    assert evidence["pesaran_cd"]["pairs"] == pairs == 45
    assert evidence["pesaran_cd"]["method"] == "pairs over common periods"
    assert evidence["pesaran_cd"]["statistic"] == pytest.approx(expected, rel=1e-8)
    assert evidence["born_breitung"]["statistic"] is not None
    assert evidence["standard_errors"] in summary["cautions"]
    text = (tmp_path / "out" / "diagnostics.txt").read_text(encoding="utf-8")
    assert "Wooldridge's test on first differences" in text and "Pesaran CD = " in text
    assert "Born-Breitung LM = " in text
    html = (tmp_path / "out" / "report.html").read_text(encoding="utf-8")
    assert "Wooldridge serial correlation (F)" in html and "Pesaran CD cross-sectional" in html
    assert f"1, {evidence['wooldridge']['df_denominator']}" in html
