"""Tests of panelprep.evidence: entity-effect LM, Mundlak and Hausman tests, reading."""

from __future__ import annotations

import json
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from statsmodels.datasets import grunfeld

from panelprep._linalg import ols
from panelprep.evidence import (
    CAUTION,
    collect_evidence,
    entity_effect_lm,
    hausman_test,
    mundlak_test,
    read_evidence,
)


def _codes_counts(labels: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    codes = pd.factorize(labels, sort=True)[0].astype(np.int64)
    return codes, np.bincount(codes).astype(np.int64)


@pytest.fixture(scope="module")
def grunfeld_panel():
    data = grunfeld.load_pandas().data
    data = data[data["firm"] != "American Steel"].reset_index(drop=True)
    codes, counts = _codes_counts(data["firm"].to_numpy())
    y = data["invest"].to_numpy(np.float64)
    X = data[["value", "capital"]].to_numpy(np.float64)
    return y, X, codes, counts


def _balanced_swamy_arora(y, X_varying, X_all, codes, n_groups, T):
    """Swamy-Arora components on a balanced panel, computed densely with statsmodels.

    s2_e = SSR(LSDV with entity dummies) / (n - G - k_v);
    s2_1 = T * SSR(between regression of entity means, with constant) / (G - rank);
    s2_u = (s2_1 - s2_e) / T;  theta = 1 - sqrt(s2_e / s2_1).
    """
    dummies = np.eye(n_groups)[codes]
    lsdv = sm.OLS(y, np.column_stack([X_varying, dummies])).fit()
    s2_e = lsdv.ssr / lsdv.df_resid
    frame = pd.DataFrame(X_all).assign(y=y, g=codes).groupby("g").mean()
    between = sm.OLS(frame["y"].to_numpy(), sm.add_constant(frame.drop(columns="y").to_numpy()))
    between = between.fit()
    s2_1 = T * between.ssr / between.df_resid
    s2_u = (s2_1 - s2_e) / T
    theta = 1.0 - np.sqrt(s2_e / s2_1)
    return s2_u, s2_e, theta, lsdv


def _dense_hausman(y, X, codes, n_groups, s2_u, s2_e, varying, pinv=False):
    """Hausman contrast from statsmodels: LSDV for the within slopes and dense GLS
    with Omega = s2_e I + s2_u D D' for random effects.  (X'Omega^-1 X)^-1 equals
    s2_e (X*'X*)^-1 of the quasi-demeaned regression, so V_re here is the same
    quantity as in panelprep, reached without any quasi-demeaning."""
    dummies = np.eye(n_groups)[codes]
    lsdv = sm.OLS(y, np.column_stack([X[:, varying], dummies])).fit()
    omega = s2_e * np.eye(len(y)) + s2_u * dummies @ dummies.T
    gls = sm.GLS(y, sm.add_constant(X), sigma=omega).fit()
    kv = int(np.count_nonzero(varying))
    d = lsdv.params[:kv] - gls.params[1:][varying]
    v_w = s2_e * lsdv.normalized_cov_params[:kv, :kv]
    idx = 1 + np.flatnonzero(varying)
    v_re = gls.normalized_cov_params[np.ix_(idx, idx)]
    diff = v_w - v_re
    inv = np.linalg.pinv(diff, rcond=1e-8, hermitian=True) if pinv else np.linalg.inv(diff)
    return float(d @ inv @ d)


def _balanced_sim(rng, n_groups, T, k, corr=0.0):
    codes = np.repeat(np.arange(n_groups), T)
    counts = np.full(n_groups, T, dtype=np.int64)
    X = rng.normal(size=(n_groups * T, k)) + rng.normal(size=(n_groups, k))[codes]
    # corr > 0 builds the entity effect from the entity means of the regressors.
    x_bar = pd.DataFrame(X).groupby(codes).mean().to_numpy()
    u = rng.normal(size=n_groups) + corr * x_bar.sum(axis=1)
    y = X @ np.linspace(1.0, -0.5, k) + u[codes] + rng.normal(size=n_groups * T)
    return y, X, codes, counts


# --- entity-effect LM --------------------------------------------------------------


def test_grunfeld_lm_published_values(grunfeld_panel):
    y, X, codes, counts = grunfeld_panel
    pooled = ols(y, np.column_stack([np.ones(len(y)), X]))
    out = entity_effect_lm(pooled.resid, codes, counts)
    # Baltagi, Econometric Analysis of Panel Data, Grunfeld example (values from memory).
    assert round(out["breusch_pagan"]["statistic"], 2) == 798.16
    assert round(out["honda"]["statistic"], 2) == 28.25
    assert out["breusch_pagan"]["df"] == 1
    assert out["breusch_pagan"]["p_value"] < 1e-100
    assert out["honda"]["p_value"] < 1e-100


def test_grunfeld_lm_textbook_balanced_formula(grunfeld_panel):
    y, X, codes, counts = grunfeld_panel
    resid = sm.OLS(y, sm.add_constant(X)).fit().resid
    # Balanced Breusch-Pagan (1980) formula, statsmodels residuals and pandas group sums.
    N, T = len(counts), int(counts[0])
    sums = pd.Series(resid).groupby(codes).sum().to_numpy()
    a = (sums**2).sum() / (resid**2).sum() - 1.0
    expected = N * T / (2.0 * (T - 1)) * a**2
    out = entity_effect_lm(resid, codes, counts)
    assert out["breusch_pagan"]["statistic"] == pytest.approx(expected, rel=1e-12)
    assert out["honda"]["statistic"] == pytest.approx(np.sqrt(N * T / (2.0 * (T - 1))) * a)


def test_unbalanced_lm_against_dense_groupby():
    rng = np.random.default_rng(11)
    sizes = rng.integers(1, 8, size=40)
    codes = np.repeat(np.arange(40), sizes)
    counts = sizes.astype(np.int64)
    n = len(codes)
    X = rng.normal(size=(n, 2))
    y = X @ [0.5, 1.0] + 0.7 * rng.normal(size=40)[codes] + rng.normal(size=n)
    resid = sm.OLS(y, sm.add_constant(X)).fit().resid
    # Baltagi and Li (1990) unbalanced form, computed directly with pandas groupby.
    frame = pd.DataFrame({"e": resid, "g": codes})
    sums = frame.groupby("g")["e"].sum()
    t_i = frame.groupby("g")["e"].size()
    a = (sums**2).sum() / (resid**2).sum() - 1.0
    factor = n**2 / (2.0 * (t_i * (t_i - 1)).sum())
    out = entity_effect_lm(resid, codes, counts)
    assert out["breusch_pagan"]["statistic"] == pytest.approx(factor * a**2, rel=1e-12)
    assert out["honda"]["statistic"] == pytest.approx(np.sqrt(factor) * a, rel=1e-12)
    # chi2(1) and upper normal tail from scipy's own distributions, by another route:
    # P(chi2_1 > h^2) = 2 * P(Z > |h|).
    h = out["honda"]["statistic"]
    assert out["breusch_pagan"]["p_value"] == pytest.approx(
        2.0 * min(out["honda"]["p_value"], 1.0 - out["honda"]["p_value"]), rel=1e-9
    )
    assert (out["honda"]["p_value"] < 0.5) == (h > 0)


# --- Mundlak and Hausman -----------------------------------------------------------


@pytest.mark.parametrize("case", ["two varying", "with time-invariant", "with trend"])
def test_mundlak_conventional_equals_hausman_balanced(case):
    # Identity (Hausman 1978; Hausman and Taylor 1981; common practice): on a balanced
    # panel the conventional Wald test on the means in the quasi-demeaned regression
    # equals the Hausman contrast.  It is EXACT under this form: Swamy-Arora components,
    # s2_e = SSR_within / (n - G - k_v), s2_1 = T * SSR_between / (G - k - 1),
    # theta = 1 - sqrt(s2_e / s2_1); Hausman uses that same s2_e in V_w and V_re; the
    # Mundlak covariance uses s2 = SSR / (n - p), p = 1 + k + k_v.  Then
    # SSR_aug = SSR_within + (1 - theta)^2 SSR_between = s2_e (n - p), so the two
    # variance estimates coincide and the statistics agree to rounding.
    rng = np.random.default_rng(5)
    n_groups, T = 30, 6
    y, X, codes, counts = _balanced_sim(rng, n_groups, T, 2, corr=0.3)
    names = ["x1", "x2"]
    if case == "with time-invariant":
        X[:, 1] = rng.normal(size=n_groups)[codes]
        names = ["x1", "z"]
    elif case == "with trend":
        # Entity means of a period trend are equal across entities on a balanced
        # panel: random effects gains no between information on it, V_w - V_re is
        # singular, and the mean of the trend is collinear with the constant.
        X[:, 1] = np.tile(np.arange(T, dtype=np.float64), n_groups)
        names = ["x1", "trend"]
    varying = np.array([True, case != "with time-invariant"])
    s2_u, s2_e, theta, _ = _balanced_swamy_arora(y, X[:, varying], X, codes, n_groups, T)
    assert s2_u > 0
    expected = _dense_hausman(
        y, X, codes, n_groups, s2_u, s2_e, varying, pinv=case == "with trend"
    )
    mund = mundlak_test(y, X, codes, counts, theta, names, cluster=False)
    haus = hausman_test(y, X, codes, counts, s2_u, s2_e, theta, names=names)
    assert mund["covariance"] == "conventional"
    assert "does not match" not in haus["note"]
    assert mund["statistic"] == pytest.approx(expected, rel=1e-6)
    assert haus["statistic"] == pytest.approx(expected, rel=1e-6)
    if case == "two varying":
        assert mund["df"] == haus["df"] == 2
        assert haus["positive_definite"] is True
    elif case == "with time-invariant":
        assert mund["time_invariant"] == ["z"]
        assert mund["tested"] == ["x1"] and haus["tested"] == ["x1"]
        assert mund["df"] == haus["df"] == 1
    else:
        assert haus["positive_definite"] is False
        assert haus["df"] == 1 and haus["tested"] == ["x1", "trend"]
        assert "not positive definite" in haus["note"]
        assert mund["tested"] == ["x1"] and "trend" in mund["note"]


def test_mundlak_clustered_against_statsmodels():
    rng = np.random.default_rng(8)
    sizes = rng.integers(2, 9, size=45)
    n_groups = len(sizes)
    codes = np.repeat(np.arange(n_groups), sizes)
    counts = sizes.astype(np.int64)
    n = len(codes)
    a = rng.normal(size=n_groups)
    x1 = rng.normal(size=n) + a[codes]
    x2 = rng.normal(size=n) * (1 + 0.5 * np.abs(a[codes]))
    z = rng.normal(size=n_groups)[codes]
    X = np.column_stack([x1, x2, z])
    y = X @ [1.0, 0.5, -1.0] + (0.4 * a + rng.normal(size=n_groups))[codes] + rng.normal(size=n)
    theta_g = 1.0 - np.sqrt(1.0 / (counts * 0.8 + 1.0))
    # statsmodels OLS on the augmented quasi-demeaned design built with pandas, entity
    # clustered covariance (its default correction G/(G-1) * (n-1)/(n-p), the same as
    # panelprep's) and its chi2 Wald test.
    frame = pd.DataFrame({"y": y, "x1": x1, "x2": x2, "z": z, "g": codes})
    mean = frame.groupby("g")[["y", "x1", "x2", "z"]].transform("mean")
    th = theta_g[codes]
    design = np.column_stack(
        [
            1.0 - th,
            *(frame[c] - th * mean[c] for c in ["x1", "x2", "z"]),
            (1.0 - th) * mean["x1"],
            (1.0 - th) * mean["x2"],
        ]
    )
    fit = sm.OLS(frame["y"] - th * mean["y"], design).fit(
        cov_type="cluster", cov_kwds={"groups": codes}
    )
    R = np.zeros((2, design.shape[1]))
    R[0, 4] = R[1, 5] = 1.0
    expected = float(np.squeeze(fit.wald_test(R, use_f=False, scalar=True).statistic))
    out = mundlak_test(y, X, codes, counts, theta_g, ["x1", "x2", "z"])
    assert out["covariance"] == "entity-clustered"
    assert out["tested"] == ["x1", "x2"] and out["time_invariant"] == ["z"]
    assert out["df"] == 2
    assert out["statistic"] == pytest.approx(expected, rel=1e-8)
    # chi2 tail from statsmodels' own Wald result.
    assert out["p_value"] == pytest.approx(
        float(fit.wald_test(R, use_f=False, scalar=True).pvalue), rel=1e-6
    )


def _fast_swamy_arora_theta(y, x, codes, n_groups, T):
    """Balanced Swamy-Arora theta for one regressor, with numpy (simulation helper)."""
    n = len(y)
    xm = np.bincount(codes, x, n_groups) / T
    ym = np.bincount(codes, y, n_groups) / T
    xd, yd = x - xm[codes], y - ym[codes]
    b = (xd @ yd) / (xd @ xd)
    s2_e = ((yd - b * xd) ** 2).sum() / (n - n_groups - 1)
    B = np.column_stack([np.ones(n_groups), xm])
    coef = np.linalg.lstsq(B, ym, rcond=None)[0]
    s2_1 = T * ((ym - B @ coef) ** 2).sum() / (n_groups - 2)
    s2_u = max((s2_1 - s2_e) / T, 0.0)
    return 1.0 - np.sqrt(s2_e / (T * s2_u + s2_e))


@pytest.mark.parametrize(("corr", "low", "high"), [(0.0, 0.01, 0.11), (1.0, 0.95, 1.0)])
def test_mundlak_simulated_size_and_power(corr, low, high):
    # Nominal size of a 5% test (common practice): with u_i independent of x the
    # rejection rate over 200 replications lies in a generous binomial band (the
    # binomial(200, 0.05) sd is 1.5 points); with u_i built from the entity mean of x
    # the test rejects almost always.
    rng = np.random.default_rng(2024 if corr == 0.0 else 7)
    n_groups, T, reps = 50, 5, 200
    rejections = 0
    for _ in range(reps):
        y, X, codes, counts = _balanced_sim(rng, n_groups, T, 1, corr=corr)
        theta = _fast_swamy_arora_theta(y, X[:, 0], codes, n_groups, T)
        out = mundlak_test(y, X, codes, counts, theta, ["x"])
        rejections += out["p_value"] < 0.05
    assert low <= rejections / reps <= high


# --- edge cases --------------------------------------------------------------------


def _no_nan(obj) -> None:
    json.dumps(obj, allow_nan=False)


def test_all_singletons_give_notes_not_nan():
    rng = np.random.default_rng(3)
    n = 25
    codes = np.arange(n)
    counts = np.ones(n, dtype=np.int64)
    X = rng.normal(size=(n, 2))
    y = X @ [1.0, 2.0] + rng.normal(size=n)
    comps = SimpleNamespace(sigma2_entity_=0.0, sigma2_idiosyncratic_=1.0, theta_=np.zeros(n))
    out = collect_evidence(y, X, codes, counts, comps, ["a", "b"])
    _no_nan(out)
    assert out["breusch_pagan"]["statistic"] is None
    assert out["honda"]["p_value"] is None
    assert "single row" in out["breusch_pagan"]["note"]
    assert out["mundlak"]["statistic"] is None and out["mundlak"]["note"]
    assert out["mundlak"]["time_invariant"] == ["a", "b"]
    assert out["hausman"]["statistic"] is None and "nothing to contrast" in out["hausman"]["note"]
    assert out["reading"][-1] == CAUTION == out["caution"]
    assert "no estimator in particular" in out["reading"][-2]


def test_exact_pooled_fit_gives_note_not_nan():
    rng = np.random.default_rng(12)
    codes = np.repeat(np.arange(10), 4)
    counts = np.full(10, 4, dtype=np.int64)
    X = rng.normal(size=(40, 2)) * 1e3
    y = 3.0 + X @ [2.0, -1.0]
    theta = np.full(10, 0.3)
    comps = SimpleNamespace(sigma2_entity_=1.0, sigma2_idiosyncratic_=1.0, theta_=theta)
    out = collect_evidence(y, X, codes, counts, comps, ["a", "b"])
    _no_nan(out)
    assert out["breusch_pagan"]["statistic"] is None
    assert "fits exactly" in out["honda"]["note"]
    assert out["mundlak"]["statistic"] is None and "fits exactly" in out["mundlak"]["note"]
    assert out["hausman"]["statistic"] is None and "fits exactly" in out["hausman"]["note"]


def test_singleton_entities_mixed_in_are_fine():
    rng = np.random.default_rng(4)
    sizes = np.array([1, 1, 1] + [5] * 20)
    codes = np.repeat(np.arange(len(sizes)), sizes)
    n = len(codes)
    X = rng.normal(size=(n, 1)) + rng.normal(size=len(sizes))[codes][:, None]
    y = X[:, 0] + rng.normal(size=len(sizes))[codes] + rng.normal(size=n)
    theta = 1.0 - np.sqrt(1.0 / (sizes + 1.0))
    out = mundlak_test(y, X, codes, sizes, theta, ["x"], cluster=False)
    _no_nan(out)
    assert out["df"] == 1 and np.isfinite(out["statistic"])


def test_hausman_not_positive_definite_has_note_and_no_nan():
    # A period trend on a balanced panel: no between information, so V_w - V_re is
    # singular in the trend direction (see the identity test for the value itself).
    rng = np.random.default_rng(9)
    n_groups, T = 20, 4
    y, X, codes, counts = _balanced_sim(rng, n_groups, T, 2)
    X[:, 1] = np.tile(np.arange(T, dtype=np.float64), n_groups)
    theta = np.full(n_groups, 1.0 - np.sqrt(1.0 / (T * 1.0 + 1.0)))
    out = hausman_test(y, X, codes, counts, 1.0, 1.0, theta, names=["x", "t"])
    _no_nan(out)
    assert out["positive_definite"] is False
    assert out["df"] == 1
    assert "generalised inverse" in out["note"]
    assert "same idiosyncratic variance" in out["note"]
    assert "does not match" not in out["note"]


def test_hausman_flags_theta_inconsistent_with_components():
    rng = np.random.default_rng(10)
    n_groups, T = 20, 4
    y, X, codes, counts = _balanced_sim(rng, n_groups, T, 1)
    # theta_i = 1 - sqrt(s2_e / (T s2_u + s2_e)) = 1 - sqrt(1/5) for s2_u = s2_e = 1, T = 4
    # (the random-effects weight, common practice); 0.5 is not it.
    good = hausman_test(y, X, codes, counts, 1.0, 1.0, 1.0 - np.sqrt(0.2))
    bad = hausman_test(y, X, codes, counts, 1.0, 1.0, 0.5)
    assert "does not match" not in good["note"]
    assert "does not match" in bad["note"]
    _no_nan(bad)


def test_collect_evidence_grunfeld_json_and_reading(grunfeld_panel):
    y, X, codes, counts = grunfeld_panel
    s2_u, s2_e, theta, _ = _balanced_swamy_arora(y, X, X, codes, len(counts), 20)
    comps = SimpleNamespace(sigma2_entity_=s2_u, sigma2_idiosyncratic_=s2_e, theta_=theta)
    out = collect_evidence(y, X, codes, counts, comps, ["value", "capital"])
    text = json.dumps(out, allow_nan=False)
    assert set(json.loads(text)) == {
        "breusch_pagan",
        "honda",
        "mundlak",
        "hausman",
        "reading",
        "caution",
    }
    # Same published values as above (values from memory), via the full path.
    assert round(out["breusch_pagan"]["statistic"], 2) == 798.16
    assert out["hausman"]["positive_definite"] is True
    assert out["reading"][-1] == CAUTION
    assert "entity effects" in out["reading"][0]


def test_grunfeld_hausman_published_value(grunfeld_panel):
    y, X, codes, counts = grunfeld_panel
    s2_u, s2_e, theta, _ = _balanced_swamy_arora(y, X, X, codes, len(counts), 20)
    # Swamy-Arora entity-effect SD 84.20, idiosyncratic SD 52.77 and Hausman = 2.13 on 2 df (Baltagi,
    # Econometric Analysis of Panel Data, Grunfeld example; values from memory).  The
    # components check the test-side inputs, the statistics check panelprep.
    assert round(float(np.sqrt(s2_u)), 2) == 84.20
    assert round(float(np.sqrt(s2_e)), 2) == 52.77
    haus = hausman_test(y, X, codes, counts, s2_u, s2_e, theta)
    assert round(haus["statistic"], 2) == 2.13 and haus["df"] == 2
    mund = mundlak_test(y, X, codes, counts, theta, ["value", "capital"], cluster=False)
    assert round(mund["statistic"], 2) == 2.13


# --- reading -----------------------------------------------------------------------


def _block(p, **extra):
    return {"statistic": 3.0, "df": 1, "p_value": p, **extra}


@pytest.mark.parametrize(
    ("bp_p", "m_p", "h_p", "choice"),
    [
        (0.001, 0.001, 0.001, "fixed effects"),
        (0.001, 0.40, 0.40, "random effects"),
        (0.40, 0.40, 0.40, "pooled OLS"),
        (0.001, 0.001, 0.40, "fixed effects"),
        (0.40, 0.001, 0.001, "fixed effects"),
        (0.001, None, 0.40, "random effects"),
    ],
)
def test_reading_points_to_estimator(bp_p, m_p, h_p, choice):
    evidence = {
        "breusch_pagan": _block(bp_p),
        "honda": _block(bp_p),
        "mundlak": _block(m_p, covariance="entity-clustered", note="n/a"),
        "hausman": _block(h_p, positive_definite=True),
    }
    lines = read_evidence(evidence)
    assert lines[-1] == CAUTION
    assert lines[-2].startswith("Overall, the evidence points to " + choice)
    assert "5%" in lines[0]
    if m_p is not None and (m_p < 0.05) != (h_p < 0.05):
        assert any("disagree" in line for line in lines)


def test_caution_mentions_clustering_and_data_generation():
    assert "clustered by entity" in CAUTION
    assert "how the" in CAUTION and "generated" in CAUTION
    assert "not a verdict" in CAUTION
