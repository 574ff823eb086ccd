"""Least squares by blocks of rows against numpy's lstsq (a reference computed another way)."""

from __future__ import annotations

import numpy as np
import pytest

from panelprep import _linalg


@pytest.mark.parametrize("block_rows", [7, 64, 1 << 18])
def test_blocked_qr_matches_lstsq(monkeypatch, block_rows):
    monkeypatch.setattr(_linalg, "QR_BLOCK_ROWS", block_rows)
    rng = np.random.default_rng(5)
    X = rng.normal(size=(1000, 4)) * [1.0, 1e3, 1e-3, 5.0]
    y = X @ [1.0, -2.0, 300.0, 0.5] + rng.normal(size=1000)
    fit = _linalg.ols(y, X)
    expected, *_ = np.linalg.lstsq(X, y, rcond=None)  # numpy's SVD-based least squares
    np.testing.assert_allclose(fit.coef, expected, rtol=1e-10)
    np.testing.assert_allclose(fit.xtx_inv, np.linalg.inv(X.T @ X), rtol=1e-8)
    assert fit.rank == 4 and not fit.dropped


@pytest.mark.parametrize("block_rows", [5, 1 << 18])
def test_blocked_qr_drops_collinear_and_zero_columns(monkeypatch, block_rows):
    monkeypatch.setattr(_linalg, "QR_BLOCK_ROWS", block_rows)
    rng = np.random.default_rng(6)
    a, b = rng.normal(size=(2, 300))
    X = np.column_stack([a, b, a + 2 * b, np.zeros(300)])
    y = 3 * a - b + rng.normal(size=300)
    fit = _linalg.ols(y, X, names=["a", "b", "a+2b", "zero"])
    assert fit.rank == 2 and "zero" in fit.dropped and len(fit.dropped) == 2
    assert np.isfinite(fit.coef).all()
    # whichever of the collinear columns is kept, the fitted values are the same
    reference, *_ = np.linalg.lstsq(np.column_stack([a, b]), y, rcond=None)
    np.testing.assert_allclose(X @ fit.coef, np.column_stack([a, b]) @ reference, rtol=1e-9)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_cross_product_route_agrees_with_qr_route(monkeypatch, seed):
    # the same regression through both routes of ols; numpy's lstsq as the outside reference
    rng = np.random.default_rng(seed)
    n = 5000
    X = rng.normal(size=(n, 5)) * [1.0, 1e2, 1e-2, 3.0, 7.0]
    X[:, 4] += 0.5 * X[:, 0]  # correlated, condition number ~1e4 after scaling
    y = X @ [0.3, -0.02, 40.0, 1.5, -0.7] + rng.normal(size=n)
    monkeypatch.setattr(_linalg, "GRAM_MIN_ROWS", 10**12)
    by_qr = _linalg.ols(y, X)
    monkeypatch.setattr(_linalg, "GRAM_MIN_ROWS", 1)
    by_gram = _linalg.ols(y, X)
    reference, *_ = np.linalg.lstsq(X, y, rcond=None)
    np.testing.assert_allclose(by_gram.coef, reference, rtol=1e-12)
    np.testing.assert_allclose(by_gram.coef, by_qr.coef, rtol=1e-12)
    # (X'X)^-1 keeps the cross product's rounding (no refinement step): about
    # cond^2 * eps, far below what a standard error is read to
    np.testing.assert_allclose(by_gram.xtx_inv, by_qr.xtx_inv, rtol=1e-7)
    assert by_gram.rank == by_qr.rank == 5


def test_cross_product_route_drops_noise_and_collinear_columns(monkeypatch):
    monkeypatch.setattr(_linalg, "GRAM_MIN_ROWS", 1)
    rng = np.random.default_rng(3)
    a, b = rng.normal(size=(2, 2000))
    noise = 1e-15 * rng.normal(size=2000)  # a time-invariant regressor after demeaning
    X = np.column_stack([a, b, a - b, noise])
    y = a + 2 * b + rng.normal(size=2000)
    fit = _linalg.ols(y, X, names=["a", "b", "a-b", "noise"],
                      scale=np.array([1.0, 1.0, 1.0, 1.0]))
    assert fit.rank == 2 and "noise" in fit.dropped
    assert np.isfinite(fit.coef).all() and np.isfinite(fit.xtx_inv).all()


def test_ols_from_r_equals_lstsq_on_the_rows():
    """A fit from any R with R'R = [X, y]'[X, y] equals least squares on the rows.

    Reference: numpy.linalg.lstsq on the rows; R here from numpy.linalg.qr.
    """
    from panelprep._linalg import ols_from_r

    rng = np.random.default_rng(5)
    X = rng.normal(size=(400, 3)) + [2.0, -1.0, 0.5]
    y = X @ [1.0, 0.5, -2.0] + rng.normal(size=400)
    r = np.linalg.qr(np.column_stack([X, y]), mode="r")
    fit = ols_from_r(r, 400)
    coef, ssr, _, _ = np.linalg.lstsq(X, y, rcond=None)
    np.testing.assert_allclose(fit.coef, coef, rtol=1e-12)
    assert fit.ssr == pytest.approx(float(ssr[0]), rel=1e-10)
    np.testing.assert_allclose(fit.xtx_inv, np.linalg.inv(X.T @ X), rtol=1e-10)
    # a column repeated is dropped, as ols on the rows drops it
    r2 = np.linalg.qr(np.column_stack([X, X[:, 0], y]), mode="r")
    assert ols_from_r(r2, 400).rank == 3


def test_entity_moments_factor_the_within_cross_product():
    """R'R of the moments equals the within block's cross product (pandas groupby demeaning)."""
    import pandas as pd

    from panelprep._moments import entity_moments

    rng = np.random.default_rng(6)
    codes = rng.integers(0, 30, 500)
    X = rng.normal(size=(500, 2))
    y = rng.normal(size=500)
    counts = np.bincount(codes, minlength=30)
    mom = entity_moments(X, y, codes, counts)
    frame = pd.DataFrame(np.column_stack([X, y])).assign(g=codes)
    within = (frame.drop(columns="g") - frame.groupby("g").transform("mean")).to_numpy()
    np.testing.assert_allclose(mom.r_within.T @ mom.r_within, within.T @ within, atol=1e-9)
    np.testing.assert_allclose(mom.within_ss, (within**2).sum(axis=0), rtol=1e-12)


@pytest.mark.parametrize("rows", [500, _linalg.GRAM_MIN_ROWS + 10])
def test_independent_columns_keeps_earlier_columns_and_agrees_with_numpy_rank(rows):
    # columns: a, b, a + 2b (dependent on the two before it), rounding noise, c, 3c - b
    rng = np.random.default_rng(3)
    a, b, c = (rng.normal(size=rows) for _ in range(3))
    noise = rng.normal(size=rows) * 1e-17
    columns = [a, b, a + 2 * b, noise, c, 3 * c - b]
    kept, negligible = _linalg.independent_columns(columns, np.ones(len(columns)))
    assert kept.tolist() == [True, True, False, False, True, False]
    assert negligible.tolist() == [False, False, False, True, False, False]
    # numpy's SVD rank of the kept columns and of all of them (another route)
    design = np.column_stack(columns)
    assert np.linalg.matrix_rank(design[:, kept]) == kept.sum() == np.linalg.matrix_rank(design)
