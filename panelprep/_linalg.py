"""Least squares with explicit rank detection, and an entity-clustered covariance.

Everything here works on small dense blocks: ``X`` is (n, k) with k the number
of regressors (a handful); the QR is computed block by block of rows (a
tall-skinny QR), so the cost is one pass over the rows and a few k x k
operations, and memory holds one block copy at a time.  Rank deficiency is a normal outcome (a regressor
with no within variation, two collinear regressors, fewer rows than columns):
it is detected, reported in the result and never turns into NaN or an
exception.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import scipy.linalg

EPS = float(np.finfo(np.float64).eps)

# Multiplier on max(n, k) * eps for the default relative rank tolerance.  The
# backward error of Householder QR grows roughly like sqrt(n) * eps in
# practice; max(n, k) * eps * 10 leaves a safety margin above that while still
# keeping any column whose independent part is more than ~1e-9 of the largest
# column for n up to ~10 million rows.
RTOL_FACTOR = 10.0

# From this many rows ``ols`` builds R from cross products of row blocks
# instead of Householder QR of each block: QR of a tall block with a handful of
# columns runs at matrix-vector speed, about 20 times slower than the cross
# product, and from here on it dominates a preparation.  The cross product
# squares the condition number, so the rank tolerance gets a floor
# (GRAM_RTOL_FLOOR) and the coefficients one refinement step; for designs
# with condition number below ~1e6 the answer agrees with the QR route to
# ~1e-12 relative (tested).
GRAM_MIN_ROWS = 200_000
GRAM_RTOL_FLOOR = 100 * EPS**0.5

# Rows per block of the tall-skinny QR in ``ols``: large enough for LAPACK to
# run at full speed, small enough that one block copy stays far below the data.
QR_BLOCK_ROWS = 1 << 18


def default_rtol(n: int, k: int) -> float:
    """Default relative rank tolerance: ``max(n, k) * eps * 10``."""
    return max(n, k, 1) * EPS * RTOL_FACTOR


@dataclass(frozen=True, eq=False)
class OlsFit:
    """Result of :func:`ols`.

    Attributes
    ----------
    coef : float64 (k,)
        Coefficients in the order of the columns of ``X``; 0.0 for dropped
        columns (never NaN).
    resid : float64 (n,)
        ``y - X @ coef``.
    kept : bool (k,)
        Columns that entered the fit.
    dropped : list
        Names (or integer positions when no names were given) of the columns
        left out for rank deficiency, in column order.
    rank : int
        Number of kept columns.
    ssr : float
        Sum of squared residuals ``resid @ resid``.
    xtx_inv : float64 (rank, rank)
        ``(X_k' X_k)^{-1}`` over the kept columns ``X_k = X[:, kept]``, in
        column order, for covariance computations.
    n_obs : int
        Number of rows n.
    df_resid : int
        ``max(n - rank, 0)``; zero means the fit is exact and carries no
        information about the error variance.
    rtol : float
        The relative rank tolerance that was applied.
    """

    coef: np.ndarray
    resid: np.ndarray
    kept: np.ndarray
    dropped: list
    rank: int
    ssr: float
    xtx_inv: np.ndarray
    n_obs: int
    df_resid: int
    rtol: float

    @property
    def n_dropped(self) -> int:
        return len(self.dropped)


def ols(
    y: np.ndarray,
    X: np.ndarray,
    names: Sequence[str] | None = None,
    rtol: float | None = None,
    scale: np.ndarray | None = None,
) -> OlsFit:
    """Ordinary least squares of ``y`` on the columns of ``X`` with rank detection.

    Parameters
    ----------
    y : array (n,)
        Response, finite float64.
    X : array (n, k)
        Regressors, finite float64, any memory order.  Add a constant column
        yourself if the regression has one.
    names : sequence of str, optional
        Column names used in ``OlsFit.dropped``; integer positions otherwise.
    rtol : float, optional
        Relative rank tolerance.  Default ``max(n, k) * eps * 10``.
    scale : array (k,), optional
        Reference magnitude of each column.  Columns are divided by it before
        the QR, so the tolerance is relative to these magnitudes instead of
        the raw column norms.  Pass the norms of the *untransformed* columns
        when ``X`` is a transform (e.g. within deviations): a regressor whose
        transform is pure rounding noise (a time-invariant variable after the
        within transform, of size ~1e-16 of the original) is then dropped,
        while a small-but-real column is kept.  A zero or non-finite entry
        means "no reference": that column is scaled by 1.  With ``scale``
        given, the reference magnitude in the rank test is
        ``max(|R_00|, 1)``: a scaled column has unit reference size, so a
        column reduced to rounding noise is dropped even when every column
        is small after the transform.

    Returns
    -------
    OlsFit

    Notes
    -----
    Rank detection: pivoted QR ``X_s P = Q R`` of the scaled block
    ``X_s = X / scale``, computed as the pivoted QR of the small triangular
    factor of ``[X_s, y]`` (see ``_stacked_r``): ``X_s = Q_1 R_x`` with
    orthonormal ``Q_1``, so ``R_x`` has the same column norms and pivots.
    The leading ``r`` pivoted columns are kept, where ``r`` counts the diagonal
    entries with ``|R_jj| > rtol * |R_00|``.  ``|R_00|`` is the largest
    column norm of ``X_s``, so an exactly zero column (``R_jj = 0``) is always
    dropped, and so is a column whose part orthogonal to the kept ones is below
    ``rtol`` of the largest column.  With ``n < k`` at most ``n`` columns can be
    kept.  Coefficients of kept columns solve ``R_11 b = Q_1' y``; dropped
    columns get 0, which is the minimum-information answer "not estimable", not
    an estimate.
    """
    y = np.asarray(y, dtype=np.float64)
    X = np.asarray(X, dtype=np.float64)
    if X.ndim == 1:
        X = X[:, None]
    n, k = X.shape
    if y.shape != (n,):
        raise ValueError(f"y has shape {y.shape}, expected ({n},) to match X {X.shape}")
    if not (np.isfinite(y).all() and np.isfinite(X).all()):
        raise ValueError("ols needs finite y and X; found NaN or infinite values")
    labels = list(names) if names is not None else list(range(k))
    if len(labels) != k:
        raise ValueError(f"{len(labels)} names for {k} columns")
    rtol = default_rtol(n, k) if rtol is None else float(rtol)

    col_scale = np.ones(k)
    if scale is not None:
        s = np.asarray(scale, dtype=np.float64).reshape(k)
        good = np.isfinite(s) & (s > 0)
        col_scale[good] = s[good]

    kept = np.zeros(k, dtype=bool)
    coef = np.zeros(k)
    xtx_inv = np.zeros((0, 0))
    rank = 0
    gram_route = n >= GRAM_MIN_ROWS
    if gram_route:
        # cross products resolve independent parts down to ~sqrt(eps), not eps
        rtol = max(rtol, GRAM_RTOL_FLOOR)
    if n > 0 and k > 0:
        # R of [X_s, y]: by blocks of rows, either by QR of each block or from
        # the blocks' cross products; only one block is ever copied
        r_xy = _gram_r(X, col_scale, y) if gram_route else _stacked_r(X, col_scale, y)
        kept, coef, xtx_inv, rank = _solve_r(r_xy, rtol, col_scale, scale is not None)
        if rank and gram_route:
            # one step of refinement (corrected semi-normal equations): the
            # residual's cross product fixes what the squared condition lost
            kept_idx = np.flatnonzero(kept)
            residual = y - X @ coef
            coef[kept_idx] += xtx_inv @ (X[:, kept_idx].T @ residual)
    # dropped columns have coefficient 0, so X @ coef needs no column copy
    resid = y - X @ coef if rank else y.copy()
    return OlsFit(
        coef=coef,
        resid=resid,
        kept=kept,
        dropped=[labels[j] for j in np.flatnonzero(~kept)],
        rank=rank,
        ssr=float(resid @ resid),
        xtx_inv=xtx_inv,
        n_obs=n,
        df_resid=max(n - rank, 0),
        rtol=rtol,
    )


def ols_from_r(
    r_xy: np.ndarray,
    n: int,
    names: Sequence[str] | None = None,
    scale: np.ndarray | None = None,
    gram: bool | None = None,
) -> OlsFit:
    """:func:`ols` from the triangular factor of ``[X, y]`` instead of the rows.

    ``r_xy`` is any (k+1, k+1) matrix with ``r_xy' r_xy = [X, y]'[X, y]`` (an R
    factor of the rows, or of a stack of partial R factors, or the square root
    of summed cross products), so a fit over many rows, or over rows that are
    the sum of a within part and an entity part, needs only small matrices.
    Rank detection, coefficients and ``xtx_inv`` are those of ``ols`` on the
    rows (with ``gram`` the tolerance floor of the cross-product route, by
    default from ``n``); ``resid`` is empty and ``ssr`` is ``r_xy[k, k]^2``.
    """
    r_xy = np.asarray(r_xy, dtype=np.float64)
    k = r_xy.shape[0] - 1
    labels = list(names) if names is not None else list(range(k))
    col_scale = np.ones(k)
    if scale is not None:
        s = np.asarray(scale, dtype=np.float64).reshape(k)
        good = np.isfinite(s) & (s > 0)
        col_scale[good] = s[good]
    rtol = default_rtol(n, k)
    if n >= GRAM_MIN_ROWS if gram is None else gram:
        rtol = max(rtol, GRAM_RTOL_FLOOR)
    scaled = r_xy.copy()
    scaled[:, :k] /= col_scale
    if n > 0 and k > 0:
        kept, coef, xtx_inv, rank = _solve_r(scaled, rtol, col_scale, scale is not None)
        # the part of y outside the kept columns: Q2'Q1'y beyond the rank, plus rho
        qty = _rotated_response(scaled, kept)
        ssr = float(qty @ qty)
    else:
        kept, coef, xtx_inv, rank = np.zeros(k, dtype=bool), np.zeros(k), np.zeros((0, 0)), 0
        ssr = float(r_xy[:, k] @ r_xy[:, k]) if k >= 0 else 0.0
    return OlsFit(
        coef=coef,
        resid=np.zeros(0),
        kept=kept,
        dropped=[labels[j] for j in np.flatnonzero(~kept)],
        rank=rank,
        ssr=ssr,
        xtx_inv=xtx_inv,
        n_obs=n,
        df_resid=max(n - rank, 0),
        rtol=rtol,
    )


def _rotated_response(r_xy: np.ndarray, kept: np.ndarray) -> np.ndarray:
    """The residual part of y in the R-factor representation, given the kept columns."""
    k = r_xy.shape[0] - 1
    target = r_xy[:, k]
    if not kept.any():
        return target
    design = r_xy[:, :k][:, kept]
    q, _ = np.linalg.qr(design)
    return target - q @ (q.T @ target)


def _solve_r(r_xy: np.ndarray, rtol: float, col_scale: np.ndarray, has_scale: bool):
    """Rank, kept columns, coefficients and ``(X'X)^-1`` from the R of ``[X_s, y]``."""
    k = r_xy.shape[0] - 1
    kept = np.zeros(k, dtype=bool)
    coef = np.zeros(k)
    xtx_inv = np.zeros((0, 0))
    rank = 0
    # the pivoted QR of R_x has the pivots and |R_jj| of the pivoted QR of X_s
    Q2, R, piv = scipy.linalg.qr(r_xy[:k, :k], pivoting=True, check_finite=False)
    diag = np.abs(np.diag(R))
    if diag.size and diag[0] > 0:
        reference = max(diag[0], 1.0) if has_scale else diag[0]
        rank = int(np.count_nonzero(diag > rtol * reference))
    if rank:
        qty = Q2.T @ r_xy[:k, k]
        R11 = R[:rank, :rank]
        b_piv = scipy.linalg.solve_triangular(R11, qty[:rank])
        R11_inv = scipy.linalg.solve_triangular(R11, np.eye(rank))
        inv_piv = R11_inv @ R11_inv.T
        sel = piv[:rank]
        order = np.argsort(sel)
        kept[sel] = True
        coef[sel] = b_piv / col_scale[sel]
        d = 1.0 / col_scale[sel[order]]
        xtx_inv = inv_piv[np.ix_(order, order)] * d[:, None] * d[None, :]
    return kept, coef, xtx_inv, rank


def _gram_r(X: np.ndarray, col_scale: np.ndarray, y: np.ndarray) -> np.ndarray:
    """An R with ``R'R = [X_s, y]'[X_s, y]``, from cross products of row blocks.

    The cross product is summed block by block (one block copy at a time,
    partition-ready), then factored as ``F = diag(sqrt(l)) V'`` from its
    eigen-decomposition (negative rounding eigenvalues set to 0, so a
    rank-deficient design needs no special case) and reduced to triangular
    form by a QR of the small F.  ``R`` equals the QR factor of the data up to
    row signs and the cross product's rounding.
    """
    n, k = X.shape
    gram = np.zeros((k + 1, k + 1))
    for start in range(0, n, QR_BLOCK_ROWS):
        stop = min(start + QR_BLOCK_ROWS, n)
        block = np.empty((stop - start, k + 1), order="F")
        np.divide(X[start:stop], col_scale, out=block[:, :k])
        block[:, k] = y[start:stop]
        gram += block.T @ block
    values, vectors = np.linalg.eigh(gram)
    root = np.sqrt(np.clip(values, 0.0, None))[:, None] * vectors.T
    return np.triu(scipy.linalg.qr(root, mode="r", check_finite=False)[0])


def _stacked_r(X: np.ndarray, col_scale: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Upper-triangular R of ``[X / col_scale, y]`` computed block by block of rows.

    Each block of ``QR_BLOCK_ROWS`` rows is factorised on its own (LAPACK
    ``geqrf``, no pivoting) and the small R factors are stacked and
    factorised again; the result is the R of the whole matrix up to the signs
    of its rows, which neither the pivots nor ``|R_jj|`` nor the solution
    depend on.  Memory holds one block copy at a time, and the blocks are
    independent, so the same reduction runs partition by partition.
    """
    n, k = X.shape
    factors = []
    for start in range(0, n, QR_BLOCK_ROWS):
        stop = min(start + QR_BLOCK_ROWS, n)
        block = np.empty((stop - start, k + 1), order="F")
        np.divide(X[start:stop], col_scale, out=block[:, :k])
        block[:, k] = y[start:stop]
        r = scipy.linalg.qr(block, mode="r", overwrite_a=True, check_finite=False)[0]
        factors.append(r[: min(stop - start, k + 1)])
    stacked = np.vstack(factors)
    if len(factors) > 1 or stacked.shape[0] < k + 1:
        stacked = scipy.linalg.qr(stacked, mode="r", check_finite=False)[0]
    out = np.zeros((k + 1, k + 1))
    rows = min(stacked.shape[0], k + 1)
    out[:rows] = np.triu(stacked[:rows])
    return out


def cluster_cov(
    X_kept: np.ndarray,
    resid: np.ndarray,
    cluster_codes: np.ndarray,
    xtx_inv: np.ndarray,
    n_clusters: int,
    correction: bool = True,
) -> np.ndarray:
    """Cluster-robust (sandwich) covariance of OLS coefficients.

    ``V = c * A (sum_g s_g s_g') A`` with ``A = xtx_inv`` and ``s_g`` the sum
    over the rows of cluster g of the scores ``x_it * e_it``; the cluster sums
    are one ``np.bincount`` per column.

    Parameters
    ----------
    X_kept : array (n, r)
        Regressors that entered the fit (``X[:, fit.kept]``).
    resid : array (n,)
        OLS residuals.
    cluster_codes : int array (n,)
        Dense cluster codes 0..n_clusters-1 (entity codes for entity
        clustering).
    xtx_inv : array (r, r)
        ``(X_kept' X_kept)^{-1}``.
    n_clusters : int
        Number of clusters G.
    correction : bool
        Apply the small-sample factor ``c = G/(G-1) * (n-1)/(n-r)``.  Each
        ratio is replaced by 1 when its denominator is not positive (G = 1 or
        n <= r) so the result stays finite; with ``correction=False``, c = 1.

    Returns
    -------
    ndarray (r, r)
    """
    X_kept = np.asarray(X_kept, dtype=np.float64)
    if X_kept.ndim == 1:
        X_kept = X_kept[:, None]
    n, r = X_kept.shape
    if r == 0:
        return np.zeros((0, 0))
    scores = np.empty((n_clusters, r), dtype=np.float64, order="F")
    for j in range(r):
        scores[:, j] = np.bincount(
            cluster_codes, weights=X_kept[:, j] * resid, minlength=n_clusters
        )
    return sandwich(scores, xtx_inv, n, n_clusters, correction)


def sandwich(
    scores: np.ndarray, xtx_inv: np.ndarray, n: int, n_clusters: int, correction: bool = True
) -> np.ndarray:
    """``c * A (sum_g s_g s_g') A`` from the cluster scores ``s_g`` (G, r) (see ``cluster_cov``)."""
    r = scores.shape[1]
    if r == 0:
        return np.zeros((0, 0))
    meat = scores.T @ scores
    cov = xtx_inv @ meat @ xtx_inv
    if correction:
        g_factor = n_clusters / (n_clusters - 1) if n_clusters > 1 else 1.0
        n_factor = (n - 1) / (n - r) if n > r else 1.0
        cov = cov * (g_factor * n_factor)
    return (cov + cov.T) / 2.0


def independent_columns(
    columns: Sequence[np.ndarray], scale: np.ndarray, rtol: float | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Which columns, taken in order, add a direction the earlier kept ones lack.

    Parameters
    ----------
    columns : sequence of k float64 arrays (n,)
        The columns of a design, in the order of preference (a column is
        left out in favour of the earlier ones it depends on).  They are read
        block by block of rows; no (n, k) copy is made.
    scale : array (k,)
        Reference magnitude of each column (the norm of the untransformed
        column), as in :func:`ols`; 0 or non-finite means 1.
    rtol : float, optional
        Relative tolerance; default as in :func:`ols` (with the same floor
        on the cross-product route).

    Returns
    -------
    kept : bool (k,)
        Column j's part orthogonal to the kept columns before it has a norm
        above ``rtol * max(largest scaled column norm, 1)``.  Computed by
        Gram-Schmidt on a k x k matrix with the columns' inner products (the
        R of a tall-skinny QR, or a root of the cross products from
        ``GRAM_MIN_ROWS`` rows on), so the cost is one pass over the rows.
    negligible : bool (k,)
        Columns whose own scaled norm is below the same bound: nothing of
        the column is left (a transform wiped it out), as opposed to a
        column that is a combination of others.
    """
    k = len(columns)
    n = len(columns[0]) if k else 0
    if n == 0 or k == 0:
        return np.zeros(k, dtype=bool), np.zeros(k, dtype=bool)
    inner = column_factor(columns, reference_scale(scale, k), gram_route=n >= GRAM_MIN_ROWS)
    return independent_from_inner(inner, decision_rtol(n, k, rtol))


def reference_scale(scale: np.ndarray, k: int) -> np.ndarray:
    """``scale`` (k,) with 0 or non-finite entries read as 1."""
    s = np.asarray(scale, dtype=np.float64).reshape(k).copy()
    s[~(np.isfinite(s) & (s > 0))] = 1.0
    return s


def decision_rtol(n: int, k: int, rtol: float | None = None) -> float:
    """The tolerance of :func:`independent_columns` for ``n`` rows and ``k`` columns."""
    rtol = default_rtol(n, k) if rtol is None else float(rtol)
    return max(rtol, GRAM_RTOL_FLOOR) if n >= GRAM_MIN_ROWS else rtol


def column_factor(columns: Sequence[np.ndarray], s: np.ndarray, gram_route: bool) -> np.ndarray:
    """A (m, k) matrix whose columns have the inner products of ``columns[j] / s[j]``.

    The R of a tall-skinny QR of row blocks, or (``gram_route``) a root of
    the blocks' summed cross products.  Parts of the rows give factors whose
    stack, reduced by a QR (``_moments.triangular``), is a factor of the whole.
    """
    k = len(columns)
    n = len(columns[0]) if k else 0
    gram = np.zeros((k, k))
    factors = [np.zeros((0, k))]
    for start in range(0, n, QR_BLOCK_ROWS):
        stop = min(start + QR_BLOCK_ROWS, n)
        block = np.empty((stop - start, k), order="F")
        for j, column in enumerate(columns):
            np.divide(column[start:stop], s[j], out=block[:, j])
        if gram_route:
            gram += block.T @ block
        else:
            r = scipy.linalg.qr(block, mode="r", overwrite_a=True, check_finite=False)[0]
            factors.append(r[: min(stop - start, k)])
    if gram_route:
        values, vectors = np.linalg.eigh(gram)
        return np.sqrt(np.clip(values, 0.0, None))[:, None] * vectors.T
    stacked = np.vstack(factors)
    return (scipy.linalg.qr(stacked, mode="r", check_finite=False)[0]
            if len(factors) > 2 else stacked)


def independent_from_inner(inner: np.ndarray, rtol: float) -> tuple[np.ndarray, np.ndarray]:
    """``(kept, negligible)`` of :func:`independent_columns` from a :func:`column_factor`."""
    k = inner.shape[1]
    kept = np.zeros(k, dtype=bool)
    # the columns of ``inner`` have the inner products of the scaled columns;
    # Gram-Schmidt over them, skipping a column that adds nothing, so a
    # dependent column's rounding noise never becomes a direction
    norms = np.linalg.norm(inner, axis=0) if inner.shape[0] else np.zeros(k)
    bound = rtol * max(float(norms.max()) if k else 0.0, 1.0)
    basis = np.zeros((inner.shape[0], 0))
    for j in range(k):
        v = inner[:, j].copy()
        for _ in range(2):  # twice is enough (Kahan-Parlett)
            v -= basis @ (basis.T @ v)
        left = float(np.linalg.norm(v))
        if left > bound:
            kept[j] = True
            basis = np.column_stack([basis, v / left])
    negligible = norms <= bound
    return kept, negligible
