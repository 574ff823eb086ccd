"""Variance components and least squares, checked against outside sources.

Sources: Baltagi, Econometric Analysis of Panel Data, Table 2.1 (Grunfeld,
values from memory); statsmodels OLS/GLS with dummies; dense n x n traces in
numpy; balanced closed forms written out with pandas groupby; Monte Carlo.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from conftest import random_unbalanced_panel

from panelprep._groups import group_counts
from panelprep._linalg import cluster_cov, ols
from panelprep.components import METHODS, VarianceComponents, estimate_components
from panelprep.transforms import quasi, within


def grunfeld_arrays(frame: pd.DataFrame):
    codes, _ = pd.factorize(frame["firm"], sort=True)
    codes = codes.astype(np.int64)
    counts = group_counts(codes, int(codes.max()) + 1)
    return frame["invest"].to_numpy(), frame[["value", "capital"]].to_numpy(), codes, counts


# ---------------------------------------------------------------- Grunfeld


def test_grunfeld_swamy_arora_textbook_values(grunfeld):
    y, X, codes, counts = grunfeld_arrays(grunfeld)
    vc = estimate_components(y, X, codes, counts, names=["value", "capital"])
    out = vc.to_dict()
    # Baltagi, Econometric Analysis of Panel Data, Table 2.1, SWAR row (values from memory)
    assert round(out["sigma_entity"], 2) == 84.20
    assert round(out["sigma_idiosyncratic"], 2) == 52.77
    assert round(float(vc.theta_[0]), 4) == 0.8612
    assert np.ptp(vc.theta_) == 0.0  # balanced: one theta for all firms
    assert out["dropped_within"] == [] and out["findings"] == []


def test_grunfeld_random_effects_and_within_coefficients(grunfeld):
    y, X, codes, counts = grunfeld_arrays(grunfeld)
    vc = estimate_components(y, X, codes, counts)
    theta = vc.theta_
    design = np.column_stack([quasi(X, codes, counts, theta), 1.0 - theta[codes]])
    gls = np.linalg.lstsq(design, quasi(y, codes, counts, theta), rcond=None)[0]
    # Baltagi, Table 2.1, SWAR row (values from memory): value, capital, constant
    assert [round(gls[0], 4), round(gls[1], 4), round(gls[2], 2)] == [0.1098, 0.3081, -57.83]
    # outside check of the GLS step: statsmodels GLS with the dense covariance
    Z = np.eye(10)[codes]
    omega = vc.sigma2_idiosyncratic_ * np.eye(len(y)) + vc.sigma2_entity_ * (Z @ Z.T)
    ref = sm.GLS(y, np.column_stack([X, np.ones(len(y))]), sigma=omega).fit().params
    np.testing.assert_allclose(gls, ref, rtol=1e-9)

    fe = np.linalg.lstsq(within(X, codes, counts), within(y, codes, counts), rcond=None)[0]
    # Baltagi, Table 2.1, Within row (values from memory)
    np.testing.assert_array_equal(np.round(fe, 4), [0.1101, 0.3101])
    # outside check: statsmodels OLS with firm dummies (LSDV)
    lsdv = sm.OLS(y, np.column_stack([X, Z])).fit().params[:2]
    np.testing.assert_allclose(fe, lsdv, rtol=1e-9)


def test_grunfeld_swamy_arora_by_groupby(grunfeld):
    # outside check: the balanced textbook Swamy-Arora formulas written with
    # statsmodels OLS and pandas groupby, independent of panelprep
    y, X, codes, counts = grunfeld_arrays(grunfeld)
    big_n, t, k = 10, 20, 2
    Z = np.eye(big_n)[codes]
    ssr_w = sm.OLS(y, np.column_stack([X, Z])).fit().ssr
    s2e = ssr_w / (big_n * t - big_n - k)
    means = grunfeld.groupby("firm")[["invest", "value", "capital"]].mean()
    ssr_means = sm.OLS(means["invest"], sm.add_constant(means[["value", "capital"]])).fit().ssr
    s2u = ssr_means / (big_n - k - 1) - s2e / t
    vc = estimate_components(y, X, codes, counts)
    np.testing.assert_allclose(vc.sigma2_idiosyncratic_, s2e, rtol=1e-10)
    np.testing.assert_allclose(vc.sigma2_entity_, s2u, rtol=1e-10)


# ---------------------------------------------------------------- balanced closed forms


def balanced_frame(seed: int, big_n: int = 15, t: int = 6):
    rng = np.random.default_rng(seed)
    entity = np.repeat(np.arange(big_n), t)
    x = rng.normal(size=(big_n * t, 2)) + rng.normal(size=(big_n, 2))[entity]
    y = x @ [1.0, -2.0] + 1.5 * rng.normal(size=big_n)[entity] + rng.normal(size=big_n * t)
    frame = pd.DataFrame({"y": y, "x1": x[:, 0], "x2": x[:, 1], "e": entity})
    return frame, y, x, entity, np.full(big_n, t)


def groupby_parts(frame: pd.DataFrame, cols: list[str]):
    """Within deviations and entity means expanded to rows, by pandas."""
    means = frame.groupby("e")[cols].transform("mean").to_numpy()
    return frame[cols].to_numpy() - means, means


@pytest.mark.parametrize("seed", [0, 1])
def test_balanced_swamy_arora_and_nerlove_textbook(seed):
    frame, y, x, entity, counts = balanced_frame(seed)
    big_n, t, k = 15, 6, 2
    wdev, _ = groupby_parts(frame, ["y", "x1", "x2"])
    bw = np.linalg.lstsq(wdev[:, 1:], wdev[:, 0], rcond=None)[0]
    ssr_w = float(np.sum((wdev[:, 0] - wdev[:, 1:] @ bw) ** 2))
    means = frame.groupby("e")[["y", "x1", "x2"]].mean()
    ssr_means = sm.OLS(means["y"], sm.add_constant(means[["x1", "x2"]])).fit().ssr

    # Swamy-Arora, balanced textbook: s2_e = SSR_w / (N(T-1) - K),
    # s2_u = SSR_means / (N - K - 1) - s2_e / T
    sa = estimate_components(y, x, entity, counts, method="swamy-arora")
    s2e = ssr_w / (big_n * (t - 1) - k)
    np.testing.assert_allclose(sa.sigma2_idiosyncratic_, s2e, rtol=1e-10)
    np.testing.assert_allclose(sa.raw_sigma2_entity_, ssr_means / (big_n - k - 1) - s2e / t, rtol=1e-10)

    # Nerlove, textbook: s2_e = SSR_w / (NT); s2_u = sample variance (N - 1) of the
    # LSDV dummy coefficients (statsmodels OLS with entity dummies, no constant)
    ne = estimate_components(y, x, entity, counts, method="nerlove")
    lsdv = sm.OLS(y, np.column_stack([x, np.eye(big_n)[entity]])).fit()
    np.testing.assert_allclose(ne.sigma2_idiosyncratic_, lsdv.ssr / (big_n * t), rtol=1e-10)
    np.testing.assert_allclose(ne.sigma2_entity_, np.var(lsdv.params[2:], ddof=1), rtol=1e-10)


@pytest.mark.parametrize("seed", [0, 1])
def test_balanced_amemiya_and_wallace_hussain_closed_forms(seed):
    """Balanced closed forms of the exact-expectation estimators, written with groupby.

    Derived by hand for T_i = T (common practice for ANOVA-type estimators);
    W = [1, X], G = (W'W)^-1, W'PW = T sum_i wbar_i wbar_i', W'ZZ'W = T W'PW:

    Amemiya (LSDV residuals u~ with overall intercept):
      E[u~'Qu~] = s2_e (N(T-1) - K)
      E[u~'Pu~] = s2_u T(N-1) + s2_e ((N-1) + tr(Wxx^-1 Bxx)),
      Wxx = X'QX, Bxx = T sum_i (xbar_i - xbar)(xbar_i - xbar)'.
    Wallace-Hussain (pooled OLS residuals u^):
      E[u^'Qu^] = s2_e (N(T-1) - tr(G W'QW)) + s2_u T tr(G W'PW G W'QW)
      E[u^'Pu^] = s2_e (N - tr(G W'PW)) + s2_u (NT - 2T tr(G W'PW) + T tr((G W'PW)^2))

    (The textbook's balanced WH and Amemiya divide u'Qu by N(T-1) and u'Pu by N,
    dropping the O(K) terms; the unbalanced Baltagi-Chang forms keep them, so
    the exact versions above are the balanced special case checked here.)
    """
    frame, y, x, entity, counts = balanced_frame(seed)
    big_n, t, k = 15, 6, 2
    n = big_n * t

    wdev, bmeans = groupby_parts(frame, ["y", "x1", "x2"])
    bw = np.linalg.lstsq(wdev[:, 1:], wdev[:, 0], rcond=None)[0]
    intercept = y.mean() - x.mean(axis=0) @ bw
    u = y - intercept - x @ bw
    resid_means = pd.Series(u).groupby(entity).mean().to_numpy()
    q_q, q_p = float(np.sum((wdev[:, 0] - wdev[:, 1:] @ bw) ** 2)), t * float(resid_means @ resid_means)
    wxx = wdev[:, 1:].T @ wdev[:, 1:]
    centred = frame.groupby("e")[["x1", "x2"]].mean().to_numpy() - x.mean(axis=0)
    bxx = t * centred.T @ centred
    s2e = q_q / (big_n * (t - 1) - k)
    s2u = (q_p - s2e * ((big_n - 1) + np.trace(np.linalg.solve(wxx, bxx)))) / (t * (big_n - 1))
    am = estimate_components(y, x, entity, counts, method="amemiya")
    np.testing.assert_allclose(am.sigma2_idiosyncratic_, s2e, rtol=1e-10)
    np.testing.assert_allclose(am.raw_sigma2_entity_, s2u, rtol=1e-10)

    W = np.column_stack([np.ones(n), x])
    u = sm.OLS(y, W).fit().resid
    wp = bmeans[:, 1:]
    wbar = np.column_stack([np.ones(n), wp])
    g = np.linalg.inv(W.T @ W)
    wpw = wbar.T @ wbar
    wqw = W.T @ W - wpw
    e_w = u - pd.Series(u).groupby(entity).transform("mean").to_numpy()
    q_q = float(e_w @ e_w)
    q_p = t * float(np.sum(pd.Series(u).groupby(entity).mean().to_numpy() ** 2))
    a = np.array(
        [
            [t * np.trace(g @ wpw @ g @ wqw), big_n * (t - 1) - np.trace(g @ wqw)],
            [
                n - 2 * t * np.trace(g @ wpw) + t * np.trace(g @ wpw @ g @ wpw),
                big_n - np.trace(g @ wpw),
            ],
        ]
    )
    s2u, s2e = np.linalg.solve(a, [q_q, q_p])
    wh = estimate_components(y, x, entity, counts, method="wallace-hussain")
    np.testing.assert_allclose(wh.sigma2_idiosyncratic_, s2e, rtol=1e-9)
    np.testing.assert_allclose(wh.raw_sigma2_entity_, s2u, rtol=1e-9)


# ---------------------------------------------------------------- unbalanced exactness


def dense_traces(M: np.ndarray, Q: np.ndarray, P: np.ndarray, ZZ: np.ndarray) -> dict:
    eye = np.eye(len(M))
    return {
        "c_q_e": np.trace(M.T @ Q @ M @ eye),
        "c_q_u": np.trace(M.T @ Q @ M @ ZZ),
        "c_p_e": np.trace(M.T @ P @ M @ eye),
        "c_p_u": np.trace(M.T @ P @ M @ ZZ),
    }


@pytest.mark.parametrize("seed", [0, 3])
def test_unbalanced_expectations_equal_dense_traces(seed):
    # outside check: E[e'Ae] = tr(M'AM Omega) with the n x n matrices formed in numpy
    p = random_unbalanced_panel(seed, n_entities=14, n_periods=6)
    rng = np.random.default_rng(seed)
    y = rng.normal(size=p.n) + p.entity
    X, n = p.X, p.n
    Z = np.eye(p.n_entities)[p.entity]
    ZZ = Z @ Z.T
    P = Z @ np.diag(1.0 / p.counts) @ Z.T
    Q = np.eye(n) - P
    W = np.column_stack([np.ones(n), X])

    M_pooled = np.eye(n) - W @ np.linalg.solve(W.T @ W, W.T)
    wh = estimate_components(y, X, p.entity, p.counts, method="wallace-hussain")
    for key, val in dense_traces(M_pooled, Q, P, ZZ).items():
        np.testing.assert_allclose(wh.dof_[key], val, rtol=1e-10, atol=1e-10)

    J = np.eye(n) - np.ones((n, n)) / n
    M_lsdv = J @ (np.eye(n) - X @ np.linalg.solve(X.T @ Q @ X, X.T @ Q))
    am = estimate_components(y, X, p.entity, p.counts, method="amemiya")
    for key, val in dense_traces(M_lsdv, Q, P, ZZ).items():
        np.testing.assert_allclose(am.dof_[key], val, rtol=1e-10, atol=1e-10)

    # Swamy-Arora between part: u_b = (P - H (H'H)^-1 H') y with H = P W
    H = P @ W
    M_between = P - H @ np.linalg.solve(H.T @ H, H.T)
    sa = estimate_components(y, X, p.entity, p.counts, method="swamy-arora")
    np.testing.assert_allclose(sa.dof_["between_denominator"], np.trace(M_between @ ZZ), rtol=1e-10)
    assert sa.dof_["between_residual_dof"] == round(np.trace(M_between))
    np.testing.assert_allclose(sa.dof_["ssr_between"], y @ M_between @ y, rtol=1e-10)


def test_monte_carlo_recovers_components():
    # Monte Carlo with known s2_u = 2, s2_e = 1 on a fixed unbalanced design
    # (singletons included); SA, WH and Amemiya are unbiased for the raw
    # components, so their means over the draws must sit within 4 standard
    # errors of the truth.  Nerlove is biased by construction and is compared
    # with its exact expectation.
    p = random_unbalanced_panel(42, n_entities=80, n_periods=10, keep=0.55, singletons=6)
    s2u, s2e, draws = 2.0, 1.0, 60
    rng = np.random.default_rng(2024)
    est = {m: np.empty((draws, 2)) for m in METHODS}
    for r in range(draws):
        u = rng.normal(scale=np.sqrt(s2u), size=p.n_entities)
        y = 1.0 + p.X @ [0.5, -1.0] + u[p.entity] + rng.normal(scale=np.sqrt(s2e), size=p.n)
        for m in METHODS:
            vc = VarianceComponents(method=m).fit(y, p.X, p.entity, p.counts)
            est[m][r] = vc.raw_sigma2_entity_, vc.sigma2_idiosyncratic_

    n, big_n, k = p.n, p.n_entities, 2
    wx = within(p.X, p.entity, p.counts)
    xbar = pd.DataFrame(p.X).groupby(p.entity).mean().to_numpy()
    centred = xbar - xbar.mean(axis=0)
    slope_term = np.trace(np.linalg.solve(wx.T @ wx, centred.T @ centred)) / (big_n - 1)
    expected = {
        "swamy-arora": (s2u, s2e),
        "wallace-hussain": (s2u, s2e),
        "amemiya": (s2u, s2e),
        # alpha_i = u_i + ebar_i - xbar_i (b_w - b): ebar_i has variance s2_e / T_i
        # and is uncorrelated with b_w, so E[var] = s2_u + s2_e (mean 1/T_i + slope term)
        "nerlove": (
            s2u + s2e * (np.mean(1.0 / p.counts) + slope_term),
            s2e * (n - big_n - k) / n,
        ),
    }
    for m in METHODS:
        mean = est[m].mean(axis=0)
        se = est[m].std(axis=0, ddof=1) / np.sqrt(draws)
        assert np.all(np.abs(mean - expected[m]) < 4 * se), (m, mean, expected[m], se)


# ---------------------------------------------------------------- rank deficiency, limits


@pytest.mark.parametrize("method", METHODS)
def test_time_invariant_regressor_is_dropped_within(method):
    p = random_unbalanced_panel(7)
    rng = np.random.default_rng(7)
    z = rng.normal(size=p.n_entities)[p.entity] * 1000.0 + 5000.0
    X = np.column_stack([p.X, z])
    y = p.X @ [1.0, 1.0] + 0.01 * z + rng.normal(size=p.n_entities)[p.entity] + rng.normal(size=p.n)
    vc = estimate_components(y, X, p.entity, p.counts, method=method, names=["a", "b", "z"])
    out = vc.to_dict()
    if method == "wallace-hussain":
        assert out["dropped_within"] == [] and out["dropped_pooled"] == []
    else:
        assert out["dropped_within"] == ["z"]
        found = [f for f in out["findings"] if f["id"] == "regressor-dropped-within"]
        assert found and found[0]["examples"] == [{"regressor": "z"}] and found[0]["severity"] == "warning"
    assert out["dropped_between"] == []
    assert np.isfinite(vc.theta_).all() and np.all((vc.theta_ >= 0) & (vc.theta_ <= 1))
    assert all(np.isfinite(v) for v in (vc.sigma2_entity_, vc.sigma2_idiosyncratic_))
    if method == "swamy-arora":
        # the within regression is the one without z: same s2_e as leaving z out
        ref = estimate_components(y, p.X, p.entity, p.counts, method=method)
        np.testing.assert_allclose(vc.sigma2_idiosyncratic_, ref.sigma2_idiosyncratic_, rtol=1e-10)


@pytest.mark.parametrize("method", METHODS)
def test_collinear_regressor_detected_and_harmless(method):
    p = random_unbalanced_panel(8)
    rng = np.random.default_rng(8)
    X = np.column_stack([p.X, p.X[:, 0] + 2.0 * p.X[:, 1]])
    y = p.X @ [1.0, -1.0] + rng.normal(size=p.n_entities)[p.entity] + rng.normal(size=p.n)
    vc = estimate_components(y, X, p.entity, p.counts, method=method, names=["a", "b", "c"])
    ref = estimate_components(y, p.X, p.entity, p.counts, method=method, names=["a", "b"])
    dropped = {
        "swamy-arora": vc.dropped_within_ + vc.dropped_between_,
        "wallace-hussain": vc.dropped_pooled_,
        "amemiya": vc.dropped_within_,
        "nerlove": vc.dropped_within_,
    }[method]
    assert len(dropped) == (2 if method == "swamy-arora" else 1)
    # the column space is unchanged, so the components equal the fit without
    # the redundant column (computed by the same code on the reduced design)
    np.testing.assert_allclose(vc.sigma2_entity_, ref.sigma2_entity_, rtol=1e-8)
    np.testing.assert_allclose(vc.sigma2_idiosyncratic_, ref.sigma2_idiosyncratic_, rtol=1e-8)


@pytest.mark.parametrize("method", METHODS)
def test_constant_regressor_and_no_nan(method):
    p = random_unbalanced_panel(9)
    rng = np.random.default_rng(9)
    X = np.column_stack([p.X, np.full(p.n, 3.0)])
    y = rng.normal(size=p.n) + rng.normal(size=p.n_entities)[p.entity]
    out = estimate_components(y, X, p.entity, p.counts, method=method).to_dict()
    text = json.dumps(out)
    assert "NaN" not in text and "Infinity" not in text


@pytest.mark.parametrize("method", ["swamy-arora", "wallace-hussain", "amemiya"])
def test_negative_entity_variance_truncated(method):
    # entity means of y are all equal while y varies within entities: the
    # between variation is below what s2_e alone implies, so raw s2_u < 0
    p = random_unbalanced_panel(10, singletons=0, keep=0.8)
    rng = np.random.default_rng(10)
    v = rng.normal(size=p.n)
    y = within(v, p.entity, p.counts) + 4.0
    vc = estimate_components(y, None, p.entity, p.counts, method=method)
    assert vc.raw_sigma2_entity_ < 0 and vc.truncated_negative_
    assert vc.sigma2_entity_ == 0.0
    np.testing.assert_array_equal(vc.theta_, 0.0)
    ids = [f["id"] for f in vc.findings_]
    assert "entity-variance-negative" in ids
    assert vc.to_dict()["entity_share"] == 0.0


def test_underidentified_between_and_within():
    rng = np.random.default_rng(11)
    # two entities, two regressors: the between regression has 2 rows for 3
    # columns, so one column is dropped and N - K_b = 0 leaves s2_u unidentified
    entity = np.repeat([0, 1], 6)
    X = rng.normal(size=(12, 2))
    y = rng.normal(size=12)
    vc = estimate_components(y, X, entity, np.array([6, 6]))
    by_id = {f["id"]: f for f in vc.findings_}
    assert set(by_id) == {"regressor-dropped-between", "components-underidentified"}
    assert by_id["components-underidentified"]["severity"] == "error"
    assert vc.sigma2_entity_ == 0.0 and len(vc.dropped_between_) == 1
    assert np.isfinite(vc.sigma2_idiosyncratic_) and vc.sigma2_idiosyncratic_ > 0
    # only singletons: no within degrees of freedom
    entity = np.arange(12)
    for method in METHODS:
        vc = estimate_components(y, X, entity, np.ones(12, dtype=int), method=method)
        out = vc.to_dict()
        assert np.isfinite(out["sigma2_entity"]) and np.isfinite(out["sigma2_idiosyncratic"])
        assert np.isfinite(vc.theta_).all()
        if method in ("swamy-arora", "amemiya"):
            assert "components-underidentified" in [f["id"] for f in out["findings"]]


def test_to_dict_contents_and_parameters():
    p = random_unbalanced_panel(12)
    rng = np.random.default_rng(12)
    y = p.X @ [1.0, 2.0] + rng.normal(size=p.n_entities)[p.entity] + rng.normal(size=p.n)
    est = VarianceComponents(method="amemiya")
    assert est.method == "amemiya"
    out = est.fit(y, p.X, p.entity, p.counts).to_dict()
    for key in (
        "method", "sigma2_entity", "sigma2_idiosyncratic", "entity_share", "theta",
        "truncated_negative", "raw_sigma2_entity", "dropped_within", "dropped_between", "dof",
    ):
        assert key in out
    share = out["sigma2_entity"] / (out["sigma2_entity"] + out["sigma2_idiosyncratic"])
    assert out["entity_share"] == pytest.approx(share)
    theta = est.theta_
    # the quartiles and deciles recomputed with pandas (linear interpolation, its default)
    quantiles = pd.Series(theta).quantile([0.1, 0.25, 0.75, 0.9]).tolist()
    assert out["theta"] == pytest.approx({
        "min": theta.min(), "median": float(np.median(theta)), "max": theta.max(),
        **dict(zip(("p10", "p25", "p75", "p90"), quantiles)),
    }, rel=1e-12)
    assert theta.min() < theta.max()  # unbalanced: theta varies with T_i
    json.dumps(out)
    with pytest.raises(ValueError, match="unknown method"):
        VarianceComponents(method="typo").fit(y, p.X, p.entity, p.counts)


# ---------------------------------------------------------------- least squares core


def test_ols_matches_lstsq_and_drops_zero_and_collinear_columns():
    rng = np.random.default_rng(13)
    X = rng.normal(size=(50, 3))
    y = X @ [1.0, 2.0, 3.0] + rng.normal(size=50)
    full = np.column_stack([X, np.zeros(50), X[:, 0] - X[:, 2]])
    fit = ols(y, full, names=["a", "b", "c", "zero", "combo"])
    assert fit.rank == 3 and "zero" in fit.dropped and len(fit.dropped) == 2
    assert np.isfinite(fit.coef).all() and np.all(fit.coef[~fit.kept] == 0.0)
    # outside check: numpy lstsq on the full rank-deficient design gives the same fit
    ref = np.linalg.lstsq(full, y, rcond=None)[0]
    np.testing.assert_allclose(full @ fit.coef, full @ ref, rtol=1e-10)
    kept = full[:, fit.kept]
    np.testing.assert_allclose(fit.xtx_inv, np.linalg.inv(kept.T @ kept), rtol=1e-10)
    np.testing.assert_allclose(fit.ssr, np.sum((y - full @ ref) ** 2), rtol=1e-10)


def test_ols_more_columns_than_rows_and_scale():
    rng = np.random.default_rng(14)
    X = rng.normal(size=(3, 5))
    fit = ols(rng.normal(size=3), X)
    assert fit.rank == 3 and fit.df_resid == 0 and len(fit.dropped) == 2
    assert np.isfinite(fit.coef).all() and fit.ssr < 1e-20
    # a within-transformed time-invariant column is rounding noise, dropped
    # when measured against the raw column's size
    codes = np.repeat(np.arange(10), 4)
    z = rng.normal(size=10)[codes] * 1e3 + 1e6
    x = rng.normal(size=40)
    raw = np.column_stack([x, z])
    dev = within(raw, codes, np.full(10, 4))
    fit = ols(within(rng.normal(size=40), codes, np.full(10, 4)), dev,
              names=["x", "z"], scale=np.linalg.norm(raw, axis=0))
    assert fit.dropped == ["z"]


def test_cluster_cov_matches_statsmodels():
    rng = np.random.default_rng(15)
    codes = np.repeat(np.arange(12), 5)
    X = np.column_stack([np.ones(60), rng.normal(size=(60, 2))])
    y = X @ [1.0, 0.5, -0.5] + rng.normal(size=12)[codes] + rng.normal(size=60)
    fit = ols(y, X)
    ours = cluster_cov(X, fit.resid, codes, fit.xtx_inv, 12)
    # outside check: statsmodels cluster-robust covariance, whose default small-sample
    # correction is G/(G-1) * (n-1)/(n-k)
    ref = sm.OLS(y, X).fit(cov_type="cluster", cov_kwds={"groups": codes}).cov_params()
    np.testing.assert_allclose(ours, ref, rtol=1e-10)
