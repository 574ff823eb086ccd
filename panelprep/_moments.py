"""Shared per-entity statistics of a column block, and regressions built from them.

Every regression the evidence runs has rows that split into a *within* part
(deviations from entity means, summing to zero in each entity) and an
*entity* part (constant within an entity): pooled OLS on ``[1, X]``, the
random-effects (quasi-demeaned) regression on ``[1 - theta_i, X*]``, the
Mundlak regression that adds ``(1 - theta_i) xbar_i``, the within
regression.  The two parts are orthogonal, so each design's cross product is

``Z'Z = W'W + sum_i T_i c_i c_i'``

with ``W`` the within part (the same for all of them, up to which columns
enter) and ``c_i`` a short entity row.  :class:`EntityMoments` holds, from
one pass over the rows, the entity counts and means and a triangular factor
``R`` of the within block ``[X, y] - entity means`` (``R'R = W'W``).  A
regression is then the small stack ``[R; sqrt(T_i) c_i]`` (k + 1 + G rows),
whose cross product equals the design's: the same rank decisions,
coefficients and ``(Z'Z)^-1`` as on the n rows (``_linalg.ols_from_r``), and
no n x (2k + 1) design is ever formed.

Only an entity-clustered covariance needs the rows once more: the within
part of each entity's score, ``sum_t w_it e_it``, is one group sum per
column (:meth:`EntityMoments.within_scores`).

The pass over the rows is by blocks and each block's contribution is a sum
(a partial R factor, or a cross product), so the same statistics can be
assembled partition by partition.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg

from panelprep._groups import group_sums
from panelprep._linalg import GRAM_MIN_ROWS, QR_BLOCK_ROWS


@dataclass(frozen=True, eq=False)
class EntityMoments:
    """Per-entity statistics of ``[X, y]`` on the estimation sample.

    Attributes
    ----------
    codes : int array (n,)
        Dense entity codes.
    counts : float array (G,)
        Rows per entity ``T_i``.
    means : float array (G, k + 1)
        Entity means of ``[X, y]`` (0 for an entity without rows).
    r_within : float array (k + 1, k + 1)
        Upper-triangular, ``R'R`` = cross product of the within block.
    within_ss : float array (k + 1,)
        Sums of squared within deviations per column, summed directly (not
        read off ``R``, whose rounding would hide an exactly constant column).
    total_ss : float array (k + 1,)
        Sums of squares of the columns themselves.
    n : int
        Rows.
    """

    codes: np.ndarray
    counts: np.ndarray
    means: np.ndarray
    r_within: np.ndarray
    within_ss: np.ndarray
    total_ss: np.ndarray
    n: int

    @property
    def k(self) -> int:
        return self.means.shape[1] - 1

    def within_residuals(self, X: np.ndarray, y: np.ndarray, coef: np.ndarray) -> np.ndarray:
        """``e = y_w - X_w coef`` (n,), the within residual, one column of X_w at a time."""
        resid = y - self.means[:, self.k][self.codes]
        column = np.empty(len(y))
        for j in np.flatnonzero(coef):
            np.subtract(X[:, j], self.means[:, j][self.codes], out=column)
            resid -= coef[j] * column
        return resid

    def within_scores(self, X: np.ndarray, y: np.ndarray, coef: np.ndarray) -> np.ndarray:
        """``sum_t w_it e_it`` per entity (G, k), ``e = y_w - X_w coef`` the within residual.

        Two sweeps over the columns with one n-vector buffer each; the
        within block is never held whole.
        """
        n_groups = len(self.counts)
        resid = self.within_residuals(X, y, coef)
        column = np.empty(len(y))
        out = np.empty((n_groups, X.shape[1]), order="F")
        for j in range(X.shape[1]):
            np.subtract(X[:, j], self.means[:, j][self.codes], out=column)
            column *= resid
            out[:, j] = group_sums(self.codes, column, n_groups)
        return out


def entity_moments(X: np.ndarray, y: np.ndarray, codes: np.ndarray,
                   counts: np.ndarray) -> EntityMoments:
    """Counts, means and the within factor of ``[X, y]`` in one pass over the rows.

    ``X`` (n, k) and ``y`` (n,) should be standardised (centred, scaled;
    ``_scale.standardise``) so that no cross product loses digits to a level.
    The factor is a tall-skinny QR of row blocks below ``GRAM_MIN_ROWS`` rows
    and the square root of the blocks' summed cross product from there on,
    as in ``_linalg.ols``.
    """
    n, k = X.shape
    n_groups = len(counts)
    t = np.asarray(counts, dtype=np.float64)
    inv = np.zeros(n_groups)
    np.divide(1.0, t, out=inv, where=t > 0)
    means = np.empty((n_groups, k + 1), order="F")
    for j in range(k):
        means[:, j] = group_sums(codes, X[:, j], n_groups) * inv
    means[:, k] = group_sums(codes, y, n_groups) * inv
    within_ss = np.zeros(k + 1)
    total_ss = np.zeros(k + 1)
    factor = RowFactor(k + 1, n)
    for start in range(0, n, QR_BLOCK_ROWS):
        stop = min(start + QR_BLOCK_ROWS, n)
        block = np.empty((stop - start, k + 1), order="F")
        block[:, :k] = X[start:stop]
        block[:, k] = y[start:stop]
        total_ss += np.einsum("ij,ij->j", block, block)
        block -= means[codes[start:stop]]
        within_ss += np.einsum("ij,ij->j", block, block)
        factor.add(block)
    return EntityMoments(codes=codes, counts=t, means=means, r_within=factor.r(),
                         within_ss=within_ss, total_ss=total_ss, n=n)


class RowFactor:
    """A triangular factor of rows that arrive in blocks (``R'R`` = their cross product).

    Below ``GRAM_MIN_ROWS`` rows in all, each block is reduced by a QR and
    the partial factors are stacked; from there on the blocks' cross
    products are summed and the factor is their square root, as in
    ``_linalg.ols``.  A block may be overwritten by :meth:`add`.
    """

    def __init__(self, width: int, n: int):
        self.width = width
        self.gram = n >= GRAM_MIN_ROWS
        self.cross = np.zeros((width, width))
        self.factors: list[np.ndarray] = []

    def add(self, block: np.ndarray) -> None:
        if self.gram:
            self.cross += block.T @ block
        elif len(block):
            r = scipy.linalg.qr(block, mode="r", overwrite_a=True, check_finite=False)[0]
            self.factors.append(r[: min(len(block), self.width)])

    def r(self) -> np.ndarray:
        if self.gram:
            values, vectors = np.linalg.eigh(self.cross)
            root = np.sqrt(np.clip(values, 0.0, None))[:, None] * vectors.T
            return triangular(root, self.width)
        rows = np.vstack(self.factors) if self.factors else np.zeros((0, self.width))
        return triangular(rows, self.width)


def triangular(rows: np.ndarray, width: int) -> np.ndarray:
    """The (width, width) upper-triangular R with ``R'R = rows'rows``."""
    out = np.zeros((width, width))
    if rows.shape[0] == 0:
        return out
    r = scipy.linalg.qr(rows, mode="r", check_finite=False)[0]
    top = min(r.shape[0], width)
    out[:top] = np.triu(r[:top])
    return out


def stacked_factor(within_part: np.ndarray, entity_rows: np.ndarray,
                   weights: np.ndarray) -> np.ndarray:
    """R of the stack ``[within_part; sqrt(weights_i) * entity_rows_i]``.

    ``within_part`` (m, p) carries the within rows' cross product (columns
    with no within part are zero), ``entity_rows`` (G, p) one row per entity
    and ``weights`` (G,) the rows each stands for (``T_i``).  The result's
    cross product is that of the n-row design the two parts add up to.
    """
    present = weights > 0
    rows = entity_rows[present] * np.sqrt(weights[present])[:, None]
    return triangular(np.vstack([within_part, rows]), within_part.shape[1])
