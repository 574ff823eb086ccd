"""Tests that inform the choice between pooled OLS, random effects and fixed effects.

Every function works on the estimation sample: ``y`` (n,), ``X`` (n, k) float64
*without* a constant column, ``entity_codes`` dense 0..G-1, ``counts`` (G,)
the number of rows T_i of each entity, and ``names`` the k regressor names.
All per-entity work is a group sum (``np.bincount``) or a broadcast back to
rows by the codes; the only Python loops run over columns.

Three pieces of evidence are computed:

* an entity-effect Lagrange multiplier test on pooled OLS residuals
  (Breusch-Pagan and its one-sided Honda form, unbalanced versions of
  Baltagi and Li, 1990): are there entity effects at all?
* the Mundlak test: in the random-effects (quasi-demeaned) regression, do the
  entity means of the time-varying regressors matter?  With the default
  entity-clustered covariance it stays valid under serial correlation and
  heteroskedasticity.
* the classical Hausman contrast between the within and random-effects
  slopes.

Given the period codes, :func:`error_structure` adds the evidence on the
errors themselves (``panelprep.dependence``): Wooldridge's test for serial
correlation on first differences, the Born-Breitung LM test for serial
correlation with entity effects, and Pesaran's CD test for dependence across
entities, with what each means for standard errors.

:func:`read_evidence` turns them into plain sentences and
:func:`collect_evidence` runs the lot and returns a JSON-serialisable dict
(Python floats, ``None`` with a note wherever a number is undefined, never NaN
or infinity).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np

from panelprep._groups import group_sums
from panelprep._linalg import default_rtol, ols_from_r, sandwich
from panelprep._moments import StandardSample, standard_sample, triangular
from panelprep.dependence import (
    born_breitung_lm,
    panel_steps,
    pesaran_cd,
    read_error_structure,
    standard_error_advice,
    wooldridge_serial,
)
from panelprep.transforms import theta_per_entity
from panelprep.words import p_phrase, plural

#: Significance level used by :func:`read_evidence`.
LEVEL = 0.05

#: The closing caution of every reading.
CAUTION = (
    "These tests are evidence, not a verdict: they do not replace knowing how the "
    "data were generated, and a large sample rejects tiny departures while a small one "
    "misses large ones. After the within transform, standard errors must be clustered "
    "by entity whenever the errors may be serially correlated; the conventional ones "
    "are then too small. Clustering by entity allows for serial correlation, not for "
    "dependence across entities within a period."
)

# Relative eigenvalue tolerance of the generalised inverses, on matrices scaled
# to unit diagonal (see _quad_form).  sqrt(eps) ~ 1.5e-8: a difference of two
# covariance matrices that is below this fraction of their own size cannot be
# told apart from rounding in the subtraction.
_GINV_RTOL = math.sqrt(float(np.finfo(np.float64).eps))

# Absolute tolerance when checking a given theta against the one implied by the
# variance components: theta is a weight in [0, 1], and components rounded
# for display would already move it by more than 1e-12.
_THETA_ATOL = 1e-8

_HAUSMAN_VARIANCE_CHOICE = (
    "Both covariances use the same idiosyncratic variance s2_e "
    "(V_within = s2_e (X'QX)^-1, V_re = s2_e (X*'X*)^-1), so their difference is "
    "positive semi-definite in theory."
)


def _as_sample(y, X, counts) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The estimation sample as float64 y (n,), X (n, k) and int64 counts (G,)."""
    y = np.asarray(y, dtype=np.float64)
    X = np.asarray(X, dtype=np.float64)
    if X.ndim == 1:
        X = X[:, None]
    return y, X, np.asarray(counts, dtype=np.int64)


def _shared(cache: dict | None, key: str, compute: Any) -> Any:
    """``compute()`` once per ``cache``: the tests share transforms and one regression."""
    if cache is None:
        return compute()
    if key not in cache:
        cache[key] = compute()
    return cache[key]


# the standardised sample and its moments are shared with the components (prepare_frame)
_Sample = StandardSample


def _sample_of(y, X, entity_codes, counts, cache) -> _Sample:
    """Standardise the sample and build its moments, once per ``cache``."""
    def compute():
        y_raw, X_raw, sizes = _as_sample(y, X, counts)
        return standard_sample(y_raw, X_raw, np.asarray(entity_codes), sizes)

    return _shared(cache, "sample", compute)


def _fit_stack(stack: np.ndarray, columns: list[int], n: int, **kwargs):
    """OLS of the stack's last column on ``columns`` (the stack has the design's cross product)."""
    return ols_from_r(triangular(stack[:, [*columns, stack.shape[1] - 1]], len(columns) + 1),
                      n, **kwargs)


def _random_effects_stack(sample: _Sample, theta_g: np.ndarray, means: list[int]) -> np.ndarray:
    """Rows whose cross product is that of ``[1 - theta_i, X*, (1 - theta_i) xbar_i[means], y*]``."""
    weight = (1.0 - theta_g) * np.sqrt(sample.moments.counts)
    return np.vstack([sample.within_rows(len(means)), sample.entity_rows(weight, means)])


def _varying(sample: _Sample) -> np.ndarray:
    """Boolean (k,): columns whose within deviations exceed rounding.

    A column counts as time-varying when the norm of its within deviations is
    above ``default_rtol(n, k)`` (the rank tolerance of ``_linalg.ols``) times
    the norm of the (centred) column itself; demeaning an entity-constant
    column leaves only rounding of order eps times its size.
    """
    n, k = sample.n, sample.k
    if n == 0 or k == 0:
        return np.zeros(k, dtype=bool)
    mom = sample.moments
    return mom.within_ss[:k] > default_rtol(n, k) ** 2 * mom.total_ss[:k]


def _p_chi2(statistic: float, df: int) -> float:
    """Upper tail of chi2(df): ``chdtrc``, the function ``scipy.stats.chi2.sf`` calls."""
    import scipy.special  # here, not at import: scipy.stats alone costs about 0.6 s

    return float(scipy.special.chdtrc(df, statistic))


def _p_normal_upper(statistic: float) -> float:
    """Upper tail of the standard normal: ``ndtr(-z)``, as ``scipy.stats.norm.sf`` computes it."""
    import scipy.special

    return float(scipy.special.ndtr(-statistic))


def _entity_theta(theta: float | np.ndarray, n_groups: int) -> np.ndarray:
    """Per-entity theta (G,) from a scalar or a (G,) array, checked to lie in [0, 1]."""
    arr = np.asarray(theta, dtype=np.float64)
    if arr.ndim == 0:
        arr = np.full(n_groups, float(arr))
    if arr.shape != (n_groups,):
        raise ValueError(f"theta has shape {arr.shape}; expected a scalar or ({n_groups},)")
    if not np.isfinite(arr).all() or (arr < 0).any() or (arr > 1).any():
        raise ValueError("theta must be finite and within [0, 1]")
    return arr


def _independent_after(base: np.ndarray, extra: np.ndarray, n: int | None = None) -> np.ndarray:
    """Boolean mask of ``extra`` columns that add a direction to ``base``, greedily in order.

    Works on the (p x p) cross-product matrix of ``[base, extra]``, one pass
    over the rows: eliminating the accepted columns in order leaves, for
    each extra column, the squared norm of what is not in the span of
    ``base`` and of the extra columns accepted before it (a Schur
    complement).  A column is accepted when that norm is above
    ``max(default_rtol(n, p), 1e3 * sqrt(eps))`` times its own norm; the
    floor allows for the squaring of the condition number in a cross
    product.  ``base`` must have full column rank (the kept columns of an
    :func:`~panelprep._linalg.ols` fit).  ``n`` is the number of rows the
    design stands for when ``base`` and ``extra`` are a stack with the same
    cross product (default: their own rows).
    """
    k_base, k_extra = base.shape[1], extra.shape[1]
    n = extra.shape[0] if n is None else n
    rtol = max(default_rtol(n, k_base + k_extra), 1e3 * math.sqrt(np.finfo(float).eps))
    # the cross products by blocks, so [base, extra] is never copied
    gram = np.empty((k_base + k_extra, k_base + k_extra))
    gram[:k_base, :k_base] = base.T @ base
    gram[:k_base, k_base:] = base.T @ extra
    gram[k_base:, :k_base] = gram[:k_base, k_base:].T
    gram[k_base:, k_base:] = extra.T @ extra
    ok = np.zeros(k_extra, dtype=bool)
    accepted = list(range(k_base))
    for j in range(k_extra):
        column = k_base + j
        own = gram[column, column]
        if accepted:
            block = gram[np.ix_(accepted, accepted)]
            cross = gram[accepted, column]
            left = own - cross @ np.linalg.solve(block, cross)
        else:
            left = own
        if own > 0 and left > (rtol**2) * own:
            ok[j] = True
            accepted.append(column)
    return ok


def _quad_form(
    d: np.ndarray, V: np.ndarray, reference: np.ndarray
) -> tuple[float | None, int, bool]:
    """``d' V^- d`` with a generalised inverse from an eigen-decomposition.

    ``V`` and ``d`` are first scaled by ``s = sqrt(diag(reference))`` (unit
    scale where that diagonal is not positive), so the tolerance does not depend
    on the units of the regressors.  Eigenvalues of the scaled matrix above
    ``sqrt(eps) * max(1, largest |eigenvalue|)`` are kept; the others (zero,
    negative or rounding) are left out.  ``S V_s^+ S`` is a generalised inverse
    of ``V`` (``V G V = V``), which is what the Wald and Hausman forms need.

    Returns
    -------
    (statistic, rank, full_rank)
        ``statistic`` is None when no eigenvalue is kept.
    """
    q = len(d)
    if q == 0:
        return None, 0, False
    ref = np.diag(reference)
    s = np.where(ref > 0, np.sqrt(np.where(ref > 0, ref, 1.0)), 1.0)
    Vs = V / s[:, None] / s[None, :]
    Vs = (Vs + Vs.T) / 2.0
    ds = d / s
    w, U = np.linalg.eigh(Vs)
    tol = _GINV_RTOL * max(1.0, float(np.max(np.abs(w))))
    keep = w > tol
    rank = int(np.count_nonzero(keep))
    if rank == 0:
        return None, 0, False
    z = U[:, keep].T @ ds
    stat = float(np.sum(z * z / w[keep]))
    return max(stat, 0.0), rank, rank == q


def entity_effect_lm(
    pooled_resid: np.ndarray,
    entity_codes: np.ndarray,
    counts: np.ndarray,
    y_scale: float | None = None,
) -> dict[str, dict[str, Any]]:
    """Lagrange multiplier tests for entity effects on pooled OLS residuals.

    With pooled OLS residuals ``e`` (regression with a constant), ``n`` rows
    and entity sizes ``T_i``, the unbalanced forms of Baltagi and Li (1990)
    are::

        A      = sum_i (sum_t e_it)^2 / sum_it e_it^2 - 1
        LM     = n^2 / (2 * sum_i T_i (T_i - 1)) * A^2        ~ chi2(1)
        Honda  = sqrt(n^2 / (2 * sum_i T_i (T_i - 1))) * A    ~ N(0, 1)

    On a balanced panel ``n^2 / (2 sum T_i(T_i-1)) = NT / (2 (T-1))``, the
    Breusch-Pagan (1980) form.  Honda's test is one-sided (entity variance is
    non-negative), so its p-value is the upper normal tail.

    Parameters
    ----------
    pooled_resid : array (n,)
        Pooled OLS residuals.
    entity_codes : int array (n,)
        Dense entity codes 0..G-1.
    counts : int array (G,)
        Rows per entity T_i.
    y_scale : float, optional
        Norm of the centred response, ``||y - ybar||``.  When given, residuals
        with norm at most ``default_rtol(n, 1) * y_scale`` count as an exact
        fit (rounding only), for which the test is undefined.  The statistic
        itself is scale-free, so without ``y_scale`` only all-zero residuals
        can be recognised.

    Returns
    -------
    dict
        ``{"breusch_pagan": {statistic, df, p_value, note},
        "honda": {statistic, p_value, note}}``.  Values are None, with a note,
        when every entity has one row (``sum T_i(T_i-1) = 0``) or the pooled
        fit is exact.
    """
    e = np.asarray(pooled_resid, dtype=np.float64)
    counts = np.asarray(counts, dtype=np.int64)
    n = e.shape[0]
    pairs = float(np.sum(counts * (counts - 1)))
    ssr = float(e @ e)
    note = _lm_undefined(pairs, ssr, n, y_scale)
    if note is not None:
        return _lm_missing(note)
    return _lm_from_sums(group_sums(entity_codes, e, len(counts)), ssr, n, pairs)


def _pooled_lm(sample: _Sample) -> dict[str, dict[str, Any]]:
    """:func:`entity_effect_lm` of pooled OLS on ``[1, X]``, from the entity moments.

    The pooled residuals' entity sums are ``T_i (ybar_i - b_0 - xbar_i b)``
    (within deviations sum to zero), and their sum of squares is the stacked
    fit's; no residual vector is formed.
    """
    n, k = sample.n, sample.k
    counts = sample.moments.counts
    stack = np.vstack([sample.within_rows(), sample.entity_rows(np.sqrt(counts))])
    fit = _fit_stack(stack, list(range(1 + k)), n)
    means = sample.moments.means
    sums = counts * (means[:, k] - fit.coef[0] - means[:, :k] @ fit.coef[1:])
    pairs = float(np.sum(sample.counts * (sample.counts - 1)))
    y_scale = math.sqrt(float(sample.moments.total_ss[k]))
    note = _lm_undefined(pairs, fit.ssr, n, y_scale)
    if note is not None:
        return _lm_missing(note)
    return _lm_from_sums(sums, fit.ssr, n, pairs)


def _lm_undefined(pairs: float, ssr: float, n: int, y_scale: float | None) -> str | None:
    if pairs <= 0:
        return ("every entity has a single row, so there are no within-entity residual "
                "pairs and the entity-effect test is undefined")
    if not ssr > 0 or (
        y_scale is not None and math.sqrt(ssr) <= default_rtol(n, 1) * float(y_scale)
    ):
        return ("pooled OLS fits exactly (the residuals are rounding), so the "
                "entity-effect test is undefined")
    return None


def _lm_missing(note: str) -> dict[str, dict[str, Any]]:
    return {
        "breusch_pagan": {"statistic": None, "df": 1, "p_value": None, "note": note},
        "honda": {"statistic": None, "p_value": None, "note": note},
    }


def _lm_from_sums(sums: np.ndarray, ssr: float, n: int, pairs: float) -> dict[str, dict]:
    """Breusch-Pagan and Honda from the entity sums of the pooled residuals."""
    a = float(sums @ sums) / ssr - 1.0
    factor = float(n) ** 2 / (2.0 * pairs)
    lm = factor * a * a
    honda = math.sqrt(factor) * a
    return {
        "breusch_pagan": {"statistic": lm, "df": 1, "p_value": _p_chi2(lm, 1), "note": None},
        "honda": {
            "statistic": honda,
            "p_value": _p_normal_upper(honda),
            "note": None,
        },
    }


def mundlak_test(
    y: np.ndarray,
    X: np.ndarray,
    entity_codes: np.ndarray,
    counts: np.ndarray,
    theta: float | np.ndarray,
    names: Sequence[str],
    cluster: bool = True,
    _cache: dict | None = None,
) -> dict[str, Any]:
    """Mundlak test: do the entity means of the regressors enter the random-effects regression?

    The regression is, on quasi-demeaned data (``v* = v - theta_i vbar_i``)::

        y*_it = c (1 - theta_i) + x*_it' b + (1 - theta_i) xbar_i' g + error

    where ``xbar_i`` runs over the time-varying regressors only (the quasi
    transform of an entity mean is ``(1 - theta_i) xbar_i``).  A regressor with
    no within variation equals its own mean, so its mean is not added; such
    regressors are listed in ``time_invariant``.  The statistic is the Wald
    form ``g' V_g^- g`` ~ chi2(df).

    Parameters
    ----------
    y, X, entity_codes, counts
        Estimation sample (see the module docstring).
    theta : float or array (G,)
        Quasi-demeaning weight of each entity, in [0, 1].
    names : sequence of str
        The k regressor names.
    cluster : bool
        True (default): entity-clustered sandwich covariance with the factor
        ``G/(G-1) * (n-1)/(n-p)`` (``_linalg.cluster_cov``), p the number of
        fitted columns.  False: conventional ``s2 (Z'Z)^-1`` with
        ``s2 = SSR / (n - p)``.

    Returns
    -------
    dict
        ``statistic, df, p_value, covariance ("entity-clustered" or
        "conventional"), tested`` (names whose means were tested),
        ``time_invariant`` (names left out), ``note``.  ``df`` is the rank of
        the covariance block actually inverted; with clustering it is at most
        G - 1.
    """
    names = list(names)
    sample = _sample_of(y, X, entity_codes, counts, _cache)
    n, k = sample.n, sample.k
    if len(names) != k:
        raise ValueError(f"{len(names)} names for {k} regressors")
    n_groups = len(sample.counts)
    theta_g = _entity_theta(theta, n_groups)
    covariance = "entity-clustered" if cluster else "conventional"
    varying = _shared(_cache, "varying", lambda: _varying(sample))
    invariant = [names[j] for j in np.flatnonzero(~varying)]
    result: dict[str, Any] = {
        "statistic": None,
        "df": 0,
        "p_value": None,
        "covariance": covariance,
        "tested": [],
        "time_invariant": invariant,
        "note": None,
    }
    if not varying.any():
        result["note"] = "no regressor varies within entities, so there are no means to test"
        return result

    var_idx = np.flatnonzero(varying)
    # columns of the stack: [1 - theta_i, X* (k), (1 - theta_i) xbar_i (varying), y*]
    stack = _random_effects_stack(sample, theta_g, list(var_idx))
    base_cols = list(range(1 + k))
    mean_cols = list(range(1 + k, 1 + k + len(var_idx)))
    base_fit = _shared(_cache, "random_effects", lambda: _fit_stack(stack, base_cols, n))
    base_kept = [c for c, kept in zip(base_cols, base_fit.kept) if kept]
    # A pivoted QR of the whole design could drop the constant or a
    # time-invariant regressor instead of a redundant mean (a mean that is
    # constant across entities is proportional to the constant column), which
    # would change what is tested; so the means are screened against the
    # kept base columns first.
    mean_ok = _independent_after(stack[:, base_kept], stack[:, mean_cols], n=n)
    notes = []
    if not mean_ok.all():
        notes.append(
            "means left out because they are collinear with the other regressors: "
            + ", ".join(names[j] for j, ok in zip(var_idx, mean_ok) if not ok)
        )
    design = base_kept + [c for c, ok in zip(mean_cols, mean_ok) if ok]
    fit = _fit_stack(stack, design, n)
    mean_pos = np.arange(len(base_kept), len(design))
    tested_mask = fit.kept[mean_pos]
    tested = [names[j] for j, t in zip(var_idx[mean_ok], tested_mask) if t]
    result["tested"] = tested
    if not tested:
        notes.append("no entity mean is left to test")
        result["note"] = "; ".join(notes)
        return result
    if fit.df_resid <= 0:
        notes.append("no residual degrees of freedom; the covariance is undefined")
        result["note"] = "; ".join(notes)
        return result
    y_norm = float(np.linalg.norm(stack[:, -1]))
    if math.sqrt(fit.ssr) <= default_rtol(n, len(design)) * y_norm:
        notes.append("the regression fits exactly (residuals are rounding); no test is possible")
        result["note"] = "; ".join(notes)
        return result

    # Positions of the tested means among the kept columns (xtx_inv is in kept order).
    kept_idx = np.flatnonzero(fit.kept)
    sel = np.searchsorted(kept_idx, mean_pos[tested_mask])
    if cluster:
        scores = _mundlak_scores(sample, theta_g, var_idx, np.asarray(design), fit)
        V = sandwich(scores, fit.xtx_inv, n, n_groups)
    else:
        V = fit.ssr / fit.df_resid * fit.xtx_inv
    Vg = V[np.ix_(sel, sel)]
    g = fit.coef[mean_pos[tested_mask]]
    stat, rank, full = _quad_form(g, Vg, Vg)
    if stat is None:
        notes.append("the covariance of the mean coefficients is zero; no test is possible")
        result["note"] = "; ".join(notes)
        return result
    if not full:
        notes.append(
            f"the covariance of the {len(tested)} mean coefficients has rank {rank}"
            + (f" (at most G - 1 = {n_groups - 1} with clustering)" if cluster else "")
            + "; a generalised inverse was used and df set to that rank"
        )
    result.update(statistic=stat, df=rank, p_value=_p_chi2(stat, rank))
    result["note"] = "; ".join(notes) if notes else None
    return result


def _mundlak_scores(sample: _Sample, theta_g: np.ndarray, var_idx: np.ndarray,
                    design: np.ndarray, fit) -> np.ndarray:
    """Per-entity scores ``sum_t z_it e_it`` (G, kept columns) of the Mundlak regression.

    Each row of the design is a within part ``w_it`` (the within deviations of
    X, in the X* columns) plus an entity part ``c_i``, and so is each residual:
    ``e_it = (y_w - X_w b) + (1 - theta_i)(ybar_i - ...)``.  Within parts sum to
    zero in every entity, so ``sum_t z_it e_it = sum_t w_it e_w,it + T_i c_i
    e_i``: one group sum per regressor for the first term, entity arithmetic
    for the second.
    """
    k = sample.k
    kept_cols = design[fit.kept]
    coef = fit.coef[fit.kept]
    one_minus = 1.0 - theta_g
    means = sample.moments.means
    # the entity part of each design column: [1, xbar_i, xbar_i[varying]] times 1 - theta_i
    entity = np.column_stack([np.ones(len(theta_g)), means[:, :k], means[:, var_idx]])
    entity *= one_minus[:, None]
    fitted = entity[:, kept_cols] @ coef
    entity_resid = one_minus * means[:, k] - fitted
    scores = sample.moments.counts[:, None] * entity[:, kept_cols] * entity_resid[:, None]
    slope = np.zeros(k)
    in_x = (kept_cols >= 1) & (kept_cols <= k)
    slope[kept_cols[in_x] - 1] = coef[in_x]
    within_part = sample.moments.within_scores(sample.x_column, sample.y_column(), slope)
    scores[:, in_x] += within_part[:, kept_cols[in_x] - 1]
    return scores


def hausman_test(
    y: np.ndarray,
    X: np.ndarray,
    entity_codes: np.ndarray,
    counts: np.ndarray,
    sigma2_entity: float,
    sigma2_idiosyncratic: float,
    theta: float | np.ndarray,
    names: Sequence[str] | None = None,
    _cache: dict | None = None,
) -> dict[str, Any]:
    """Classical Hausman contrast between within and random-effects slopes.

    ``H = (b_w - b_re)' [V_w - V_re]^- (b_w - b_re)`` over the time-varying
    regressors, with

    * ``b_w`` the within slopes, ``V_w = s2_e (X'QX)^-1``;
    * ``b_re`` the slopes of the quasi-demeaned regression (constant column
      ``1 - theta_i`` and all regressors), ``V_re = s2_e (X*'X*)^-1`` (its slope
      block);

    and the *same* ``s2_e = sigma2_idiosyncratic`` in both, so ``V_w - V_re`` is
    positive semi-definite in theory.  When it is not positive definite in
    practice (a direction in which random effects adds no between information,
    or rounding), a generalised inverse from its eigen-decomposition is used
    (positive eigenvalues above a tolerance, see ``_quad_form``),
    ``positive_definite`` is False and ``df`` is the rank used.

    Parameters
    ----------
    y, X, entity_codes, counts
        Estimation sample (see the module docstring).
    sigma2_entity : float
        Entity variance s2_u.  Used to check that ``theta`` is the weight the
        components imply (``transforms.theta_per_entity``); a mismatch above
        1e-8 is reported in the note, and a zero s2_u (random effects equals
        pooled OLS) too.
    sigma2_idiosyncratic : float
        Idiosyncratic variance s2_e, positive.
    theta : float or array (G,)
        Quasi-demeaning weight of each entity, in [0, 1].
    names : sequence of str, optional
        Regressor names for ``tested``; column positions otherwise.

    Returns
    -------
    dict
        ``statistic, df, p_value, positive_definite, tested`` (regressors
        contrasted), ``note`` (always states the variance choice).
    """
    sample = _sample_of(y, X, entity_codes, counts, _cache)
    unit = sample.unit ** 2
    return _hausman(sample, float(sigma2_entity) / unit, float(sigma2_idiosyncratic) / unit,
                    theta, names, _cache)


def _within_fit(sample: _Sample, cache: dict | None):
    """The time-varying columns and the within regression of y on them, once per ``cache``."""
    def compute():
        cols = np.flatnonzero(_shared(cache, "varying", lambda: _varying(sample)))
        r = sample.moments.r_within
        fit = ols_from_r(triangular(r[:, [*cols, sample.k]], len(cols) + 1), sample.n,
                         scale=np.sqrt(sample.moments.total_ss[cols]))
        return cols, fit

    return _shared(cache, "within", compute)


def _hausman(sample: _Sample, sigma2_entity: float, s2_e: float, theta, names, cache) -> dict:
    """:func:`hausman_test` on the standardised sample (variances in its units)."""
    n, k = sample.n, sample.k
    counts = sample.counts
    n_groups = len(counts)
    theta_g = _entity_theta(theta, n_groups)
    notes = [_HAUSMAN_VARIANCE_CHOICE]
    result: dict[str, Any] = {
        "statistic": None,
        "df": 0,
        "p_value": None,
        "positive_definite": False,
        "tested": [],
        "note": None,
    }
    if not (math.isfinite(s2_e) and s2_e > 0):
        notes.append("The idiosyncratic variance is not positive; the contrast is undefined.")
        result["note"] = " ".join(notes)
        return result
    if float(sigma2_entity) <= 0:
        notes.append("The entity variance is zero, so random effects equals pooled OLS here.")
    implied = theta_per_entity(float(sigma2_entity), s2_e, counts)
    if np.max(np.abs(implied - theta_g), initial=0.0) > _THETA_ATOL:
        notes.append(
            "theta does not match the variance components (theta_i = 1 - sqrt(s2_e / "
            "(T_i s2_u + s2_e))), so s2_e (X*'X*)^-1 is not the random-effects covariance "
            "and the contrast is not the classical one."
        )
    varying = _shared(cache, "varying", lambda: _varying(sample))
    if not varying.any():
        notes.append("No regressor varies within entities; there is nothing to contrast.")
        result["note"] = " ".join(notes)
        return result

    cols, fit_w = _within_fit(sample, cache)
    stack = _random_effects_stack(sample, theta_g, [])
    fit_q = _shared(cache, "random_effects", lambda: _fit_stack(stack, list(range(1 + k)), n))
    y_norm = float(np.linalg.norm(stack[:, -1]))
    if math.sqrt(fit_q.ssr) <= default_rtol(n, fit_q.rank) * y_norm:
        notes.append("The regression fits exactly (residuals are rounding); no test is possible.")
        result["note"] = " ".join(notes)
        return result
    # Contrast over columns estimable in both fits.
    use = fit_w.kept & fit_q.kept[1 + cols]
    if not use.all():
        notes.append(f"{plural(int(np.count_nonzero(~use)), 'collinear regressor')} left out.")
    if not use.any():
        notes.append("No estimable slope to contrast.")
        result["note"] = " ".join(notes)
        return result
    w_pos = np.searchsorted(np.flatnonzero(fit_w.kept), np.flatnonzero(use))
    q_pos = np.searchsorted(np.flatnonzero(fit_q.kept), 1 + cols[use])
    d = fit_w.coef[use] - fit_q.coef[1 + cols[use]]
    V_w = s2_e * fit_w.xtx_inv[np.ix_(w_pos, w_pos)]
    V_re = s2_e * fit_q.xtx_inv[np.ix_(q_pos, q_pos)]
    labels = list(names) if names is not None else list(range(k))
    result["tested"] = [labels[c] for c in cols[use]]
    stat, rank, full = _quad_form(d, V_w - V_re, V_w)
    if stat is None:
        notes.append(
            "V_within - V_re has no positive eigenvalue above the tolerance: random "
            "effects adds no information beyond the within estimator, so no test is possible."
        )
        result["note"] = " ".join(notes)
        return result
    if not full:
        notes.append(
            f"V_within - V_re is not positive definite (rank {rank} of {len(d)}); a "
            "generalised inverse over its positive eigenvalues was used and df set to that rank."
        )
    result.update(
        statistic=stat, df=rank, p_value=_p_chi2(stat, rank), positive_definite=bool(full)
    )
    result["note"] = " ".join(notes)
    return result


def _verdict(block: dict[str, Any] | None) -> bool | None:
    """True if the block's p-value is below LEVEL, False if not, None if unavailable."""
    if not block or block.get("p_value") is None:
        return None
    return bool(block["p_value"] < LEVEL)


def _fmt(value: float) -> str:
    # a statistic of thousands keeps its digits: 14142.1, not 1.414e+04
    return f"{value:.1f}" if 1e3 <= abs(value) < 1e9 else f"{value:.4g}"


def read_evidence(evidence: dict[str, Any]) -> list[str]:
    """Plain-language reading of the evidence, at the 5% level (``LEVEL``).

    Parameters
    ----------
    evidence : dict
        With any of the keys ``breusch_pagan``, ``honda`` (as returned by
        :func:`entity_effect_lm`), ``mundlak`` (:func:`mundlak_test`) and
        ``hausman`` (:func:`hausman_test`).  Missing or undefined blocks are
        read as "no evidence either way".

    Returns
    -------
    list of str
        One sentence per piece of evidence, one sentence naming the estimator
        the evidence points to, and last the caution :data:`CAUTION`.

    Notes
    -----
    The entity-effect test is read first: a rejection by Breusch-Pagan or
    (one-sided) Honda points away from pooled OLS towards a panel estimator.
    Fixed versus random effects is then read from the Mundlak test when it was
    computed, otherwise from the Hausman test: a rejection means the entity
    effects look correlated with the regressors, so random effects would be
    inconsistent and fixed effects is indicated.
    """
    lines: list[str] = []
    pct = f"{LEVEL:.0%}"
    bp = evidence.get("breusch_pagan")
    honda = evidence.get("honda")
    bp_v, honda_v = _verdict(bp), _verdict(honda)
    if bp_v is None and honda_v is None:
        effects = None
        why = (bp or {}).get("note") or (honda or {}).get("note") or "not computed"
        lines.append(
            f"The entity-effect test is unavailable ({why}), so it says nothing about "
            "pooled OLS versus a panel estimator."
        )
    else:
        effects = bool(bp_v or honda_v)
        parts = []
        if bp_v is not None:
            parts.append(f"Breusch-Pagan LM = {_fmt(bp['statistic'])} ({p_phrase(bp['p_value'])})")
        if honda_v is not None:
            parts.append(
                f"Honda = {_fmt(honda['statistic'])} ({p_phrase(honda['p_value'], 'one-sided p')})"
            )
        if effects:
            tail = (
                f"at the {pct} level there is evidence of entity effects, which points away "
                "from pooled OLS towards a panel estimator (random or fixed effects)."
            )
        else:
            tail = (
                f"at the {pct} level there is no evidence of entity effects, so pooled OLS "
                "is not contradicted."
            )
        lines.append(" and ".join(parts) + ": " + tail)

    mundlak = evidence.get("mundlak")
    hausman = evidence.get("hausman")
    m_v, h_v = _verdict(mundlak), _verdict(hausman)
    for label, block, verdict in (("Mundlak", mundlak, m_v), ("Hausman", hausman, h_v)):
        if block is None:
            continue
        if verdict is None:
            why = block.get("note") or "not computed"
            lines.append(f"The {label} test is unavailable ({why}).")
            continue
        head = (
            f"{label} statistic = {_fmt(block['statistic'])} on {block['df']} df "
            f"({p_phrase(block['p_value'])}"
            + (f", {block['covariance']} covariance" if "covariance" in block else "")
            + ")"
        )
        if verdict:
            lines.append(
                head + f": at the {pct} level the entity effects look correlated with the "
                "regressors, so random effects would be inconsistent; this points to fixed "
                "effects."
            )
        else:
            lines.append(
                head + f": at the {pct} level there is no evidence that the entity effects "
                "are correlated with the regressors; random effects is then consistent and "
                "more efficient than fixed effects."
            )
        if label == "Hausman" and block.get("positive_definite") is False:
            lines.append(
                "The Hausman covariance difference was not positive definite, so that "
                "statistic rests on a generalised inverse and is less reliable."
            )
    if m_v is not None and h_v is not None and m_v != h_v:
        lines.append(
            "The Mundlak and Hausman tests disagree. The Mundlak test with entity-clustered "
            "covariance stays valid under heteroskedasticity and serial correlation, the "
            "classical Hausman test does not, so the Mundlak result carries more weight."
        )
    correlated = m_v if m_v is not None else h_v

    if correlated:
        choice = "fixed effects"
        if effects is False:
            choice += (
                " (the entity-effect test did not reject, but effects correlated with the "
                "regressors would bias pooled OLS as well)"
            )
    elif effects is False:
        choice = "pooled OLS (with entity-clustered standard errors)"
    elif effects and correlated is False:
        choice = "random effects"
    elif effects:
        choice = "a panel estimator, with fixed versus random effects left open"
    elif correlated is False:
        choice = (
            "random effects or pooled OLS (no evidence of correlated effects; the "
            "entity-effect test is unavailable)"
        )
    else:
        choice = "no estimator in particular: the tests could not be computed"
    lines.append(f"Overall, the evidence points to {choice}.")
    lines += read_error_structure(evidence, LEVEL)
    lines.append(CAUTION)
    return lines


def error_structure(
    y: np.ndarray,
    X: np.ndarray,
    entity_codes: np.ndarray,
    counts: np.ndarray,
    period_codes: np.ndarray,
    _cache: dict | None = None,
) -> dict[str, dict[str, Any]]:
    """Wooldridge, Born-Breitung and Pesaran CD tests (``panelprep.dependence``) on the sample.

    Wooldridge's test fits its own first-differenced regression; the other two
    use the residuals of the within regression of y on the time-varying
    regressors (:func:`_within_fit`), formed once.  When the within regression
    fits exactly (residuals are rounding) those two are undefined, with a note.

    Parameters
    ----------
    y, X, entity_codes, counts
        Estimation sample (see the module docstring).
    period_codes : int array (n,)
        Period codes on the grid, non-negative; consecutive codes are
        consecutive periods, so a hole in an entity's codes is a gap.

    Returns
    -------
    dict
        ``wooldridge`` (:func:`~panelprep.dependence.wooldridge_serial`),
        ``born_breitung`` (:func:`~panelprep.dependence.born_breitung_lm`),
        ``pesaran_cd`` (:func:`~panelprep.dependence.pesaran_cd`).

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> entity, period = np.repeat(np.arange(30), 6), np.tile(np.arange(6), 30)
    >>> x = rng.normal(size=(180, 1))
    >>> y = x[:, 0] + rng.normal(size=30)[entity] + rng.normal(size=180)
    >>> out = error_structure(y, x, entity, np.bincount(entity), period)
    >>> sorted(out), out["pesaran_cd"]["pairs"]
    (['born_breitung', 'pesaran_cd', 'wooldridge'], 435)
    """
    sample = _sample_of(y, X, entity_codes, counts, _cache)
    periods = np.asarray(period_codes, dtype=np.int64)
    if periods.shape != sample.codes.shape or (len(periods) and periods.min() < 0):
        raise ValueError("period_codes must be non-negative codes, one per row of the sample")
    steps = panel_steps(sample.codes, periods)
    divisors = np.concatenate([sample.x_scaling.scale, sample.y_scaling.scale])
    out = {"wooldridge": wooldridge_serial(sample.raw_X, sample.raw_y, sample.codes, steps,
                                           divisors)}
    cols, fit = _within_fit(sample, _cache)
    n, k = sample.n, sample.k
    if math.sqrt(fit.ssr) <= default_rtol(n, len(cols)) * math.sqrt(
            float(sample.moments.within_ss[k])):
        note = ("the within regression fits exactly (its residuals are rounding), so the "
                "test is undefined")
        lm = born_breitung_lm(np.zeros(n), sample.codes, sample.counts, steps)
        cd = pesaran_cd(np.zeros(n), sample.codes, periods, sample.counts, steps.duplicated)
        out["born_breitung"] = {**lm, "statistic": None, "p_value": None, "note": note}
        out["pesaran_cd"] = {**cd, "statistic": None, "p_value": None, "note": note}
        return out
    slope = np.zeros(k)
    slope[cols[fit.kept]] = fit.coef[fit.kept]
    resid = sample.moments.within_residuals(sample.x_column, sample.y_column(), slope)
    out["born_breitung"] = born_breitung_lm(resid, sample.codes, sample.counts, steps)
    out["pesaran_cd"] = pesaran_cd(resid, sample.codes, periods, sample.counts,
                                   steps.duplicated)
    return out


def collect_evidence(
    y: np.ndarray,
    X: np.ndarray,
    entity_codes: np.ndarray,
    counts: np.ndarray,
    components: Any,
    names: Sequence[str],
    sample: StandardSample | None = None,
    period_codes: np.ndarray | None = None,
) -> dict[str, Any]:
    """Run all tests and return a JSON-serialisable summary.

    Parameters
    ----------
    y, X, entity_codes, counts, names
        Estimation sample (see the module docstring); ``X`` without constant.
    components : object
        Fitted variance components with attributes ``sigma2_entity_``,
        ``sigma2_idiosyncratic_`` and ``theta_`` (scalar or per entity (G,)).
    sample : StandardSample, optional
        The same sample already standardised with its moments
        (``_moments.standard_sample``), as the components were fitted on it.
    period_codes : int array (n,), optional
        Period codes on the grid (consecutive codes are consecutive periods).
        When given, the error-structure tests run too (:func:`error_structure`).

    Returns
    -------
    dict
        ``breusch_pagan, honda`` (:func:`entity_effect_lm` on the residuals of
        pooled OLS with a constant), ``mundlak`` (entity-clustered covariance),
        ``hausman``; with ``period_codes`` also ``wooldridge``,
        ``born_breitung``, ``pesaran_cd`` and ``standard_errors`` (one sentence,
        :func:`panelprep.dependence.standard_error_advice`); ``reading``
        (:func:`read_evidence`) and ``caution``.  Numbers are Python floats or
        ints; undefined ones are None with a note.
    """
    names = list(names)
    # every regression here has a constant (or the constant column 1 - theta_i)
    # or works within entities, so centring changes no statistic; scaling by
    # powers of two keeps squares of values near 1e-300 or 1e300 in range
    shared: dict = {} if sample is None else {"sample": sample}
    sample = _sample_of(y, X, entity_codes, counts, shared)
    sd_entity = getattr(components, "sigma_entity_", None)
    sd_idiosyncratic = getattr(components, "sigma_idiosyncratic_", None)
    if sd_entity is None or sd_idiosyncratic is None:
        sd_entity = math.sqrt(float(components.sigma2_entity_))
        sd_idiosyncratic = math.sqrt(float(components.sigma2_idiosyncratic_))
    out: dict[str, Any] = _guarded(lambda: dict(_pooled_lm(sample)), ("breusch_pagan", "honda"),
                                   {"breusch_pagan": {"df": 1}})
    # both correlated-effects tests run on the same quasi-demeaned regression
    out.update(_guarded(lambda: {"mundlak": mundlak_test(
        y, X, entity_codes, counts, components.theta_, names, cluster=True, _cache=shared
    )}, ("mundlak",), {"mundlak": {"covariance": "entity-clustered", "tested": names}}))
    out.update(_guarded(lambda: {"hausman": _hausman(
        sample, (sd_entity / sample.unit) ** 2, (sd_idiosyncratic / sample.unit) ** 2,
        components.theta_, names, shared)}, ("hausman",), {"hausman": {"tested": names}}))
    if period_codes is not None:
        out.update(error_structure(y, X, entity_codes, counts, period_codes, _cache=shared))
        out["standard_errors"] = standard_error_advice(out, LEVEL)
    out["reading"] = read_evidence(out)
    out["caution"] = CAUTION
    return out


_UNCOMPUTABLE = "not computable: "


def _guarded(compute: Any, tests: Sequence[str], known: dict[str, dict]) -> dict[str, dict]:
    """``compute()`` with floating-point overflow and invalid operations raised, not warned.

    A test whose arithmetic overflows (or whose statistic is not finite) gets a
    null statistic and a note saying so, instead of a number computed from
    infinities; ``known`` holds the fields such a block keeps.
    """
    try:
        with np.errstate(over="raise", invalid="raise", divide="raise"):
            found = compute()
    except FloatingPointError as err:
        reason = f"{_UNCOMPUTABLE}floating-point {err} in its arithmetic"
        return {t: _uncomputable(reason, known.get(t, {})) for t in tests}
    for test in tests:
        statistic = found[test].get("statistic")
        if statistic is not None and not math.isfinite(statistic):
            found[test] = _uncomputable(f"{_UNCOMPUTABLE}its statistic came out {statistic}",
                                        found[test])
    return found


def _uncomputable(reason: str, block: dict[str, Any]) -> dict[str, Any]:
    note = (f"{reason} (values too extreme for float64 even after centring and scaling); "
            "rescale the variables and run again")
    return {**block, "statistic": None, "p_value": None, "note": note}


def uncomputable_tests(evidence: dict[str, Any]) -> dict[str, str]:
    """Test name -> note, for the tests :func:`collect_evidence` could not compute."""
    return {name: block["note"] for name, block in evidence.items()
            if isinstance(block, dict) and str(block.get("note") or "").startswith(_UNCOMPUTABLE)}
