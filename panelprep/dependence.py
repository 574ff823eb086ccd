"""Evidence on the error structure: serial correlation and cross-sectional dependence.

Three tests, each on the estimation sample and each from per-entity and
per-period sums on integer codes (``np.bincount``, sorted segments), so the
cost grows linearly with the rows (Pesaran's CD on an unbalanced panel is the
one exception, bounded by a stated cap, see :func:`pesaran_cd`):

* Wooldridge's test for first-order serial correlation in the idiosyncratic
  errors (Wooldridge 2002, *Econometric Analysis of Cross Section and Panel
  Data*, section 10.6.3): first-difference the model, regress the
  differenced residuals on their own lag; without serial correlation in the
  errors in levels the coefficient is -0.5.  Entity-clustered inference.
* the bias-corrected LM test for first-order serial correlation allowing for
  fixed entity effects of Born and Breitung (2016, "Testing for serial
  correlation in fixed-effects panel data models", *Econometric Reviews*
  35(7), 1290-1316), which corrects the Baltagi and Li (1995) LM statistic on
  within residuals for the bias that demeaning causes.
* Pesaran's CD test for cross-sectional dependence (Pesaran 2004, CESifo
  Working Paper 1229; Pesaran 2015, "Testing weak cross-sectional dependence
  in large panels", *Econometric Reviews* 34, 1089-1117), in the unbalanced
  form over each pair's common periods.

Gaps: "first-order" means one step of the period grid.  A difference, or a
pair of consecutive residuals, is formed only between rows of the same
entity whose period codes differ by exactly one, so a difference across a
hole never enters.

Every function returns a JSON-ready dict: Python floats and ints, ``None``
with a ``note`` wherever a number is undefined, never NaN or infinity.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.special

from panelprep._groups import compact_codes, group_counts, group_sums, occurring
from panelprep._linalg import QR_BLOCK_ROWS, default_rtol, ols_from_r, sandwich
from panelprep._moments import RowFactor

#: Pairs of entities with fewer common periods than this are left out of CD:
#: with two common periods a correlation after removing the means is always +-1.
CD_MIN_COMMON = 3

#: On an unbalanced panel CD is computed pair by pair over at most this many
#: entities (those with the most rows, ties to the lower code) ...
CD_MAX_ENTITIES = 1000

#: ... and at most as many as keep entities^2 x periods below this (the dense
#: pair computation costs that many multiply-adds, four times over).
CD_MAX_PAIR_WORK = 250_000_000

# A residual series whose sum of squares about its mean is below this share of
# the average squared residual (per row) is treated as constant: its
# correlations are undefined.  64 eps: a few units of rounding in a sum of squares.
_CONSTANT_SHARE = float(np.finfo(np.float64).eps) * 64

# Cells (entities x periods) of one dense block in the pair computation of CD:
# 2^21 cells are 16 MiB per block.
_CD_BLOCK_CELLS = 1 << 21

_UNDEFINED_ORDER = ("two rows share an entity and a period, so consecutive periods are "
                    "ambiguous and the test is undefined")


@dataclass(frozen=True)
class PanelSteps:
    """Rows sorted by (entity, period) and which of them follow their entity's previous period.

    Attributes
    ----------
    order : int array (n,)
        Row positions sorted by (entity, period).
    follows : bool array (n,)
        ``follows[p]``: sorted row ``p`` has the same entity as row ``p - 1``
        and a period code one larger (the previous row is its first lag).
    duplicated : bool
        Some (entity, period) cell holds more than one row.
    in_order : bool
        The rows are already sorted (``order`` is ``arange(n)``), so sorted
        rows are read as slices, without a gather.
    """

    order: np.ndarray
    follows: np.ndarray
    duplicated: bool
    in_order: bool = False

    def sorted_rows(self, column: np.ndarray, start: int, stop: int) -> np.ndarray:
        """Sorted rows ``start:stop`` of ``column`` (a view when the rows are in order)."""
        if self.in_order:
            return column[start:stop]
        return np.take(column, self.order[start:stop])


def panel_steps(entity_codes: np.ndarray, period_codes: np.ndarray) -> PanelSteps:
    """:class:`PanelSteps` of the rows; no sort when they are already in (entity, period) order."""
    entity = np.asarray(entity_codes, dtype=np.int64)
    period = np.asarray(period_codes, dtype=np.int64)
    n = len(entity)
    span = int(period.max()) + 1 if n else 1
    cell = entity * np.int64(span) + period
    in_order = not (n > 1 and not np.all(cell[1:] >= cell[:-1]))
    order = np.arange(n) if in_order else np.argsort(cell, kind="stable")
    sorted_cell = cell if in_order else cell[order]
    follows = np.zeros(n, dtype=bool)
    duplicated = False
    if n > 1:
        step = sorted_cell[1:] - sorted_cell[:-1]
        sorted_entity = entity if in_order else entity[order]
        same = sorted_entity[1:] == sorted_entity[:-1]
        follows[1:] = same & (step == 1)
        duplicated = bool(np.any(step == 0))
    return PanelSteps(order=order, follows=follows, duplicated=duplicated, in_order=in_order)


def _missing(keys: dict[str, Any], note: str) -> dict[str, Any]:
    return {**keys, "statistic": None, "p_value": None, "note": note}


def _tiny(resid: np.ndarray) -> float:
    """Sum of squares per row below which a residual series counts as constant."""
    n = len(resid)
    return _CONSTANT_SHARE * float(resid @ resid) / n if n else 0.0


# ----------------------------------------------------------------- Wooldridge


def wooldridge_serial(X: np.ndarray, y: np.ndarray, entity_codes: np.ndarray,
                      steps: PanelSteps, divisors: np.ndarray | None = None) -> dict[str, Any]:
    """Wooldridge's test for first-order serial correlation in the idiosyncratic errors.

    With ``y_it = x_it' b + c_i + u_it``, first differences remove ``c_i``:
    ``dy_it = a + dx_it' b + du_it``, fitted by OLS on every row whose
    entity was observed in the previous period (an intercept is included, so
    a linear trend common to all entities in levels does no harm; a regressor
    constant within entities differences to zero and is left out by the rank
    decision).  With residuals ``r_it`` of that regression, the auxiliary
    regression (no intercept) ::

        r_it = delta * r_i,t-1 + error        (rows with r_i,t-1 also formed)

    has ``delta = -0.5`` when the ``u_it`` are serially uncorrelated (then
    ``corr(du_t, du_t-1) = -1/2``); for AR(1) errors with coefficient rho it
    is ``-(1 - rho) / 2``.  The statistic is the Wald test of ``delta = -0.5``
    with the entity-clustered variance ``c (sum_i s_i^2) / (sum r_i,t-1^2)^2``,
    ``s_i = sum_t r_i,t-1 (r_it - delta r_i,t-1)`` and the factor
    ``c = G/(G-1) (m-1)/(m-1)`` (``_linalg.sandwich``, m pairs, G entities
    with a pair), referred to F(1, G - 1).  The clustered variance allows for
    any serial correlation and heteroskedasticity within an entity, so the
    test needs no assumption beyond independence across entities.

    Parameters
    ----------
    X, y : arrays (n, k) and (n,)
        Regressors (without a constant) and response, as read; the statistic
        does not depend on their units or levels (a level cancels in a
        difference).
    entity_codes : int array (n,)
        Dense entity codes.
    steps : PanelSteps
        From :func:`panel_steps` on the same rows.
    divisors : array (k + 1,), optional
        Powers of two near the spread of each column of ``[X, y]``
        (``_scale.Scaling.scale``): each is divided by it before differencing
        (exact), so the differenced cross products stay near unit size.

    Returns
    -------
    dict
        ``statistic`` (F), ``df`` 1, ``df_denominator`` G - 1, ``p_value``,
        ``coefficient`` (delta), ``std_error``, ``null_value`` -0.5,
        ``covariance`` "entity-clustered", ``differences`` (rows of the
        differenced regression), ``pairs`` (rows of the auxiliary one),
        ``entities`` (G), ``basis``, ``note``.
    """
    keys: dict[str, Any] = {"df": 1, "df_denominator": None, "coefficient": None,
                            "std_error": None, "null_value": -0.5,
                            "covariance": "entity-clustered", "differences": 0, "pairs": 0,
                            "entities": 0, "basis": None}
    if steps.duplicated:
        return _missing(keys, _UNDEFINED_ORDER)
    follows = steps.follows
    n_d = int(np.count_nonzero(follows))
    keys["differences"] = n_d
    if divisors is None:
        divisors = np.ones(X.shape[1] + 1)
    resid = _difference_residuals(X, y, np.asarray(divisors, dtype=np.float64), steps, n_d)
    if resid is None:
        return _missing(keys, "fewer differenced rows than columns, or the differenced "
                              "regression fits exactly, so the test is undefined")
    # resid is laid out on the sorted rows (0 where a row has no difference); a residual's
    # lag exists when the sorted row before it was differenced too
    paired = np.zeros(len(follows), dtype=bool)
    paired[1:] = follows[1:] & follows[:-1]
    lagged = np.flatnonzero(paired)
    now, before = resid[lagged], resid[lagged - 1]
    entity = steps.sorted_rows(np.asarray(entity_codes), 0, len(follows))[lagged]
    m = len(lagged)
    keys["pairs"] = m
    present, cluster, _ = occurring(entity)
    n_clusters = len(present)
    keys["entities"] = n_clusters
    keys["basis"] = (f"{m:,} pairs of consecutive differences in {n_clusters:,} entities "
                     f"(from {n_d:,} differences)")
    lag_ss = float(before @ before)
    if m < 2 or n_clusters < 2 or not lag_ss > 0:
        return _missing(keys, "fewer than two entities have three consecutive periods (one "
                              "step of the period grid apart), so the test is undefined")
    delta = float(before @ now) / lag_ss
    scores = group_sums(cluster, before * (now - delta * before), n_clusters)[:, None]
    variance = float(sandwich(scores, np.array([[1.0 / lag_ss]]), m, n_clusters)[0, 0])
    keys.update(coefficient=delta, df_denominator=n_clusters - 1)
    if not variance > 0:
        return _missing(keys, "the clustered variance of the coefficient is zero, so the "
                              "test is undefined")
    se = math.sqrt(variance)
    statistic = ((delta + 0.5) / se) ** 2
    keys["std_error"] = se
    return {**keys, "statistic": statistic,
            "p_value": float(scipy.special.fdtrc(1, n_clusters - 1, statistic)), "note": None}


def _difference_residuals(X: np.ndarray, y: np.ndarray, divisors: np.ndarray,
                          steps: PanelSteps, n_d: int) -> np.ndarray | None:
    """Residuals of ``dy`` on ``[1, dX]`` (columns over ``divisors``) on the sorted rows.

    A sorted row that follows its entity's previous period holds its
    difference; any other row is a zero row, which adds nothing to a cross
    product or a triangular factor and gets residual 0.  Two passes over
    the sorted rows in blocks of ``QR_BLOCK_ROWS``: the first builds the
    factor of ``[1, dZ, dz]`` (``RowFactor``), the second the residuals; no
    full differenced block is held.  None when the fit is undefined (no
    residual degree of freedom) or exact.
    """
    n, k = len(steps.follows), X.shape[1]
    factor = RowFactor(k + 2, n_d)
    dz_ss = 0.0
    for start in range(0, n, QR_BLOCK_ROWS):
        block = _difference_block(X, y, divisors, steps, start, min(start + QR_BLOCK_ROWS, n))
        dz_ss += float(block[:, -1] @ block[:, -1])
        factor.add(block)
    fit = ols_from_r(factor.r(), n_d)
    if fit.df_resid <= 0 or math.sqrt(fit.ssr) <= default_rtol(n_d, k + 1) * math.sqrt(dz_ss):
        return None
    resid = np.empty(n)
    for start in range(0, n, QR_BLOCK_ROWS):
        stop = min(start + QR_BLOCK_ROWS, n)
        block = _difference_block(X, y, divisors, steps, start, stop)
        resid[start:stop] = block[:, -1] - block[:, :-1] @ fit.coef
    return resid


def _difference_block(X, y, divisors, steps: PanelSteps, start: int, stop: int) -> np.ndarray:
    """``[1, dX, dy]`` on sorted rows ``start:stop``, each column divided by its divisor.

    Rows that do not follow their entity's previous period are zero.  Column
    by column, from the sorted rows ``start - 1:stop`` (slices when the rows
    are in order); dividing before subtracting keeps a difference of two
    huge values finite.
    """
    k = X.shape[1]
    width = stop - start
    follows = steps.follows[start:stop]
    block = np.empty((width, k + 2), order="F")
    block[:, 0] = follows
    # rows starting an entity or a run after a hole (a scaled value is bounded by the
    # column's largest magnitude over its spread, across entities as within them)
    breaks = np.flatnonzero(~follows)
    scaled = np.empty(width + 1)
    lead = 1 if start > 0 else 0
    scaled[0] = 0.0
    for j in range(k + 1):
        column = steps.sorted_rows(X[:, j] if j < k else y, start - lead, stop)
        np.divide(column, divisors[j], out=scaled[1 - lead:])
        out = block[:, j + 1]
        np.subtract(scaled[1:], scaled[:-1], out=out)
        out[breaks] = 0.0
    return block


# ------------------------------------------------------------- Born-Breitung


def born_breitung_lm(within_resid: np.ndarray, entity_codes: np.ndarray, counts: np.ndarray,
                     steps: PanelSteps) -> dict[str, Any]:
    """Bias-corrected LM test for first-order serial correlation with fixed entity effects.

    Born and Breitung (2016) correct the LM statistic of Baltagi and Li
    (1995) for the bias that the within transform causes: with within
    residuals ``e_it`` and serially uncorrelated errors of variance
    ``s2_i``, ``E[e_it e_is] = s2_i (1{t = s} - 1/T_i)``, so the sum of
    products of consecutive residuals has mean ``-m_i s2_i / T_i`` rather
    than zero.  Per entity (``m_i`` pairs of consecutive periods, ``T_i``
    rows; formula written for unbalanced panels with holes, where ``m_i``
    counts only pairs one period apart)::

        S_i = sum_(t, t-1 both present) e_it e_i,t-1 + m_i / (T_i (T_i - 1)) sum_t e_it^2

    has mean zero under the null, and the statistic ::

        LM = sum_i S_i / sqrt(sum_i S_i^2)        ~ N(0, 1) as entities grow

    is the self-normalised (robust) form, valid when the error variance
    differs across entities but is constant over time within each.  Entities
    with one row contribute nothing; at least two entities with a pair are
    needed.  The two-sided p-value is reported.
    The formula is written from memory of the paper; its unbalanced and
    gapped form above is derived here from the same moment condition.

    Parameters
    ----------
    within_resid : array (n,)
        Residuals of the within (fixed-effects) regression.
    entity_codes, counts
        Dense entity codes and rows per entity ``T_i``.
    steps : PanelSteps
        From :func:`panel_steps` on the same rows.

    Returns
    -------
    dict
        ``statistic`` (normal), ``p_value`` (two-sided), ``pairs`` (sum of
        ``m_i``), ``entities`` (with a pair), ``basis``, ``note``.
    """
    keys: dict[str, Any] = {"pairs": 0, "entities": 0, "basis": None}
    if steps.duplicated:
        return _missing(keys, _UNDEFINED_ORDER)
    e = np.asarray(within_resid, dtype=np.float64)
    codes = np.asarray(entity_codes)
    n_groups = len(counts)
    t = np.asarray(counts, dtype=np.float64)
    at = np.flatnonzero(steps.follows)
    current, previous = steps.order[at], steps.order[at - 1]
    pair_entity = codes[current]
    products = group_sums(pair_entity, e[current] * e[previous], n_groups)
    m = group_counts(pair_entity, n_groups).astype(np.float64)
    squares = group_sums(codes, e * e, n_groups)
    weight = np.zeros(n_groups)
    np.divide(m, t * (t - 1.0), out=weight, where=t > 1)
    s = products + weight * squares
    with_pairs = int(np.count_nonzero(m))
    keys.update(pairs=len(at), entities=with_pairs,
                basis=f"{len(at):,} pairs of consecutive periods in {with_pairs:,} entities")
    spread = float(s @ s)
    if with_pairs < 2 or not spread > 0:
        return _missing(keys, "fewer than two entities have two consecutive periods (one step "
                              "of the period grid apart) with residual variation, so the test "
                              "is undefined")
    statistic = float(s.sum()) / math.sqrt(spread)
    return {**keys, "statistic": statistic,
            "p_value": float(2.0 * scipy.special.ndtr(-abs(statistic))), "note": None}


# --------------------------------------------------------------- Pesaran CD


def pesaran_cd(resid: np.ndarray, entity_codes: np.ndarray, period_codes: np.ndarray,
               counts: np.ndarray, duplicated: bool = False) -> dict[str, Any]:
    """Pesaran's CD test for cross-sectional dependence of residuals.

    For each pair of entities ``i < j`` with ``T_ij`` common periods, the
    correlation of their residuals over those periods (each series centred on
    its mean over the common periods) is ``rho_ij``, and (Pesaran 2004, 2015;
    unbalanced form) ::

        CD = sum_(i<j) sqrt(T_ij) rho_ij / sqrt(P)        ~ N(0, 1)

    with ``P`` the pairs used: those with at least ``CD_MIN_COMMON`` common
    periods and residual variation in both series over them.  (With every
    pair used, ``1 / sqrt(P) = sqrt(2 / (N (N - 1)))``, the published
    normalisation.)  The two-sided p-value is reported.

    How it is computed:

    * balanced (every entity observed in every period of the sample): with
      ``z_it = (e_it - ebar_i) / ||e_i - ebar_i||`` and ``S_t = sum_i z_it``,
      ``sum_(i<j) rho_ij = (sum_t S_t^2 - N) / 2``, so CD comes from one sum
      per period, with no pair formed and cost linear in the rows;
    * unbalanced: the common-period sums of every pair (``T_ij``, the
      residual sums, sums of squares and cross products) are products of
      dense (entities x periods) blocks, over at most ``CD_MAX_ENTITIES``
      entities and at most ``sqrt(CD_MAX_PAIR_WORK / periods)``: those with
      the most rows (ties to the lower code).  With more entities, CD is that
      of the subset, which is still a valid test of the null of no
      dependence, with less power; ``entities`` and ``entity_cap`` say so.
      The blocks span as many periods as keep them within 2^21 cells, so
      memory stays bounded however many periods there are.

    Parameters
    ----------
    resid : array (n,)
        Residuals (here of the within regression: entity effects removed,
        period effects not, so a shock common to all entities shows).
    entity_codes, period_codes : int arrays (n,)
        Dense entity codes and period codes on the grid.
    counts : int array (G,)
        Rows per entity.
    duplicated : bool
        Some (entity, period) cell holds more than one row (the test is
        then undefined).

    Returns
    -------
    dict
        ``statistic``, ``p_value``, ``pairs`` (P), ``entities`` (entities in
        the pairs computed), ``entities_in_sample``, ``entity_cap`` (None when
        no cap applied), ``method`` ("per-period sums" or "pairs over common
        periods"), ``mean_correlation`` (average ``rho_ij`` over the pairs),
        ``min_common_periods``, ``basis``, ``note``.
    """
    n_groups = len(counts)
    keys: dict[str, Any] = {"pairs": 0, "entities": 0, "entities_in_sample": n_groups,
                            "entity_cap": None, "method": None, "mean_correlation": None,
                            "min_common_periods": CD_MIN_COMMON, "basis": None}
    if duplicated:
        return _missing(keys, _UNDEFINED_ORDER)
    e = np.asarray(resid, dtype=np.float64)
    codes = np.asarray(entity_codes, dtype=np.int64)
    periods = np.asarray(period_codes, dtype=np.int64)
    # only which rows share a period matters: renumbered over the periods that occur, so a
    # grid of billions of periods costs what its rows cost
    periods, n_periods = compact_codes(periods, int(periods.max()) + 1 if len(periods) else 0)
    per_period = group_counts(periods, n_periods)
    present = per_period[per_period > 0]
    if len(present) and np.all(present == n_groups):
        keys["method"] = "per-period sums"
        total, pairs = _cd_balanced(e, codes, periods, counts, n_periods, keys)
    else:
        keys["method"] = "pairs over common periods"
        total, pairs = _cd_pairs(e, codes, periods, counts, len(present), keys)
    keys["pairs"] = pairs
    if pairs == 0:
        return _missing(keys, f"no pair of entities has {CD_MIN_COMMON} or more common "
                              "periods with residual variation, so the test is undefined")
    statistic = total / math.sqrt(pairs)
    keys["basis"] = (f"{pairs:,} pairs of {keys['entities']:,} entities "
                     f"({keys['method']})")
    if keys["entity_cap"] is not None:
        keys["basis"] += (f"; capped at the {keys['entities']:,} entities with the most rows "
                          f"of {n_groups:,}")
    return {**keys, "statistic": statistic,
            "p_value": float(2.0 * scipy.special.ndtr(-abs(statistic))), "note": None}


def _cd_balanced(e, codes, periods, counts, n_periods, keys) -> tuple[float, int]:
    """Sum of ``sqrt(T) rho_ij`` and the pair count from per-period sums (balanced panel)."""
    n_groups = len(counts)
    t = np.asarray(counts, dtype=np.float64)
    common = int(t[0]) if n_groups else 0
    means = group_sums(codes, e, n_groups) / np.where(t > 0, t, 1.0)
    centred = e - means[codes]
    ss = group_sums(codes, centred * centred, n_groups)
    varies = ss > _tiny(e) * t
    used = int(np.count_nonzero(varies))
    keys["entities"] = used
    if common < CD_MIN_COMMON or used < 2:
        return 0.0, 0
    scale = np.zeros(n_groups)
    scale[varies] = 1.0 / np.sqrt(ss[varies])
    weights = centred * scale[codes]
    sums = group_sums(periods, weights, n_periods)
    rho_sum = (float(sums @ sums) - used) / 2.0
    pairs = used * (used - 1) // 2
    keys["mean_correlation"] = rho_sum / pairs
    return math.sqrt(common) * rho_sum, pairs


def _common_period_sums(values: np.ndarray, who: np.ndarray, periods: np.ndarray,
                        g: int) -> tuple[np.ndarray, ...]:
    """For every pair (i, j) of ``g`` entities, sums over the periods both are seen in.

    Returns ``(T_ij, sum e_i, sum e_i^2, sum e_i e_j)`` as (g, g) arrays, the
    second and third over the periods i shares with j.  They are products of
    dense (entities x periods) blocks of presence, residual and squared
    residual, taken over blocks of at most ``_CD_BLOCK_CELLS // g`` periods so
    that no block outgrows that many cells.
    """
    order = np.argsort(periods, kind="stable")
    who, values = who[order], values[order]
    distinct, column = np.unique(periods[order], return_inverse=True)
    step = max(1, _CD_BLOCK_CELLS // max(g, 1))
    bounds = np.searchsorted(column, np.arange(0, len(distinct) + step, step))
    common, sums, squares, cross = (np.zeros((g, g)) for _ in range(4))
    for lo, hi in itertools.pairwise(bounds):
        if lo == hi:
            continue
        first = column[lo]
        width = int(column[hi - 1] - first) + 1
        present = np.zeros((g, width))
        level = np.zeros((g, width))
        present[who[lo:hi], column[lo:hi] - first] = 1.0
        level[who[lo:hi], column[lo:hi] - first] = values[lo:hi]
        common += present @ present.T
        sums += level @ present.T        # sums[i, j]: e_i summed over periods shared with j
        squares += (level * level) @ present.T
        cross += level @ level.T
    return common, sums, squares, cross


def _cd_pairs(e, codes, periods, counts, n_present, keys) -> tuple[float, int]:
    """Sum of ``sqrt(T_ij) rho_ij`` and the pair count, pair by pair over common periods."""
    n_groups = len(counts)
    cap = min(CD_MAX_ENTITIES,
              max(2, int(math.sqrt(CD_MAX_PAIR_WORK / max(n_present, 1)))))
    if n_groups > cap:
        keys["entity_cap"] = cap
        # most rows first, ties to the lower code (a stable sort of -counts)
        chosen = np.sort(np.argsort(-np.asarray(counts), kind="stable")[:cap])
    else:
        chosen = np.arange(n_groups)
    slot = np.full(n_groups, -1, dtype=np.int64)
    slot[chosen] = np.arange(len(chosen))
    rows = np.flatnonzero(slot[codes] >= 0)
    who = slot[codes[rows]]
    g = len(chosen)
    keys["entities"] = g
    common, sums, squares, cross = _common_period_sums(e[rows], who, periods[rows], g)
    safe = np.where(common > 0, common, 1.0)
    centred_cross = cross - sums * sums.T / safe
    ss_i = squares - sums * sums / safe
    floor = _tiny(e) * common
    upper = np.triu(np.ones((g, g), dtype=bool), k=1)
    use = upper & (common >= CD_MIN_COMMON) & (ss_i > floor) & (ss_i.T > floor)
    pairs = int(np.count_nonzero(use))
    if pairs == 0:
        return 0.0, 0
    rho = centred_cross[use] / np.sqrt(ss_i[use] * ss_i.T[use])
    keys["mean_correlation"] = float(rho.mean())
    return float(np.sum(np.sqrt(common[use]) * rho)), pairs


# ------------------------------------------------------------------ reading


def _fmt(value: float) -> str:
    return f"{value:.4g}"


def _rejects(block: dict[str, Any] | None, level: float) -> bool | None:
    if not block or block.get("p_value") is None:
        return None
    return bool(block["p_value"] < level)


def _wooldridge_sentence(block: dict[str, Any], rejects: bool, pct: str) -> str:
    delta = block["coefficient"]
    head = (f"Wooldridge's test on first differences: coefficient {_fmt(delta)} against "
            f"-0.5 without serial correlation (F = {_fmt(block['statistic'])} on 1 and "
            f"{block['df_denominator']} df, p = {_fmt(block['p_value'])}, entity-clustered)")
    if rejects:
        return (head + f": at the {pct} level the idiosyncratic errors look serially "
                f"correlated (for AR(1) errors the coefficient is -(1 - rho)/2, so rho would be "
                f"about {_fmt(1.0 + 2.0 * delta)}). A coefficient near 0 would mean errors close "
                "to a random walk, for which first differences is more efficient than the "
                "within transform.")
    return (head + f": at the {pct} level there is no evidence of first-order serial "
            "correlation in the idiosyncratic errors.")


def _born_breitung_sentence(block: dict[str, Any], rejects: bool, pct: str) -> str:
    head = (f"Born-Breitung LM = {_fmt(block['statistic'])} (two-sided p = "
            f"{_fmt(block['p_value'])}, {block['basis']})")
    if rejects:
        sign = "positive" if block["statistic"] > 0 else "negative"
        return (head + f": at the {pct} level there is evidence of {sign} first-order serial "
                "correlation given entity effects.")
    return (head + f": at the {pct} level there is no evidence of first-order serial "
            "correlation given entity effects (the test assumes a variance constant over "
            "time within each entity).")


def _cd_sentence(block: dict[str, Any], rejects: bool, pct: str) -> str:
    head = (f"Pesaran CD = {_fmt(block['statistic'])} over {block['basis']}, mean pairwise "
            f"correlation {_fmt(block['mean_correlation'])} (two-sided p = "
            f"{_fmt(block['p_value'])})")
    if rejects:
        return (head + f": at the {pct} level the residuals of different entities move "
                "together within periods (cross-sectional dependence).")
    return (head + f": at the {pct} level there is no evidence of cross-sectional dependence "
            "(CD has little power when correlations of both signs cancel out).")


# each block: its key, its name when unavailable, its sentence
_READERS = (
    ("wooldridge", "Wooldridge's serial-correlation test", _wooldridge_sentence),
    ("born_breitung", "The Born-Breitung LM test", _born_breitung_sentence),
    ("pesaran_cd", "Pesaran's CD test", _cd_sentence),
)


def read_error_structure(evidence: dict[str, Any], level: float) -> list[str]:
    """Plain sentences on the three error-structure tests, at ``level``, and what they mean.

    Reads the blocks ``wooldridge``, ``born_breitung`` and ``pesaran_cd`` of
    ``evidence`` (missing blocks are skipped, undefined ones say why), then
    one sentence on standard errors downstream (:func:`standard_error_advice`).
    """
    pct = f"{level:.0%}"
    lines: list[str] = []
    for key, name, sentence in _READERS:
        block = evidence.get(key)
        if block is None:
            continue
        rejects = _rejects(block, level)
        if rejects is None:
            lines.append(f"{name} is unavailable ({block.get('note') or 'not computed'}).")
        else:
            lines.append(sentence(block, rejects, pct))
    advice = standard_error_advice(evidence, level)
    if advice:
        lines.append(advice)
    return lines


def standard_error_advice(evidence: dict[str, Any], level: float) -> str | None:
    """One sentence on what the error-structure tests mean for standard errors downstream.

    None when none of the three blocks is present.
    """
    blocks = [evidence.get(key) for key in ("wooldridge", "born_breitung", "pesaran_cd")]
    if all(block is None for block in blocks):
        return None
    serial = [_rejects(block, level) for block in blocks[:2]]
    dependent = _rejects(blocks[2], level)
    parts = []
    if any(serial):
        parts.append(
            "the idiosyncratic errors look serially correlated, so conventional standard "
            "errors of within, first-difference or random-effects fits are too small: cluster "
            "by entity (which needs many entities), and random effects is no longer the "
            "efficient estimator")
    elif serial.count(False):
        parts.append(
            "there is no evidence of serial correlation, so conventional within standard "
            "errors are not contradicted; clustering by entity stays the safe choice, since "
            "these tests have little power with few periods")
    else:
        parts.append("serial correlation could not be tested: cluster by entity to be safe")
    if dependent:
        parts.append(
            "entities move together within periods, which clustering by entity does not allow "
            "for (it treats entities as independent): add period effects if the dependence is "
            "a shock common to all, or use standard errors robust to cross-sectional "
            "dependence (clustered by period as well, or Driscoll-Kraay)")
    elif dependent is False:
        parts.append("there is no evidence of cross-sectional dependence, so entity-clustered "
                     "standard errors are not contradicted on that count")
    return "For standard errors: " + "; ".join(parts) + "."
