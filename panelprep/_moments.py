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

from collections.abc import Callable
from dataclasses import dataclass
from functools import cached_property

import numpy as np
import scipy.linalg

from panelprep._groups import group_sums
from panelprep._linalg import GRAM_MIN_ROWS, QR_BLOCK_ROWS
from panelprep._scale import Scaling, scaled_group_means


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

    def within_residuals(self, x_column: Callable[..., np.ndarray], y: np.ndarray,
                         coef: np.ndarray) -> np.ndarray:
        """``e = y_w - X_w coef`` (n,), the within residual, one regressor at a time.

        ``x_column(j, out=buffer)`` gives regressor ``j`` of the (scaled)
        sample (``StandardSample.x_column``); ``y`` is the scaled response.
        """
        k = self.k
        resid = y - self.means[:, k][self.codes]
        column = np.empty(len(y))
        centre = np.empty(len(y))
        for j in np.flatnonzero(coef):
            x_column(j, out=column)
            column -= np.take(self.means[:, j], self.codes, out=centre)
            resid -= coef[j] * column
        return resid

    def within_scores(self, x_column: Callable[..., np.ndarray], y: np.ndarray,
                      coef: np.ndarray) -> np.ndarray:
        """``sum_t w_it e_it`` per entity (G, k), ``e = y_w - X_w coef`` the within residual.

        ``x_column(j, out=buffer)`` gives regressor ``j`` of the (scaled)
        sample (``StandardSample.x_column``).  Two sweeps over the columns
        with two n-vector buffers; neither the within block nor the scaled
        regressors are ever held whole.
        """
        n_groups, k = len(self.counts), self.k
        resid = self.within_residuals(x_column, y, coef)
        column = np.empty(len(y))
        centre = np.empty(len(y))
        out = np.empty((n_groups, k), order="F")
        for j in range(k):
            x_column(j, out=column)
            column -= np.take(self.means[:, j], self.codes, out=centre)
            column *= resid
            out[:, j] = group_sums(self.codes, column, n_groups)
        return out


def entity_moments(X: np.ndarray, y: np.ndarray, codes: np.ndarray,
                   counts: np.ndarray, x_scaling: Scaling | None = None,
                   y_scaling: Scaling | None = None,
                   means: np.ndarray | None = None) -> EntityMoments:
    """Counts, means and the within factor of ``[X, y]`` in one pass over the rows.

    ``X`` (n, k) and ``y`` (n,) should be standardised (centred, scaled;
    ``_scale.standardise``) so that no cross product loses digits to a level;
    or raw, with their ``_scale.Scaling`` given, and then each column and
    row block is scaled as it is read (no scaled copy of the sample).
    The factor is a tall-skinny QR of row blocks below ``GRAM_MIN_ROWS`` rows
    and the square root of the blocks' summed cross product from there on,
    as in ``_linalg.ols``.  ``means`` (G, k + 1), the entity means of the
    scaled ``[X, y]``, are taken as given when the caller has them.
    """
    n, k = X.shape
    n_groups = len(counts)
    t = np.asarray(counts, dtype=np.float64)
    inv = np.zeros(n_groups)
    np.divide(1.0, t, out=inv, where=t > 0)
    y2 = y.reshape(n, 1)
    buffer = np.empty(n) if x_scaling is not None or y_scaling is not None else None

    def column(block, scale, j):
        return block[:, j] if scale is None else scale.column(block, j, out=buffer)

    def rows(block, scale, start, stop):
        return block[start:stop] if scale is None else scale.rows(block, start, stop)

    if means is None:
        means = np.empty((n_groups, k + 1), order="F")
        for j in range(k):
            means[:, j] = group_sums(codes, column(X, x_scaling, j), n_groups) * inv
        means[:, k] = group_sums(codes, column(y2, y_scaling, 0), n_groups) * inv
    within_ss = np.zeros(k + 1)
    total_ss = np.zeros(k + 1)
    factor = RowFactor(k + 1, n)
    for start in range(0, n, QR_BLOCK_ROWS):
        stop = min(start + QR_BLOCK_ROWS, n)
        block = np.empty((stop - start, k + 1), order="F")
        block[:, :k] = rows(X, x_scaling, start, stop)
        block[:, k] = rows(y2, y_scaling, start, stop)[:, 0]
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


@dataclass(eq=False)
class ScaledMoments:
    """A sample known by its columns' ``_scale.Scaling`` and its :class:`EntityMoments`.

    Everything the components (``swamy-arora``, ``nerlove``) and the
    files' regressor decisions read; the dask engine builds one from
    moments added up over partitions (:func:`combined_moments`), the local
    engine's :class:`StandardSample` adds the rows.
    """

    x_scaling: Scaling
    y_scaling: Scaling
    moments: EntityMoments

    @property
    def n(self) -> int:
        return self.moments.n

    @property
    def k(self) -> int:
        return self.moments.k

    @property
    def unit(self) -> float:
        """The response's scale: a second moment of ``y`` times ``unit**2`` is in its units."""
        return float(self.y_scaling.scale[0])

    def centred_norms(self) -> np.ndarray:
        """``||x_j - mean(x_j)||`` of each raw regressor, from the scaled sums of squares."""
        with np.errstate(over="ignore"):
            return self.x_scaling.scale * np.sqrt(self.moments.total_ss[:self.k])

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


@dataclass(eq=False)
class StandardSample(ScaledMoments):
    """The estimation sample with its scaling and shared per-entity statistics.

    Built once per sample (:func:`standard_sample`) and read by the variance
    components, every evidence test and the transformed files' column
    decisions.  The sample is kept raw with each column's
    ``_scale.Scaling``: a test that needs scaled rows reads them a column at
    a time (:meth:`x_column`, :meth:`y_column`); ``X`` and ``y``, the whole
    scaled block, are made only when a method asks for them.
    """

    raw_X: np.ndarray = None
    raw_y: np.ndarray = None
    codes: np.ndarray = None
    counts: np.ndarray = None

    @cached_property
    def X(self) -> np.ndarray:
        """The scaled regressors (n, k), Fortran-ordered."""
        return self.x_scaling.rows(self.raw_X, 0, self.n)

    @cached_property
    def y(self) -> np.ndarray:
        """The scaled response (n,)."""
        return self.y_column()

    def x_column(self, j: int, out: np.ndarray | None = None) -> np.ndarray:
        """Scaled regressor ``j`` (into ``out`` when given)."""
        return self.x_scaling.column(self.raw_X, j, out=out)

    def y_column(self, out: np.ndarray | None = None) -> np.ndarray:
        """The scaled response (into ``out`` when given)."""
        return self.y_scaling.column(self.raw_y.reshape(-1, 1), 0, out=out)


def combined_moments(parts: list[EntityMoments]) -> EntityMoments:
    """The moments of the union of disjoint sets of whole entities, one part each.

    Taken with one ``_scale.Scaling`` for every part (the whole sample's),
    so entity means and within cross products are those of the union:
    counts and means are stacked (entities in the order of the parts), sums
    of squares added, and the within factors stacked and reduced by a QR
    (``R'R`` = the sum of the parts' cross products).  No row codes are
    kept: what reads them (``within_scores``, the methods that need the
    rows) is not run on such moments.
    """
    width = parts[0].r_within.shape[0]
    return EntityMoments(
        codes=np.zeros(0, dtype=np.int64),
        counts=np.concatenate([p.counts for p in parts]),
        means=np.vstack([p.means for p in parts]),
        r_within=triangular(np.vstack([p.r_within for p in parts]), width),
        within_ss=np.sum([p.within_ss for p in parts], axis=0),
        total_ss=np.sum([p.total_ss for p in parts], axis=0),
        n=int(sum(p.n for p in parts)),
    )


def standard_sample(y: np.ndarray, X: np.ndarray, codes: np.ndarray,
                    counts: np.ndarray,
                    shared: tuple[Scaling, np.ndarray] | None = None) -> StandardSample:
    """The sample ``y`` (n,), ``X`` (n, k) with its scaling and moments, in one pass or two.

    ``counts`` (G,) are the rows per entity of the dense ``codes``.  The
    moments are taken on the scaled columns (``_scale.standardise``), which
    are centred, so the entity means and the factor of the within block
    carry no digits lost to a level; no scaled copy of the rows is kept.
    ``shared`` is :func:`~panelprep._scale.scaled_group_means` of the block
    ``[y, X]`` when the caller has it (the audit's variation table took it
    on the same rows): the scaling and entity means are then not taken again.
    """
    y = np.asarray(y, dtype=np.float64).reshape(-1)
    X = np.asarray(X, dtype=np.float64)
    if X.ndim == 1:
        X = X[:, None]
    k = X.shape[1]
    sizes = np.asarray(counts, dtype=np.int64)
    if shared is None:
        x_scaling, x_means = scaled_group_means(X, codes, sizes)
        y_scaling, y_means = scaled_group_means(y.reshape(-1, 1), codes, sizes)
    else:
        block_scaling, block_means = shared
        x_scaling, x_means = block_scaling.take(slice(1, k + 1)), block_means[:, 1:k + 1]
        y_scaling, y_means = block_scaling.take([0]), block_means[:, :1]
    means = np.empty((len(sizes), k + 1), order="F")
    means[:, :k] = x_means
    means[:, k:] = y_means
    return StandardSample(raw_X=X, raw_y=y, codes=codes, counts=sizes, x_scaling=x_scaling,
                          y_scaling=y_scaling,
                          moments=entity_moments(X, y, codes, sizes, x_scaling, y_scaling,
                                                 means))


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
