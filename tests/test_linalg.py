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
