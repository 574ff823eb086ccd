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
from panelprep._scale import standardise


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

    def within_scores(self, X: np.ndarray, y: np.ndarray, coef: np.ndarray) -> np.ndarray:
        """``sum_t w_it e_it`` per entity (G, k), ``e = y_w - X_w coef`` the within residual.

        Two sweeps over the columns with one n-vector buffer each; the
        within block is never held whole.
        """
        n_groups = len(self.counts)
        resid = y - self.means[:, self.k][self.codes]
        column = np.empty(len(y))
        for j in np.flatnonzero(coef):
            np.subtract(X[:, j], self.means[:, j][self.codes], out=column)
            resid -= coef[j] * column
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
    gram = n >= GRAM_MIN_ROWS
    cross = np.zeros((k + 1, k + 1))
    factors = []
    for start in range(0, n, QR_BLOCK_ROWS):
        stop = min(start + QR_BLOCK_ROWS, n)
        block = np.empty((stop - start, k + 1), order="F")
        block[:, :k] = X[start:stop]
        block[:, k] = y[start:stop]
        total_ss += np.einsum("ij,ij->j", block, block)
        block -= means[codes[start:stop]]
        within_ss += np.einsum("ij,ij->j", block, block)
        if gram:
            cross += block.T @ block
        else:
            r = scipy.linalg.qr(block, mode="r", overwrite_a=True, check_finite=False)[0]
            factors.append(r[: min(stop - start, k + 1)])
    if gram:
        values, vectors = np.linalg.eigh(cross)
        root = np.sqrt(np.clip(values, 0.0, None))[:, None] * vectors.T
        r_within = triangular(root, k + 1)
    else:
        r_within = triangular(np.vstack(factors) if factors else np.zeros((0, k + 1)), k + 1)
    return EntityMoments(codes=codes, counts=t, means=means, r_within=r_within,
                         within_ss=within_ss, total_ss=total_ss, n=n)


@dataclass(eq=False)
class StandardSample:
    """The estimation sample, standardised, with its shared per-entity statistics.

    Built once per sample (:func:`standard_sample`) and read by the variance
    components, every evidence test and the transformed files' column
    decisions, so the rows are standardised and summed once.
    """

    X: np.ndarray
    y: np.ndarray
    codes: np.ndarray
    counts: np.ndarray
    unit: float
    moments: EntityMoments
    x_unit: np.ndarray | None = None

    @property
    def n(self) -> int:
        return len(self.y)

    @property
    def k(self) -> int:
        return self.X.shape[1]

    def centred_norms(self) -> np.ndarray:
        """``||x_j - mean(x_j)||`` of each raw regressor, from the scaled sums of squares."""
        with np.errstate(over="ignore"):
            return self.x_unit * np.sqrt(self.moments.total_ss[:self.k])

    def within_rows(self, extra: int = 0) -> np.ndarray:
        """Within part of a design ``[entity column, X, extra entity columns, y]``."""
        k, r = self.k, self.moments.r_within
        rows = np.zeros((k + 1, k + 2 + extra))
        rows[:, 1:1 + k] = r[:, :k]
        rows[:, -1] = r[:, k]
        return rows

    def entity_rows(self, weight: np.ndarray, extra: list[int] | None = None) -> np.ndarray:
        """Entity part ``weight_i [1, xbar_i, xbar_i[extra], ybar_i]``, one row per entity."""
        means = self.moments.means
        columns = [np.ones(len(weight)), *means[:, :self.k].T,
                   *(means[:, j] for j in (extra or [])), means[:, self.k]]
        return np.column_stack(columns) * weight[:, None]


def standard_sample(y: np.ndarray, X: np.ndarray, codes: np.ndarray,
                    counts: np.ndarray) -> StandardSample:
    """Standardise ``y`` (n,) and ``X`` (n, k) (``_scale.standardise``) and take their moments.

    ``counts`` (G,) are the rows per entity of the dense ``codes``.  The
    scaled columns are centred, so the entity means and the factor of the
    within block carry no digits lost to a level.
    """
    y_std, X_std = standardise(y), standardise(X)
    z, Z = y_std.z[:, 0], X_std.z
    sizes = np.asarray(counts, dtype=np.int64)
    return StandardSample(X=Z, y=z, codes=codes, counts=sizes, unit=float(y_std.scale[0]),
                          moments=entity_moments(Z, z, codes, sizes),
                          x_unit=np.asarray(X_std.scale, dtype=np.float64).reshape(-1))


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
