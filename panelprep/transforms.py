"""Estimation-ready transforms of panel value blocks.

All functions take the estimation sample only: dense integer codes 0..G-1
(no -1) and finite float64 values, 1-D ``(n,)`` or 2-D ``(n, k)`` in any
memory order.  2-D results are allocated column-major (Fortran order).  Work
that grows with the data is one ``np.bincount`` per column and per grouping
plus broadcasts back to rows by fancy indexing; the only loops are over
columns.

* :func:`within` - deviations from entity means (``M_e x``).
* :func:`between` - entity means, one row per entity.
* :func:`quasi` - quasi-demeaning ``x - theta_i * xbar_i`` (random-effects GLS).
* :func:`theta_per_entity` - ``theta_i`` from the two variance components.
* :func:`twoway` - deviations from entity and period effects together, exact
  on unbalanced panels with gaps.
* :func:`first_difference` - ``x_it - x_i,t-1`` where the entity's previous
  period is observed (gap-aware: never across a hole or another entity).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg

from panelprep._groups import compact_codes, group_counts, group_sums
from panelprep._scale import standardise

# Above this many levels in the smaller of the two groupings the (levels x
# levels) normal equations are solved by preconditioned conjugate gradients
# instead of a dense Cholesky factorisation.
DIRECT_MAX_LEVELS = 5000

# Largest (levels_a * levels_b) for which the incidence matrix is formed
# dense (float64, so at most 128 MiB); beyond it a sparse matrix is used.
DENSE_INCIDENCE_MAX = 1 << 24

# Refinement rounds after the direct solve, each one more solve against the
# normal-equation residual; rounding rarely needs more than one.
DIRECT_REFINE_ROUNDS = 3


def _as_block(values: np.ndarray) -> tuple[np.ndarray, bool]:
    """View ``values`` as (n, k) float64; report whether the input was 1-D."""
    arr = np.asarray(values, dtype=np.float64)
    if arr.ndim == 1:
        return arr[:, None], True
    if arr.ndim != 2:
        raise ValueError(f"values must be 1-D or 2-D, got {arr.ndim}-D")
    return arr, False


def _safe_inverse_counts(counts: np.ndarray) -> np.ndarray:
    """1 / counts as float64, with 0 for empty groups (their sums are 0 too)."""
    counts = np.asarray(counts, dtype=np.float64)
    out = np.zeros_like(counts)
    np.divide(1.0, counts, out=out, where=counts > 0)
    return out


def _check_codes(codes: np.ndarray, n_rows: int, n_groups: int, what: str) -> np.ndarray:
    codes = np.asarray(codes)
    if codes.shape != (n_rows,):
        raise ValueError(f"{what} has shape {codes.shape}, expected ({n_rows},)")
    if n_rows and (codes.min() < 0 or codes.max() >= n_groups):
        raise ValueError(f"{what} must be dense codes 0..{n_groups - 1} (estimation sample only)")
    return codes


def within(values: np.ndarray, codes: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """Deviations from entity means, ``x_it - xbar_i``.

    Parameters
    ----------
    values : array (n,) or (n, k)
        Finite float64 values of the estimation sample.
    codes : int array (n,)
        Entity codes 0..G-1.
    counts : int array (G,)
        Rows per entity ``T_i`` (``group_counts(codes, G)``).

    Returns
    -------
    ndarray
        Same shape as ``values``; 2-D output is Fortran-ordered.  The mean is
        ``sum / T_i`` (no ddof; this is a projection, not a variance).
    """
    return _subtract_group_sums(values, codes, counts, _safe_inverse_counts(counts))


@dataclass(frozen=True)
class Differences:
    """What :func:`first_difference` built and left out.

    ``rows`` are the positions (into the input rows, ascending) whose
    difference is in ``values``; ``first_rows`` counts rows that are their
    entity's first, ``across_holes`` rows whose previous observed period is
    more than one period back (their difference would span a hole, so it is
    missing: left out and counted).
    """

    values: np.ndarray
    rows: np.ndarray
    first_rows: int
    across_holes: int


def first_difference(values: np.ndarray, codes: np.ndarray,
                     periods: np.ndarray) -> Differences:
    """First differences ``x_it - x_i,t-1`` on the period grid.

    One sort by (entity, period); a row is differenced against the row
    before it in that order when both belong to one entity and their periods
    are one grid step apart.  (entity, period) cells must be unique.
    """
    block, flat = _as_block(values)
    n = block.shape[0]
    codes = np.asarray(codes, dtype=np.int64)
    periods = np.asarray(periods, dtype=np.int64)
    order = np.lexsort((periods, codes))
    entity, period = codes[order], periods[order]
    same = entity[1:] == entity[:-1]
    gap = period[1:] - period[:-1]
    if (same & (gap == 0)).any():
        raise ValueError("first_difference needs unique (entity, period) cells")
    usable = same & (gap == 1)
    later, earlier = order[1:][usable], order[:-1][usable]
    ascending = np.argsort(later, kind="stable")
    later, earlier = later[ascending], earlier[ascending]
    out = np.empty((len(later), block.shape[1]), dtype=np.float64, order="F")
    for j in range(block.shape[1]):
        out[:, j] = block[later, j] - block[earlier, j]
    first_rows = int(n - same.sum()) if n else 0
    return Differences(values=out[:, 0] if flat else out, rows=later, first_rows=first_rows,
                       across_holes=int((same & (gap > 1)).sum()))


def between(values: np.ndarray, codes: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """Entity means ``xbar_i = sum_t x_it / T_i``.

    Returns
    -------
    ndarray (G,) or (G, k)
        One row per entity, Fortran-ordered when 2-D; entities with no rows
        get 0.
    """
    block, flat = _as_block(values)
    n, k = block.shape
    codes = _check_codes(codes, n, len(counts), "codes")
    inv = _safe_inverse_counts(counts)
    out = np.empty((len(counts), k), dtype=np.float64, order="F")
    for j in range(k):
        out[:, j] = _weighted_group_sums(codes, block[:, j], len(counts), inv)
    return out[:, 0] if flat else out


# 2^-64: a sum of fewer than 2^64 scaled values stays below the largest float
_SUM_SCALE = 2.0**-64


def _weighted_group_sums(codes: np.ndarray, col: np.ndarray, n_groups: int,
                         weight: np.ndarray) -> np.ndarray:
    """``weight_i * sum_i(x)``, finite whenever the result is (values near 1e308 included).

    A group whose plain sum overflows (two values near -1e308) is summed again
    with every value scaled by 2^-64 and the weighted sum scaled back; scaling
    by a power of two is exact apart from values far below the group's own
    magnitude, which the weighted sum cannot show anyway.
    """
    with np.errstate(over="ignore", invalid="ignore"):
        sums = group_sums(codes, col, n_groups)
    overflow = ~np.isfinite(sums)
    if not overflow.any():
        return sums * weight
    out = np.where(overflow, 0.0, sums) * weight
    scaled = group_sums(codes, col * _SUM_SCALE, n_groups)[overflow]
    out[overflow] = scaled * weight[overflow] / _SUM_SCALE
    return out


def quasi(
    values: np.ndarray, codes: np.ndarray, counts: np.ndarray, theta: np.ndarray
) -> np.ndarray:
    """Quasi-demeaned values ``x_it - theta_i * xbar_i``.

    With ``theta_i`` from :func:`theta_per_entity`, OLS on the quasi-demeaned
    response and regressors, plus the column ``1 - theta_i`` for the
    intercept, is GLS under the one-way error-component covariance
    ``s2_e * I + s2_u * (entity block of ones)``.

    Parameters
    ----------
    values : array (n,) or (n, k)
    codes : int array (n,)
        Entity codes 0..G-1.
    counts : int array (G,)
        Rows per entity.
    theta : array (G,)
        Per-entity weight in [0, 1]: 0 leaves the data unchanged, 1 is the
        within transform.

    Returns
    -------
    ndarray
        Same shape as ``values``; 2-D output is Fortran-ordered.
    """
    theta = np.asarray(theta, dtype=np.float64)
    if theta.shape != (len(counts),):
        raise ValueError(f"theta has shape {theta.shape}, expected ({len(counts)},)")
    return _subtract_group_sums(values, codes, counts, theta * _safe_inverse_counts(counts))


def _subtract_group_sums(values, codes, counts, weight: np.ndarray) -> np.ndarray:
    """``x - weight_i * sum_i(x)`` column by column: within (weight 1/T_i), quasi (theta_i/T_i).

    One bincount and one take per column into reused buffers.
    """
    block, flat = _as_block(values)
    n, k = block.shape
    codes = _check_codes(codes, n, len(counts), "codes")
    out = np.empty((n, k), dtype=np.float64, order="F")
    buf = np.empty(n, dtype=np.float64)
    for j in range(k):
        col = block[:, j]
        shift = _weighted_group_sums(codes, col, len(counts), weight)
        np.take(shift, codes, out=buf, mode="clip")
        np.subtract(col, buf, out=out[:, j])
    return out[:, 0] if flat else out


class DemeanedBlock:
    """``values[rows] - weight_i * sum_i(values)``, read by row ranges, never held whole.

    The within block (``weight = 1 / T_i``) or the quasi-demeaned block
    (``theta_i / T_i``) of a file is written in pieces of rows and its
    regressors are judged column by column (``_linalg.independent_columns``
    reads ``block[:, j][start:stop]``), so no (n, k) output block exists.
    Each element is computed as in :func:`within` and :func:`quasi` (the
    entity sums of the whole column, then one subtraction), so the numbers
    are the same to the last bit.

    Parameters
    ----------
    values : array (n, k)
        Sample block.
    codes, counts :
        Entity codes of the rows and rows per entity.
    weight : array (G,)
        Multiplier of each entity's column sums.
    rows : int array (m,), optional
        Positions of the rows the block keeps (all when None), ascending.
    """

    def __init__(self, values: np.ndarray, codes: np.ndarray, counts: np.ndarray,
                 weight: np.ndarray, rows: np.ndarray | None = None):
        block, _ = _as_block(values)
        codes = _check_codes(codes, block.shape[0], len(counts), "codes")
        self.values, self.rows = block, rows
        self.codes = codes if rows is None else codes[rows]
        self.shift = np.empty((len(counts), block.shape[1]), order="F")
        for j in range(block.shape[1]):
            self.shift[:, j] = _weighted_group_sums(codes, block[:, j], len(counts), weight)
        self.shape = (len(self.codes), block.shape[1])

    def _source(self, start: int, stop: int, j: int) -> np.ndarray:
        column = self.values[:, j]
        return column[start:stop] if self.rows is None else column[self.rows[start:stop]]

    def column_piece(self, j: int, start: int, stop: int) -> np.ndarray:
        """Rows ``start:stop`` of column ``j``."""
        return self._source(start, stop, j) - self.shift[self.codes[start:stop], j]

    def piece(self, start: int, stop: int) -> np.ndarray:
        """Rows ``start:stop`` of every column, Fortran-ordered."""
        out = np.empty((max(min(stop, self.shape[0]) - start, 0), self.shape[1]), order="F")
        for j in range(self.shape[1]):
            np.subtract(self._source(start, stop, j), self.shift[self.codes[start:stop], j],
                        out=out[:, j])
        return out

    def __getitem__(self, key: tuple[slice, int]) -> _DemeanedColumn:
        rows, j = key
        if rows != slice(None):
            raise IndexError("a DemeanedBlock is read as block[:, j], then by row ranges")
        return _DemeanedColumn(self, int(j))


@dataclass(frozen=True)
class _DemeanedColumn:
    """One column of a :class:`DemeanedBlock`, sliced by row ranges only."""

    block: DemeanedBlock
    j: int

    def __len__(self) -> int:
        return self.block.shape[0]

    def __getitem__(self, rows: slice) -> np.ndarray:
        start, stop, step = rows.indices(len(self))
        if step != 1:
            raise IndexError("a demeaned column is read by contiguous row ranges")
        return self.block.column_piece(self.j, start, stop)


def within_block(values: np.ndarray, codes: np.ndarray, counts: np.ndarray,
                 rows: np.ndarray | None = None) -> DemeanedBlock:
    """:func:`within` as a :class:`DemeanedBlock` (optionally of the rows at ``rows``)."""
    return DemeanedBlock(values, codes, counts, _safe_inverse_counts(counts), rows)


def quasi_block(values: np.ndarray, codes: np.ndarray, counts: np.ndarray,
                theta: np.ndarray) -> DemeanedBlock:
    """:func:`quasi` as a :class:`DemeanedBlock`."""
    theta = np.asarray(theta, dtype=np.float64)
    if theta.shape != (len(counts),):
        raise ValueError(f"theta has shape {theta.shape}, expected ({len(counts)},)")
    return DemeanedBlock(values, codes, counts, theta * _safe_inverse_counts(counts))


def theta_per_entity(
    sigma2_entity: float, sigma2_idiosyncratic: float, counts: np.ndarray
) -> np.ndarray:
    """Per-entity quasi-demeaning weight.

    ``theta_i = 1 - sqrt(s2_e / (T_i * s2_u + s2_e))``, evaluated as
    ``(T_i s2_u / d_i) / (1 + sqrt(s2_e / d_i))`` with ``d_i = T_i s2_u + s2_e``
    to avoid cancellation when ``theta_i`` is small, then clipped into [0, 1].

    Parameters
    ----------
    sigma2_entity : float
        Entity-effect variance ``s2_u``; a negative value is treated as 0
        (estimators report their own truncation).
    sigma2_idiosyncratic : float
        Idiosyncratic variance ``s2_e``; a negative value is treated as 0.
    counts : int array (G,)
        Rows per entity ``T_i``.

    Returns
    -------
    ndarray (G,)
        ``s2_u = 0`` gives 0 (pooled OLS); ``s2_e = 0`` with ``s2_u > 0``
        gives 1 (within); both 0 gives 0, and so does an entity with
        ``T_i = 0``: with no evidence of an entity effect the data are left
        as they are.
    """
    s2u = float(sigma2_entity)
    s2e = float(sigma2_idiosyncratic)
    if not (np.isfinite(s2u) and np.isfinite(s2e)):
        raise ValueError("variance components must be finite")
    s2u = max(s2u, 0.0)
    s2e = max(s2e, 0.0)
    t = np.asarray(counts, dtype=np.float64)
    signal = t * s2u
    denom = signal + s2e
    theta = np.zeros_like(t)
    pos = denom > 0
    ratio = s2e / denom[pos]
    theta[pos] = (signal[pos] / denom[pos]) / (1.0 + np.sqrt(ratio))
    return np.clip(theta, 0.0, 1.0)


@dataclass(frozen=True)
class TwowayResult:
    """How :func:`twoway` removed the two sets of effects.

    Attributes
    ----------
    method : str
        ``"direct-period"`` / ``"direct-entity"``: entity (or period) means
        removed, then the period (or entity) effects solved exactly from
        their normal equations by dense Cholesky; ``"cg-period"`` /
        ``"cg-entity"``: same equations solved by Jacobi-preconditioned
        conjugate gradients.
    iterations : int
        Direct: number of solves (1, plus refinement rounds).  CG: largest
        number of CG iterations any column needed, refinement included.
        0 when there was nothing to solve.
    precision : float
        Achieved: max over columns of ``max(max_i |mean_i(r)|,
        max_t |mean_t(r)|) / scale_j``, where r is the transformed column,
        means are over the rows of each entity and of each period, and
        ``scale_j = sqrt(sum_it (x_it - xbar)^2 / n)``, the root mean square
        of the centred input column (1 if that is 0), so a column's level
        does not loosen the criterion.
    converged : bool
        ``precision <= tol``.
    n_components : int
        Connected components of the bipartite entity-period graph of the
        rows (entities and periods linked by an observed row).  Effects are
        identified only up to one constant per component.
    """

    method: str
    iterations: int
    precision: float
    converged: bool
    n_components: int


@dataclass(frozen=True, eq=False)
class _Incidence:
    """Row counts per (a, b) cell of the two groupings, dense or sparse (CSR)."""

    dense: np.ndarray | None
    sparse: scipy.sparse.csr_matrix | None

    def matvec(self, v: np.ndarray) -> np.ndarray:
        return self.dense @ v if self.dense is not None else self.sparse @ v

    def rmatvec(self, v: np.ndarray) -> np.ndarray:
        return self.dense.T @ v if self.dense is not None else self.sparse.T @ v


def _incidence(a: np.ndarray, b: np.ndarray, na: int, nb: int) -> _Incidence:
    """Cell counts of the (a, b) pairs without a loop over groups.

    Cells are the int64 codes ``a * nb + b``; they are counted by one
    ``bincount`` when the grid is small enough, otherwise by a sort
    (``np.unique``).  The sort gives cells in row-major order, so the CSR
    arrays are filled directly.
    """
    import scipy.sparse  # lazy: scipy.sparse costs a quarter second at start-up

    cells = a * np.int64(nb)
    cells += b
    size = na * nb
    if size <= DENSE_INCIDENCE_MAX:
        cnt = np.bincount(cells, minlength=size)
        return _Incidence(dense=cnt.reshape(na, nb).astype(np.float64), sparse=None)
    uniq, cnt = np.unique(cells, return_counts=True)
    indptr = np.zeros(na + 1, dtype=np.int64)
    np.cumsum(np.bincount(uniq // nb, minlength=na), out=indptr[1:])
    sparse = scipy.sparse.csr_matrix(
        (cnt.astype(np.float64), uniq % nb, indptr), shape=(na, nb)
    )
    return _Incidence(dense=None, sparse=sparse)


def _pin_levels(labels_b: np.ndarray, count_b: np.ndarray) -> tuple[np.ndarray, int]:
    """One b-level per connected component whose effect is fixed at 0.

    The normal matrix ``D_b' M_a D_b`` has the indicator of each component's
    b-levels in its null space; pinning the best-populated level of each
    component leaves a positive definite system.  Returns the mask of free
    levels and the number of components that contain rows.
    """
    nb = len(labels_b)
    order = np.lexsort((-count_b, labels_b))
    sorted_labels = labels_b[order]
    first = np.ones(nb, dtype=bool)
    first[1:] = sorted_labels[1:] != sorted_labels[:-1]
    free = np.ones(nb, dtype=bool)
    free[order[first]] = False
    return free, len(np.unique(labels_b[count_b > 0]))


def _labels_from_normal(full: np.ndarray) -> np.ndarray:
    """Components of the b-levels: two levels are linked when they share an a-level.

    Off-diagonal entries of ``C' diag(1/n_a) C`` are sums of positive terms,
    so they are exactly nonzero precisely for linked pairs.
    """
    import scipy.sparse
    import scipy.sparse.csgraph

    _, labels = scipy.sparse.csgraph.connected_components(
        scipy.sparse.csr_matrix(full != 0), directed=False
    )
    return labels


def _labels_from_incidence(sparse: scipy.sparse.csr_matrix) -> np.ndarray:
    """Components of the b-levels from the bipartite a-b graph (sparse path)."""
    import scipy.sparse
    import scipy.sparse.csgraph

    na = sparse.shape[0]
    graph = scipy.sparse.bmat([[None, sparse], [sparse.T, None]], format="csr")
    _, labels = scipy.sparse.csgraph.connected_components(graph, directed=False)
    return labels[na:]


def twoway(
    values: np.ndarray,
    entity_codes: np.ndarray,
    period_codes: np.ndarray,
    n_entities: int,
    n_periods: int,
    tol: float = 1e-12,
    max_iter: int = 1000,
) -> tuple[np.ndarray, TwowayResult]:
    """Remove entity and period effects together (two-way within transform).

    The result is the residual of projecting each column on a full set of
    entity and period dummies, exactly (up to rounding) on unbalanced panels
    with gaps and on panels whose entity-period graph falls into several
    connected components.

    Parameters
    ----------
    values : array (n,) or (n, k)
        Finite float64 values of the estimation sample.
    entity_codes, period_codes : int arrays (n,)
        Dense codes 0..n_entities-1 and 0..n_periods-1.  Periods of the grid
        with no rows are allowed.
    n_entities, n_periods : int
        Number of levels of each grouping.
    tol : float
        Target relative precision (see ``TwowayResult.precision``).
    max_iter : int
        Conjugate-gradient iteration budget per column (iterative method only).

    Returns
    -------
    (ndarray, TwowayResult)
        Transformed values, same shape as ``values`` (Fortran-ordered when
        2-D), and a record of the method and the achieved precision.

    Notes
    -----
    Method (partialling out, Frisch-Waugh-Lovell).  Let ``a`` be the grouping
    with more levels and ``b`` the one with fewer (entities and periods
    respectively in the usual long panel).  With ``M_a`` the within-``a``
    projector, ``D_b`` the b-dummies and ``C`` the a-by-b cell-count matrix,

    ``(D_b' M_a D_b) g = D_b' M_a x = D_b' x - C' xbar_a``,
    ``D_b' M_a D_b = diag(n_b) - C' diag(1/n_a) C``,

    and the result is ``M_a x - M_a D_b g = x - (xbar_a - C g / n_a)[a] - g[b]``.
    The matrix is singular, one null direction per connected component of the
    bipartite a-b graph (``scipy.sparse.csgraph.connected_components``); one
    level per component (the one with the most rows) is pinned at ``g = 0``,
    which leaves a positive definite system and does not change the result.

    * ``min(levels) <= 5000``: dense Cholesky of the reduced system, then up
      to 3 rounds of iterative refinement (re-solving against the b-sums of
      the result) while the precision exceeds ``tol``.
    * more levels: conjugate gradients on the same reduced system with a
      sparse operator (cost per iteration: number of distinct cells) and a
      Jacobi preconditioner, restarted against the b-sums of the result
      until the precision reaches ``tol`` or ``max_iter`` iterations are used.

    Cost per column: two group sums and two broadcasts over the rows for the
    transform, two more group sums for the precision check.
    """
    import scipy.sparse

    block, flat = _as_block(values)
    n, k = block.shape
    entity_codes = _check_codes(entity_codes, n, n_entities, "entity_codes")
    period_codes = _check_codes(period_codes, n, n_periods, "period_codes")
    # the transform removes constants, so it runs on centred, power-of-two scaled
    # columns: the precision is then relative to each column's spread, not its level
    standard = standardise(block)
    block = standard.z
    # levels without rows change nothing; dropping them keeps every per-level array
    # within the row count however long the period grid is
    entity_codes, n_entities = compact_codes(entity_codes, n_entities)
    period_codes, n_periods = compact_codes(period_codes, n_periods)
    if n_periods <= n_entities:
        a, b, na, nb, solved = entity_codes, period_codes, n_entities, n_periods, "period"
    else:
        a, b, na, nb, solved = period_codes, entity_codes, n_periods, n_entities, "entity"
    count_a = group_counts(a, na)
    count_b = group_counts(b, nb)
    inv_a = _safe_inverse_counts(count_a)
    inv_b = _safe_inverse_counts(count_b)
    inc = _incidence(a, b, na, nb)
    iterative = nb > DIRECT_MAX_LEVELS
    method = ("cg-" if iterative else "direct-") + solved
    if iterative:
        sparse = inc.sparse if inc.sparse is not None else scipy.sparse.csr_matrix(inc.dense)
        inc = _Incidence(dense=None, sparse=sparse)
        free, n_components = _pin_levels(_labels_from_incidence(sparse), count_b)
        solve = _cg_solver(sparse, count_b, inv_a, np.flatnonzero(free), nb, tol, max_iter)
        max_solves = max_iter
    else:
        full = _normal_matrix(inc, count_b, inv_a)
        free, n_components = _pin_levels(_labels_from_normal(full), count_b)
        solve = _direct_solver(full, np.flatnonzero(free), nb)
        max_solves = 1 + DIRECT_REFINE_ROUNDS
    any_free = bool(free.any())

    # First pass: group sums of every column; the small dense products and the
    # solve then run once on the whole block (matrix-matrix, not per column).
    xbar = np.empty((na, k), dtype=np.float64, order="F")
    sums_x_b = np.empty((nb, k), dtype=np.float64, order="F")
    for j in range(k):
        xbar[:, j] = group_sums(a, block[:, j], na) * inv_a
        sums_x_b[:, j] = group_sums(b, block[:, j], nb)
    if any_free and k:
        effects, used = solve(sums_x_b - inc.rmatvec(xbar))
        shift_a = xbar - inc.matvec(effects) * inv_a[:, None]
    else:
        effects, used, shift_a = None, np.zeros(k, dtype=np.int64), xbar

    out = np.empty((n, k), dtype=np.float64, order="F")
    buf = np.empty(n, dtype=np.float64)
    precision = 0.0
    iterations = 0
    for j in range(k):
        col = block[:, j]
        r = out[:, j]
        scale = float(np.sqrt(np.dot(col, col) / n)) if n else 0.0
        scale = scale if scale > 0 else 1.0
        np.take(shift_a[:, j], a, out=buf, mode="clip")
        np.subtract(col, buf, out=r)
        col_iter = 0
        if effects is not None:
            col_iter = int(used[j])
            np.take(effects[:, j], b, out=buf, mode="clip")
            np.subtract(r, buf, out=r)
        sums_b = group_sums(b, r, nb)
        col_prec = _precision(r, a, na, inv_a, sums_b, inv_b, scale)
        solves = 1
        while any_free and col_prec > tol and solves < max_solves and col_iter < max_iter:
            delta, step = solve(sums_b)
            col_iter += step
            solves += 1
            np.take(delta, b, out=buf, mode="clip")
            np.subtract(r, buf, out=r)
            np.take(inc.matvec(delta) * inv_a, a, out=buf, mode="clip")
            np.add(r, buf, out=r)
            sums_b = group_sums(b, r, nb)
            col_prec = _precision(r, a, na, inv_a, sums_b, inv_b, scale)
        precision = max(precision, col_prec)
        iterations = max(iterations, col_iter)
        r *= standard.scale[j]
    result = TwowayResult(
        method=method,
        iterations=int(iterations),
        precision=float(precision),
        converged=bool(precision <= tol),
        n_components=int(n_components),
    )
    return (out[:, 0] if flat else out), result


def _precision(r, a, na, inv_a, sums_b, inv_b, scale) -> float:
    """Largest |group mean| of the result over both groupings, relative to scale."""
    ea = np.max(np.abs(group_sums(a, r, na) * inv_a)) if na else 0.0
    eb = np.max(np.abs(sums_b * inv_b)) if len(sums_b) else 0.0
    return float(max(ea, eb) / scale)


def _normal_matrix(inc: _Incidence, count_b: np.ndarray, inv_a: np.ndarray) -> np.ndarray:
    """Dense ``diag(n_b) - C' diag(1/n_a) C`` (b-levels x b-levels)."""
    import scipy.sparse

    if inc.dense is not None:
        cross = inc.dense.T @ (inc.dense * inv_a[:, None])
    else:
        weighted = scipy.sparse.diags(inv_a) @ inc.sparse
        cross = (inc.sparse.T @ weighted).toarray()
    mat = -cross
    mat[np.diag_indices_from(mat)] += count_b
    return mat


def _direct_solver(full: np.ndarray, free_idx: np.ndarray, nb: int):
    """Cholesky of the reduced normal matrix; pseudo-inverse if it is numerically singular."""
    reduced = full[np.ix_(free_idx, free_idx)]
    reduced = (reduced + reduced.T) / 2.0
    try:
        factor = scipy.linalg.cho_factor(reduced, lower=True, check_finite=False)

        def apply(rhs):
            return scipy.linalg.cho_solve(factor, rhs, check_finite=False)
    except np.linalg.LinAlgError:
        pinv = scipy.linalg.pinvh(reduced)

        def apply(rhs):
            return pinv @ rhs

    def solve(rhs: np.ndarray) -> tuple[np.ndarray, int | np.ndarray]:
        g = np.zeros(rhs.shape)
        g[free_idx] = apply(rhs[free_idx])
        return g, (1 if rhs.ndim == 1 else np.ones(rhs.shape[1], dtype=np.int64))

    return solve


def _cg_solver(sparse, count_b, inv_a, free_idx, nb, tol, max_iter):
    """Jacobi-preconditioned CG on the reduced normal equations (sparse operator)."""
    import scipy.sparse.linalg

    squared = sparse.multiply(sparse)
    diag = (count_b - squared.T @ inv_a)[free_idx]
    diag = np.where(diag > 0, diag, 1.0)
    m = len(free_idx)

    def matvec(v: np.ndarray) -> np.ndarray:
        full = np.zeros(nb)
        full[free_idx] = np.ravel(v)
        out = count_b * full - sparse.T @ (inv_a * (sparse @ full))
        return out[free_idx]

    op = scipy.sparse.linalg.LinearOperator((m, m), matvec=matvec, dtype=np.float64)
    precond = scipy.sparse.linalg.LinearOperator(
        (m, m), matvec=lambda v: np.ravel(v) / diag, dtype=np.float64
    )

    def solve_one(rhs: np.ndarray) -> tuple[np.ndarray, int]:
        count = [0]

        def callback(_xk):
            count[0] += 1

        sol, _info = scipy.sparse.linalg.cg(
            op, rhs[free_idx], rtol=tol, atol=0.0, maxiter=max_iter, M=precond,
            callback=callback,
        )
        g = np.zeros(nb)
        g[free_idx] = sol
        return g, max(count[0], 1)

    def solve(rhs: np.ndarray) -> tuple[np.ndarray, int | np.ndarray]:
        """CG per column; iteration counts per column for a 2-D right-hand side."""
        if rhs.ndim == 1:
            return solve_one(rhs)
        g = np.zeros(rhs.shape)
        used = np.zeros(rhs.shape[1], dtype=np.int64)
        for j in range(rhs.shape[1]):
            g[:, j], used[j] = solve_one(rhs[:, j])
        return g, used

    return solve
