"""Transforms checked against dummy-variable regressions, dense GLS and pandas."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from conftest import Panel, examples, random_unbalanced_panel
from hypothesis import given, settings
from hypothesis import strategies as st
from statsmodels.tools.sm_exceptions import SingularMatrixWarning

import panelprep.transforms as tr
from panelprep.transforms import between, quasi, theta_per_entity, twoway, within


def dummies(codes: np.ndarray, n_levels: int) -> np.ndarray:
    return np.eye(n_levels)[codes]


def response(panel: Panel, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    effect_e = rng.normal(size=panel.n_entities)
    effect_t = rng.normal(size=panel.n_periods)
    return (
        panel.X @ np.array([1.5, -0.7])[: panel.X.shape[1]]
        + 2.0 * effect_e[panel.entity]
        + effect_t[panel.period]
        + rng.normal(size=panel.n)
    )


def assert_rel(actual, expected, rtol=1e-8):
    actual, expected = np.asarray(actual), np.asarray(expected)
    scale = max(np.max(np.abs(expected)), 1e-300)
    assert np.max(np.abs(actual - expected)) / scale <= rtol


# ---------------------------------------------------------------- within / between


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_within_ols_equals_entity_dummy_ols(make_panel, seed):
    p = make_panel(seed)
    y = response(p, seed)
    wy = within(y, p.entity, p.counts)
    wx = within(p.X, p.entity, p.counts)
    ours = np.linalg.lstsq(wx, wy, rcond=None)[0]
    # outside check: statsmodels OLS with a full set of entity dummies (LSDV)
    ref = sm.OLS(y, np.column_stack([p.X, dummies(p.entity, p.n_entities)])).fit()
    assert_rel(ours, ref.params[:2])
    # the within residual is the LSDV residual (numpy lstsq on the same dummies)
    D = dummies(p.entity, p.n_entities)
    assert_rel(wy - wx @ ours, ref.resid, rtol=1e-8)
    assert_rel(wx, p.X - D @ np.linalg.lstsq(D, p.X, rcond=None)[0], rtol=1e-10)


def test_within_shapes_and_order(make_panel):
    p = make_panel(4)
    out2 = within(np.ascontiguousarray(p.X), p.entity, p.counts)
    assert out2.shape == p.X.shape and out2.flags.f_contiguous and out2.dtype == np.float64
    out1 = within(p.X[:, 0].copy(), p.entity, p.counts)
    assert out1.shape == (p.n,)
    # column order of a C-ordered input does not change the numbers
    np.testing.assert_array_equal(out1, out2[:, 0])


def test_demeaned_blocks_read_in_pieces_equal_within_quasi_and_pandas(make_panel):
    p = make_panel(6)
    fresh = within(p.X, p.entity, p.counts)
    # outside check: pandas groupby transform("mean")
    ref = p.X - pd.DataFrame(p.X).groupby(p.entity).transform("mean").to_numpy()
    assert_rel(fresh, ref, rtol=1e-12)
    block = tr.within_block(p.X, p.entity, p.counts)
    cut = p.n // 3
    pieces = np.vstack([block.piece(0, cut), block.piece(cut, p.n)])
    np.testing.assert_array_equal(pieces, fresh)
    np.testing.assert_array_equal(block[:, 1][cut:p.n], fresh[cut:, 1])
    theta = np.linspace(0.1, 0.9, p.n_entities)
    np.testing.assert_array_equal(tr.quasi_block(p.X, p.entity, p.counts, theta).piece(0, p.n),
                                  quasi(p.X, p.entity, p.counts, theta))
    with pytest.raises(IndexError):
        block[1:, 0]


def test_between_equals_pandas_groupby_mean(make_panel):
    p = make_panel(5)
    ours = between(p.X, p.entity, p.counts)
    # outside check: pandas groupby mean
    ref = pd.DataFrame(p.X).groupby(p.entity).mean().to_numpy()
    assert ours.shape == (p.n_entities, 2) and ours.flags.f_contiguous
    assert_rel(ours, ref, rtol=1e-13)


def test_codes_outside_sample_rejected(make_panel):
    p = make_panel(6)
    bad = p.entity.copy()
    bad[0] = -1
    with pytest.raises(ValueError, match="dense codes"):
        within(p.X, bad, p.counts)


# ---------------------------------------------------------------- quasi / theta


@pytest.mark.parametrize("seed,s2u,s2e", [(0, 2.0, 1.0), (1, 0.3, 4.0), (2, 10.0, 0.5)])
def test_quasi_ols_equals_dense_gls(make_panel, seed, s2u, s2e):
    p = make_panel(seed)
    y = response(p, seed)
    theta = theta_per_entity(s2u, s2e, p.counts)
    qy = quasi(y, p.entity, p.counts, theta)
    qx = quasi(p.X, p.entity, p.counts, theta)
    design = np.column_stack([qx, 1.0 - theta[p.entity]])
    ours = np.linalg.lstsq(design, qy, rcond=None)[0]
    # outside check: statsmodels GLS with the explicit dense covariance
    # s2_e * I + s2_u * (entity block of ones)
    Z = dummies(p.entity, p.n_entities)
    omega = s2e * np.eye(p.n) + s2u * (Z @ Z.T)
    ref = sm.GLS(y, np.column_stack([p.X, np.ones(p.n)]), sigma=omega).fit()
    assert_rel(ours, ref.params)


def test_quasi_with_zero_entity_variance_is_the_data(make_panel):
    # common practice: s2_u = 0 gives theta = 0, i.e. pooled OLS on the raw data
    p = make_panel(7)
    theta = theta_per_entity(0.0, 1.3, p.counts)
    np.testing.assert_array_equal(theta, 0.0)
    np.testing.assert_array_equal(quasi(p.X, p.entity, p.counts, theta), p.X)


def test_quasi_approaches_within_for_dominant_entity_variance(make_panel):
    # common practice: T_i s2_u / s2_e -> infinity makes theta -> 1 (the within transform)
    p = make_panel(8)
    theta = theta_per_entity(1e12, 1.0, p.counts)
    gap = np.abs(quasi(p.X, p.entity, p.counts, theta) - within(p.X, p.entity, p.counts))
    assert gap.max() <= 1e-5 * np.abs(p.X).max()
    assert theta.min() > 1 - 1e-5


def test_theta_matches_formula_and_edge_cases():
    counts = np.array([1, 2, 5, 20, 0])
    s2u, s2e = 84.20**2, 52.77**2
    # common practice: theta_i = 1 - sqrt(s2_e / (T_i s2_u + s2_e)), written out directly
    direct = np.where(counts > 0, 1 - np.sqrt(s2e / (counts * s2u + s2e)), 0.0)
    np.testing.assert_allclose(theta_per_entity(s2u, s2e, counts), direct, rtol=1e-13, atol=0)
    np.testing.assert_array_equal(theta_per_entity(0.0, 0.0, counts), 0.0)
    np.testing.assert_array_equal(theta_per_entity(1.0, 0.0, counts), [1, 1, 1, 1, 0])
    np.testing.assert_array_equal(theta_per_entity(-3.0, 1.0, counts), 0.0)


@settings(max_examples=examples(60), deadline=None)
@given(
    s2u=st.floats(0, 1e12, allow_nan=False),
    s2e=st.floats(0, 1e12, allow_nan=False),
    counts=st.lists(st.integers(0, 10_000), min_size=1, max_size=20),
)
def test_theta_in_unit_interval(s2u, s2e, counts):
    # common practice: theta is a shrinkage weight in [0, 1], nondecreasing in T_i
    theta = theta_per_entity(s2u, s2e, np.array(counts))
    assert np.all((theta >= 0) & (theta <= 1)) and np.isfinite(theta).all()
    order = np.argsort(counts, kind="stable")
    assert np.all(np.diff(theta[order]) >= -1e-15)


# ---------------------------------------------------------------- two-way


def twoway_reference(y, X, entity, period, n_entities, n_periods):
    """Outside check: statsmodels OLS with entity and period dummies."""
    D = np.column_stack([dummies(entity, n_entities), dummies(period, n_periods)])
    # the two dummy sets are collinear by construction; the X coefficients are
    # still identified and statsmodels' pinv solution gives them
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", category=SingularMatrixWarning)
        fit = sm.OLS(y, np.column_stack([X, D])).fit()
    return fit.params[: X.shape[1]]


def check_twoway(p: Panel, seed: int, expect_components: int, method_prefix: str = "direct"):
    y = response(p, seed)
    ty, res_y = twoway(y, p.entity, p.period, p.n_entities, p.n_periods)
    tx, res_x = twoway(p.X, p.entity, p.period, p.n_entities, p.n_periods)
    ours = np.linalg.lstsq(tx, ty, rcond=None)[0]
    assert_rel(ours, twoway_reference(y, p.X, p.entity, p.period, p.n_entities, p.n_periods))
    # the transformed column is the residual of projecting on both dummy sets (numpy lstsq)
    D = np.column_stack([dummies(p.entity, p.n_entities), dummies(p.period, p.n_periods)])
    assert_rel(tx, p.X - D @ np.linalg.lstsq(D, p.X, rcond=None)[0], rtol=1e-9)
    for res in (res_y, res_x):
        assert res.converged and res.precision <= 1e-10
        assert res.method.startswith(method_prefix)
        assert res.n_components == expect_components
    assert tx.flags.f_contiguous and ty.shape == (p.n,)


@pytest.mark.parametrize("seed", [0, 1])
def test_twoway_equals_two_dummy_sets_unbalanced(seed):
    check_twoway(random_unbalanced_panel(seed), seed, expect_components=1)


def test_twoway_more_periods_than_entities():
    p = random_unbalanced_panel(3, n_entities=6, n_periods=30, keep=0.5, singletons=1)
    check_twoway(p, 3, expect_components=1)


def disconnected_panel(seed: int) -> Panel:
    """Two groups of entities observed on disjoint period sets, plus an unused period.

    Entities 0-9 only in periods 0-4, entities 10-19 only in periods 5-10,
    period 11 has no rows: the entity-period graph has two components with
    rows and the system has three null directions.
    """
    rng = np.random.default_rng(seed)
    entity = np.repeat(np.arange(20), 11)
    period = np.tile(np.arange(11), 20)
    own_block = (entity < 10) == (period < 5)
    keep = own_block & (rng.random(len(entity)) < 0.7)
    keep |= period == np.where(entity < 10, 0, 5)  # every entity keeps at least one row
    order = rng.permutation(np.flatnonzero(keep))
    entity, period = entity[order], period[order]
    X = rng.normal(size=(len(entity), 2)) + period[:, None] * 0.2
    return Panel(entity, period, np.bincount(entity, minlength=20), 20, 12, np.asfortranarray(X))


def test_twoway_disconnected_graph_and_empty_period():
    check_twoway(disconnected_panel(11), 11, expect_components=2)


def test_twoway_iterative_path_matches_dummies(monkeypatch):
    # force the conjugate-gradient path on a small panel so it can be checked
    # against the dummy regression
    monkeypatch.setattr(tr, "DIRECT_MAX_LEVELS", 3)
    check_twoway(random_unbalanced_panel(5), 5, expect_components=1, method_prefix="cg")
    check_twoway(disconnected_panel(12), 12, expect_components=2, method_prefix="cg")


def test_twoway_sparse_incidence_path_matches_dense(monkeypatch):
    p = random_unbalanced_panel(9)
    dense, _ = twoway(p.X, p.entity, p.period, p.n_entities, p.n_periods)
    monkeypatch.setattr(tr, "DENSE_INCIDENCE_MAX", 1)
    sparse, res = twoway(p.X, p.entity, p.period, p.n_entities, p.n_periods)
    assert_rel(sparse, dense, rtol=1e-12)
    assert res.precision <= 1e-10


def test_twoway_balanced_is_double_demeaning():
    # common practice: on a balanced panel the two-way transform is
    # x_it - xbar_i - xbar_t + xbar (pandas groupby)
    rng = np.random.default_rng(21)
    entity = np.repeat(np.arange(7), 5)
    period = np.tile(np.arange(5), 7)
    x = rng.normal(size=35) * 100 + 1000
    frame = pd.DataFrame({"x": x, "e": entity, "t": period})
    ref = (
        x
        - frame.groupby("e")["x"].transform("mean")
        - frame.groupby("t")["x"].transform("mean")
        + x.mean()
    ).to_numpy()
    ours, res = twoway(x, entity, period, 7, 5)
    assert_rel(ours, ref, rtol=1e-11)
    assert res.precision <= 1e-12


def test_twoway_single_period_reduces_to_within():
    p = random_unbalanced_panel(13, n_periods=1, keep=1.0, singletons=0)
    ours, res = twoway(p.X, p.entity, p.period, p.n_entities, 1)
    # with one period every row is its entity's only row: everything is absorbed
    np.testing.assert_allclose(ours, 0.0, atol=1e-14)
    assert res.iterations == 0 and res.converged
