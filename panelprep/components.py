"""Variance components of the one-way error-component model.

Model: ``y_it = a + x_it b + u_i + e_it`` with ``Var(u_i) = s2_u`` (entity
component) and ``Var(e_it) = s2_e`` (idiosyncratic component), n rows, N
entities with ``T_i`` rows each, K regressors (excluding the constant).

Notation used in every docstring below: ``Z`` the (n, N) entity dummies,
``ZZ'`` the entity block of ones, ``P = Z (Z'Z)^-1 Z'`` the entity-means
projector, ``Q = I - P`` the within projector, ``Omega = s2_u ZZ' + s2_e I``.

Four published estimators (Wallace & Hussain 1969, Amemiya 1971, Nerlove
1971, Swamy & Arora 1972), each in the unbalanced form of Baltagi & Chang
(1994, J. Econometrics 62): for a residual vector ``e = M v`` (``v`` the
composite error) and a symmetric ``A`` in {Q, P},

``E[e'Ae] = s2_u tr(M'AM ZZ') + s2_e tr(M'AM)``,

and the estimator equates the observed quadratic forms to these expectations.
Every trace reduces to small matrices built from ``X'X``, ``X'QX``,
``X'PX = sum_i T_i xbar_i xbar_i'`` and ``X'ZZ'X = sum_i T_i^2 xbar_i xbar_i'``
(entity sums by ``bincount``); no n x n matrix is ever formed.
"""

from __future__ import annotations

from collections.abc import Sequence
from functools import cached_property
from typing import Any

import numpy as np

from panelprep._groups import group_sums
from panelprep._linalg import OlsFit, ols, ols_from_r
from panelprep._moments import StandardSample, standard_sample
from panelprep.choices import COMPONENT_FINDING_IDS, METHODS
from panelprep.transforms import theta_per_entity, within
from panelprep.words import plural

# every finding id the estimators emit (a run file may set their severity)
FINDING_IDS = COMPONENT_FINDING_IDS

INTERCEPT = "(intercept)"

# Relative size below which a denominator or a 2x2 determinant counts as
# zero: a few hundred ulps of the terms it is made of.
_RELATIVE_ZERO = 1e-12

_MAX_EXAMPLES = 10


class _Moments:
    """Sample moments shared by all methods, read off the sample's :class:`EntityMoments`.

    The basis ``F = [1, X, QX]`` (1 + 2K columns) spans every residual-maker
    used here; ``gram_i``, ``gram_p``, ``gram_q``, ``gram_z`` are ``F'F``,
    ``F'PF``, ``F'QF`` and ``F'ZZ'F``.  Products with ``QX`` vanish under P
    and ZZ' because ``PQ = 0`` and ``ZZ'Q = 0``.  Swamy-Arora and Nerlove
    need only the entity sums and the within factor; the within block
    ``QX`` and the Gram matrices are built when a method asks for them.
    """

    def __init__(self, sample: StandardSample):
        entity = sample.moments
        self.sample = sample
        self.n = sample.n
        self.k = sample.k
        self.entity = entity
        self.codes = entity.codes
        self.counts = np.asarray(entity.counts, dtype=np.float64)
        self.present = self.counts > 0
        self.n_entities = int(np.count_nonzero(self.present))
        inv = np.zeros(len(self.counts))
        np.divide(1.0, self.counts, out=inv, where=self.present)
        self.inv = inv
        k = self.k
        self.sy = entity.means[:, k] * self.counts
        self.sx = entity.means[:, :k] * self.counts[:, None]
        self.x_norm = np.sqrt(entity.total_ss[:k])
        self.sum_x = self.sx.sum(axis=0)
        m = 1 + 2 * k
        self.basis_x = np.arange(1, 1 + k)
        self.basis_qx = np.arange(1 + k, m)
        self.n_basis = m

    @cached_property
    def grams(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """``(gram_i, gram_p, gram_q, gram_z)``, made when a method first asks."""
        k, n, X = self.k, float(self.n), self.sample.X
        t, inv, sum_x = self.counts, self.inv, self.sum_x
        qx = within(X, self.codes, self.counts) if k else np.zeros((self.n, 0), order="F")
        xx = X.T @ X
        xqx = qx.T @ qx
        xpx = self.sx.T @ (self.sx * inv[:, None])
        xzx = self.sx.T @ self.sx
        m = self.n_basis
        xs, qs = slice(1, 1 + k), slice(1 + k, m)

        def sym(mat: np.ndarray) -> np.ndarray:
            return (mat + mat.T) / 2.0

        gi = np.zeros((m, m))
        gi[0, 0] = n
        gi[0, xs] = gi[xs, 0] = sum_x
        gi[xs, xs] = xx
        gi[xs, qs] = gi[qs, xs] = gi[qs, qs] = xqx
        gp = np.zeros((m, m))
        gp[0, 0] = n
        gp[0, xs] = gp[xs, 0] = sum_x
        gp[xs, xs] = xpx
        gq = np.zeros((m, m))
        gq[xs, xs] = gq[xs, qs] = gq[qs, xs] = gq[qs, qs] = xqx
        gz = np.zeros((m, m))
        gz[0, 0] = float(t @ t)
        gz[0, xs] = gz[xs, 0] = t @ self.sx
        gz[xs, xs] = xzx
        return sym(gi), sym(gp), sym(gq), sym(gz)

    def entity_quadratic(self, e: np.ndarray) -> float:
        """``e'Pe = sum_i (sum_t e_it)^2 / T_i``."""
        s = group_sums(self.codes, e, len(self.counts))
        return float(s @ (s * self.inv))

    def within_quadratic(self, e: np.ndarray) -> float:
        """``e'Qe``, from the within deviations of ``e`` (no cancellation)."""
        d = within(e, self.codes, self.counts)
        return float(d @ d)

    def trace_coefficients(self, eu: np.ndarray, ev: np.ndarray) -> dict[str, float]:
        """Coefficients of ``E[e'Ae]`` for ``e = (I - U V') v``, ``U = F eu``, ``V = F ev``.

        ``tr(M'AMB) = tr(AB) - 2 tr(U'ABV) + tr(U'AU V'BV)`` (A, B symmetric and
        commuting), for A in {Q, P} and B in {I, ZZ'}; ``tr(Q) = n - N``,
        ``tr(P) = N``, ``tr(QZZ') = 0``, ``tr(PZZ') = n``.  Keys:
        ``q_e, q_u`` (A = Q: coefficients of s2_e and s2_u), ``p_e, p_u``.
        """
        n, big_n = float(self.n), float(self.n_entities)
        gram_i, gram_p, gram_q, gram_z = self.grams
        v_i = ev.T @ gram_i @ ev
        v_z = ev.T @ gram_z @ ev
        u_q = eu.T @ gram_q @ eu
        u_p = eu.T @ gram_p @ eu
        return {
            "q_e": (n - big_n) - 2 * np.trace(eu.T @ gram_q @ ev) + np.trace(u_q @ v_i),
            "q_u": np.trace(u_q @ v_z),
            "p_e": big_n - 2 * np.trace(eu.T @ gram_p @ ev) + np.trace(u_p @ v_i),
            "p_u": n - 2 * np.trace(eu.T @ gram_z @ ev) + np.trace(u_p @ v_z),
        }


# entries of ``dof_`` in the response's squared units (the rest are counts and traces)
_SQUARED_UNIT_DOF = ("ssr_within", "ssr_between", "e_Qe", "e_Pe")


def _in_units(value: float, unit: float) -> float:
    """A second moment of the scaled response back in the response's squared units."""
    with np.errstate(over="ignore", under="ignore"):
        return float(value * unit * unit)


def _finite(value):
    """``value``, or None where a float is infinite or NaN (JSON has neither)."""
    if isinstance(value, float) and not np.isfinite(value):
        return None
    return value


def _finding(fid: str, severity: str, message: str, regressors: Sequence[Any] = ()) -> dict:
    """A finding dict; ``examples`` name the regressors concerned, one dict each."""
    regressors = list(regressors)
    return {
        "id": fid,
        "severity": severity,
        "count": max(len(regressors), 1),
        "message": message,
        "examples": [{"regressor": str(r)} for r in regressors[:_MAX_EXAMPLES]],
    }


class VarianceComponents:
    """Estimate ``s2_u`` and ``s2_e`` of the one-way error-component model.

    Parameters
    ----------
    method : {"swamy-arora", "wallace-hussain", "amemiya", "nerlove"}
        Estimator; see the Notes.

    Attributes
    ----------
    sigma2_entity_ : float
        ``s2_u`` after truncation at 0.
    sigma2_idiosyncratic_ : float
        ``s2_e`` (truncated at 0 if the method's solve went negative).
    raw_sigma2_entity_ : float
        ``s2_u`` before truncation.
    sigma_entity_, sigma_idiosyncratic_ : float
        Square roots of the two components, always representable (a variance
        of a response near 1e200 overflows float64; its root does not; then
        ``sigma2_*_`` is infinite and a ``variance-beyond-float-range`` finding
        says so).
    entity_share_ : float
        ``s2_u / (s2_u + s2_e)`` (0 when both are 0).
    truncated_negative_ : bool
        The raw ``s2_u`` was negative and was set to 0.
    theta_ : ndarray (G,)
        Quasi-demeaning weights from :func:`panelprep.transforms.theta_per_entity`.
    scaled_components_ : tuple of float
        ``(s2_u, s2_e)`` in the scaled response's units, truncated as used for
        ``theta_``: the dask engine gives them to each partition, whose theta
        per entity is then the same numbers.
    dropped_within_, dropped_between_, dropped_pooled_ : list of str
        Regressors left out of the within, between and pooled (intercept
        included) auxiliary regressions for rank deficiency.  Only the
        regressions a method runs can drop anything.
    dof_ : dict
        Denominators and trace coefficients the method used.
    findings_ : list of dict
        ``{id, severity, count, message, examples}`` (examples are
        ``{"regressor": name}`` dicts for the dropped-regressor findings); ids
        ``entity-variance-negative``, ``idiosyncratic-variance-negative``,
        ``regressor-dropped-within``, ``regressor-dropped-between``,
        ``regressor-dropped-pooled``, ``components-underidentified``.

    Notes
    -----
    All moments are taken on ``y`` and ``X`` centred on their means and scaled
    by powers of two (:func:`panelprep._scale.standardise`): every estimator
    has an intercept or works within entities, so centring changes no
    estimate, and shifting or rescaling a column changes the components only
    through the response's units.

    With ``K_w`` the regressors kept in the within regression ``Qy`` on
    ``QX`` (residuals ``e_w``, coefficients ``b_w``) and ``N`` the number of
    entities:

    * **swamy-arora**: ``s2_e = e_w'e_w / (n - N - K_w)``.  Between
      regression: OLS of ``Py`` on ``P[1, X]`` over the n rows (entity means
      repeated ``T_i`` times; computed as OLS on N rows weighted by
      ``sqrt(T_i)``), residuals ``u_b``, ``K_b`` kept columns *including* the
      constant, ``W_b = [1, X_kept]``.  ``s2_u = (u_b'u_b - (N - K_b) s2_e) /
      (n - tr[(W_b'PW_b)^-1 W_b'ZZ'W_b])``.  Balanced (``T_i = T``): the
      denominator is ``T (N - K_b)`` and this is the textbook
      ``SSR_means / (N - K_b) - s2_e / T``.
    * **wallace-hussain**: ``e`` = pooled OLS residuals of y on [1, X]; the
      2x2 system ``e'Qe = c_Qu s2_u + c_Qe s2_e``, ``e'Pe = c_Pu s2_u + c_Pe
      s2_e`` with the exact expectations (``M = I - W (W'W)^-1 W'``).
    * **amemiya**: ``e = y - a_w - X b_w`` with ``a_w = ybar - xbar b_w``
      (within residuals with the overall intercept); same 2x2 system with
      ``M = J (I - X (X'QX)^-1 X'Q)``, ``J = I - 11'/n``.  Here ``c_Qu = 0``
      and ``c_Qe = n - N - K_w``.
    * **nerlove**: ``s2_e = e_w'e_w / n``; ``s2_u`` = sample variance (ddof 1,
      denominator ``N - 1``, unweighted over entities, also when unbalanced)
      of the estimated entity effects ``alpha_i = ybar_i - xbar_i b_w``.

    A negative raw ``s2_u`` is set to 0 (theta 0, pooled OLS).  When a
    component is not identified (no within degrees of freedom, fewer entities
    than between regressors + 1, a singular 2x2 system, N < 2 for nerlove)
    the affected component is set to 0, everything stays finite and a
    ``components-underidentified`` finding says what was done.
    """

    def __init__(self, method: str = "swamy-arora") -> None:
        self.method = method

    def fit(
        self,
        y: np.ndarray,
        X: np.ndarray | None,
        entity_codes: np.ndarray,
        counts: np.ndarray,
        names: Sequence[str] | None = None,
        sample: StandardSample | None = None,
    ) -> VarianceComponents:
        """Estimate the components on the estimation sample.

        Parameters
        ----------
        y : array (n,)
            Finite response.
        X : array (n, K) or None
            Finite regressors without the constant (None or K = 0: intercept
            only).
        entity_codes : int array (n,)
            Dense codes 0..G-1.
        counts : int array (G,)
            Rows per entity.
        names : sequence of str, optional
            Regressor names for the dropped lists; ``x0, x1, ...`` otherwise.
        sample : StandardSample, optional
            The same sample already standardised with its moments
            (``_moments.standard_sample``), shared with the evidence.

        Returns
        -------
        self
        """
        if self.method not in METHODS:
            raise ValueError(f"unknown method {self.method!r}; choose one of {METHODS}")
        y = np.asarray(y, dtype=np.float64)
        n = len(y)
        X = np.zeros((n, 0)) if X is None else np.asarray(X, dtype=np.float64)
        if X.ndim == 1:
            X = X[:, None]
        if X.shape[0] != n:
            raise ValueError(f"X has {X.shape[0]} rows, y has {n}")
        if n == 0:
            raise ValueError("no rows: variance components need an estimation sample")
        if not (np.isfinite(y).all() and np.isfinite(X).all()):
            raise ValueError("y and X must be finite (estimation sample only)")
        codes = np.asarray(entity_codes)
        counts = np.asarray(counts)
        # every moment on centred, power-of-two scaled columns: a regressor
        # around 1e9 (or 1e-300) gives the same components as the same one
        # around 0 (see _scale); s2 come back in the response's squared units
        if sample is None:
            sample = standard_sample(y, X, codes, counts)
        return self.fit_sample(sample, counts, names)

    def fit_sample(self, sample: StandardSample, counts: np.ndarray,
                   names: Sequence[str] | None = None) -> VarianceComponents:
        """Estimate the components from a sample's scaling and per-entity moments.

        ``sample`` needs only ``n``, ``k``, ``unit`` and ``moments`` for
        ``swamy-arora`` and ``nerlove``: the dask engine passes one whose
        moments are added up over partitions (``_moments.combined_moments``).
        The other methods read the scaled rows (``sample.X``).
        """
        n = sample.n
        if n == 0:
            raise ValueError("no rows: variance components need an estimation sample")
        counts = np.asarray(counts)
        labels = list(names) if names is not None else [f"x{j}" for j in range(sample.k)]
        if len(labels) != sample.k:
            raise ValueError(f"{len(labels)} names for {sample.k} regressors")
        unit = sample.unit
        mom = _Moments(sample)
        self.findings_: list[dict] = []
        self.dropped_within_: list[str] = []
        self.dropped_between_: list[str] = []
        self.dropped_pooled_: list[str] = []
        self.n_obs_ = n
        self.n_entities_ = mom.n_entities
        self.n_regressors_ = sample.k

        estimator = {
            "swamy-arora": self._swamy_arora,
            "wallace-hussain": self._wallace_hussain,
            "amemiya": self._amemiya,
            "nerlove": self._nerlove,
        }[self.method]
        s2u, s2e, dof = estimator(mom, labels)
        for key in _SQUARED_UNIT_DOF:
            if key in dof:
                dof[key] = _in_units(dof[key], unit)

        if s2e < 0:
            self.findings_.append(
                _finding(
                    "idiosyncratic-variance-negative",
                    "warning",
                    f"the {self.method} solve gave s2_e = {_in_units(s2e, unit):.6g} < 0; set to 0",
                )
            )
            s2e = 0.0
        self.raw_sigma2_entity_ = _in_units(s2u, unit)
        self.truncated_negative_ = bool(s2u < 0)
        if self.truncated_negative_:
            self.findings_.append(
                _finding(
                    "entity-variance-negative",
                    "warning",
                    f"estimated entity variance {self.raw_sigma2_entity_:.6g} is negative; set "
                    "to 0 (theta = 0: the random-effects transform is pooled OLS)",
                )
            )
        s2u = max(s2u, 0.0)
        # standard deviations always fit in float64; variances of a response
        # beyond about 1e154 (or below 1e-154) do not
        with np.errstate(over="ignore"):  # an SD beyond float64 is null in to_dict
            self.sigma_entity_ = float(np.sqrt(s2u) * unit)
            self.sigma_idiosyncratic_ = float(np.sqrt(s2e) * unit)
        self.sigma2_entity_ = _in_units(s2u, unit)
        self.sigma2_idiosyncratic_ = _in_units(s2e, unit)
        self.entity_share_ = float(s2u / (s2u + s2e)) if s2u + s2e > 0 else 0.0
        self._note_unrepresentable(s2u, s2e)
        self.dof_ = dof
        self._present = mom.present
        # theta is a ratio of the components: taken in the scaled units
        self.scaled_components_ = (s2u, s2e)
        self.theta_ = theta_per_entity(s2u, s2e, counts)
        return self

    def _note_unrepresentable(self, s2u: float, s2e: float) -> None:
        """A finding when a variance is positive but outside float64 in the response's units."""
        # below the smallest normal float a variance has lost digits, not only range
        smallest = np.finfo(float).tiny
        lost = [
            name
            for name, scaled, value in (
                ("s2_u", s2u, self.sigma2_entity_),
                ("s2_e", s2e, self.sigma2_idiosyncratic_),
            )
            if scaled > 0 and not (smallest <= value < np.inf)
        ]
        self._unrepresentable = set(lost)
        if lost:
            self.findings_.append(
                _finding(
                    "variance-beyond-float-range",
                    "info",
                    f"{' and '.join(lost)} in the response's squared units lie outside what "
                    f"float64 holds (entity SD {self.sigma_entity_:.6g}, idiosyncratic SD "
                    f"{self.sigma_idiosyncratic_:.6g}); theta and the transforms are exact, "
                    "the variances are reported as null: rescale the response to see them",
                )
            )

    def _within_fit(self, mom: _Moments, labels: list[str], note: str) -> OlsFit:
        """Within regression ``Qy`` on ``QX``, columns scaled by the raw ``X`` norms."""
        # from the within factor of [X, y]: the rank decisions of OLS on the n within rows
        fit = ols_from_r(mom.entity.r_within, mom.n, names=labels, scale=mom.x_norm)
        self.dropped_within_ = [str(d) for d in fit.dropped]
        if fit.dropped:
            self.findings_.append(
                _finding(
                    "regressor-dropped-within",
                    "warning",
                    f"{plural(len(fit.dropped), 'regressor')} with no within variation or collinear "
                    f"after the within transform, left out of the within regression{note}",
                    fit.dropped,
                )
            )
        return fit

    def _underidentified(self, message: str) -> None:
        self.findings_.append(_finding("components-underidentified", "error", message))

    def _swamy_arora(self, mom: _Moments, labels):
        n, big_n = mom.n, mom.n_entities
        fw = self._within_fit(mom, labels, "")
        df_w = n - big_n - fw.rank
        if df_w > 0:
            s2e = fw.ssr / df_w
        else:
            s2e = 0.0
            self._underidentified(
                f"no within degrees of freedom (n - N - K_w = {n} - {big_n} - {fw.rank} "
                f"= {df_w}); s2_e set to 0"
            )

        t = mom.counts[mom.present]
        root_t = np.sqrt(t)
        means = np.column_stack([np.ones(big_n), mom.sx[mom.present] / t[:, None]])
        ybar = mom.sy[mom.present] / t
        scale = np.concatenate([[np.sqrt(n)], mom.x_norm])
        fb = ols(root_t * ybar, means * root_t[:, None], names=[INTERCEPT, *labels], scale=scale)
        self.dropped_between_ = [str(d) for d in fb.dropped]
        if fb.dropped:
            self.findings_.append(
                _finding(
                    "regressor-dropped-between",
                    "warning",
                    f"{plural(len(fb.dropped), 'column')} collinear in the between regression on "
                    "entity means, left out of it",
                    fb.dropped,
                )
            )
        kept = means[:, fb.kept]
        df_b = big_n - fb.rank
        trace = float(np.trace(fb.xtx_inv @ (kept.T @ (kept * (t * t)[:, None])))) if fb.rank else 0.0
        denom = n - trace
        if df_b <= 0:
            s2u = 0.0
            self._underidentified(
                f"fewer entities than between regressors + 1 (N = {big_n}, K_b = {fb.rank}); "
                "s2_u set to 0"
            )
        elif denom <= _RELATIVE_ZERO * n:
            s2u = 0.0
            self._underidentified(
                f"between denominator n - tr(...) = {denom:.6g} is not positive; s2_u set to 0"
            )
        else:
            s2u = (fb.ssr - df_b * s2e) / denom
        dof = {
            "within_denominator": int(df_w),
            "kept_within": int(fw.rank),
            "between_residual_dof": int(df_b),
            "kept_between_with_intercept": int(fb.rank),
            "between_denominator": float(denom),
            "ssr_within": float(fw.ssr),
            "ssr_between": float(fb.ssr),
        }
        return s2u, s2e, dof

    def _solve_two(self, q_q: float, q_p: float, c: dict[str, float]):
        """Solve ``[q_Q, q_P] = [[c_Qu, c_Qe], [c_Pu, c_Pe]] [s2_u, s2_e]``."""
        det = c["q_u"] * c["p_e"] - c["q_e"] * c["p_u"]
        size = abs(c["q_u"] * c["p_e"]) + abs(c["q_e"] * c["p_u"])
        if size > 0 and abs(det) > _RELATIVE_ZERO * size:
            s2u = (q_q * c["p_e"] - c["q_e"] * q_p) / det
            s2e = (c["q_u"] * q_p - c["p_u"] * q_q) / det
            return s2u, s2e
        total = c["q_e"] + c["p_e"]
        s2e = (q_q + q_p) / total if total > 0 else 0.0
        self._underidentified(
            f"the {self.method} moment equations are singular (determinant {det:.6g}); "
            "s2_u set to 0 and s2_e = (e'Qe + e'Pe) / (c_Qe + c_Pe)"
        )
        return 0.0, s2e

    def _wallace_hussain(self, mom: _Moments, labels):
        n, y, X = mom.n, mom.sample.y, mom.sample.X
        design = np.empty((n, 1 + mom.k), order="F")
        design[:, 0] = 1.0
        design[:, 1:] = X
        scale = np.concatenate([[np.sqrt(n)], mom.x_norm])
        fp = ols(y, design, names=[INTERCEPT, *labels], scale=scale)
        self.dropped_pooled_ = [str(d) for d in fp.dropped]
        if fp.dropped:
            self.findings_.append(
                _finding(
                    "regressor-dropped-pooled",
                    "warning",
                    f"{plural(len(fp.dropped), 'column')} collinear in the pooled regression, left out",
                    fp.dropped,
                )
            )
        basis = np.concatenate([[0], mom.basis_x])[fp.kept]
        eu = np.zeros((mom.n_basis, len(basis)))
        eu[basis, np.arange(len(basis))] = 1.0
        ev = eu @ fp.xtx_inv
        c = mom.trace_coefficients(eu, ev)
        q_q = mom.within_quadratic(fp.resid)
        q_p = mom.entity_quadratic(fp.resid)
        s2u, s2e = self._solve_two(q_q, q_p, c)
        dof = {
            "kept_pooled_with_intercept": int(fp.rank),
            "e_Qe": q_q,
            "e_Pe": q_p,
            **{f"c_{key}": float(val) for key, val in c.items()},
        }
        return s2u, s2e, dof

    def _amemiya(self, mom: _Moments, labels):
        n, y, X = mom.n, mom.sample.y, mom.sample.X
        fw = self._within_fit(
            mom, labels, "; its effect stays in the residual entity means, so s2_u includes it"
        )
        b = fw.coef
        a = (float(mom.sy.sum()) - float(mom.sum_x @ b)) / n
        e = y - a - (X @ b if mom.k else 0.0)
        kept = np.flatnonzero(fw.kept)
        r = len(kept)
        s = fw.xtx_inv
        eu = np.zeros((mom.n_basis, 1 + r))
        eu[0, 0] = 1.0
        eu[mom.basis_x[kept], 1 + np.arange(r)] = 1.0
        ev = np.zeros((mom.n_basis, 1 + r))
        ev[0, 0] = 1.0 / n
        if r:
            ev[mom.basis_qx[kept], 0] = -(s @ mom.sum_x[kept]) / n
            ev[np.ix_(mom.basis_qx[kept], 1 + np.arange(r))] = s
        c = mom.trace_coefficients(eu, ev)
        q_q = fw.ssr
        q_p = mom.entity_quadratic(e)
        if c["q_e"] <= 0:
            self._underidentified(
                f"no within degrees of freedom (n - N - K_w = {n - mom.n_entities - r}); "
                "s2_e set to 0"
            )
            s2e = 0.0
            s2u = (q_p - c["p_e"] * s2e) / c["p_u"] if c["p_u"] > 0 else 0.0
        else:
            s2u, s2e = self._solve_two(q_q, q_p, c)
        dof = {
            "kept_within": int(r),
            "within_denominator": int(n - mom.n_entities - r),
            "e_Qe": float(q_q),
            "e_Pe": float(q_p),
            **{f"c_{key}": float(val) for key, val in c.items()},
        }
        return s2u, s2e, dof

    def _nerlove(self, mom: _Moments, labels):
        n, big_n = mom.n, mom.n_entities
        fw = self._within_fit(
            mom, labels, "; its effect stays in the estimated entity effects, so s2_u includes it"
        )
        t = mom.counts[mom.present]
        alpha = (mom.sy[mom.present] - mom.sx[mom.present] @ fw.coef) / t
        s2e = fw.ssr / n
        if big_n >= 2:
            s2u = float(np.var(alpha, ddof=1))
        else:
            s2u = 0.0
            self._underidentified("fewer than 2 entities: entity effects have no variance; s2_u set to 0")
        dof = {
            "idiosyncratic_denominator": int(n),
            "entity_denominator": int(big_n - 1),
            "kept_within": int(fw.rank),
        }
        return s2u, s2e, dof

    def to_dict(self) -> dict[str, Any]:
        """Plain summary of the fitted components (JSON-serialisable)."""
        lost = self._unrepresentable
        s2u = None if "s2_u" in lost else _finite(self.sigma2_entity_)
        s2e = None if "s2_e" in lost else _finite(self.sigma2_idiosyncratic_)
        theta = self.theta_[self._present]
        return {
            "method": self.method,
            "n_obs": int(self.n_obs_),
            "n_entities": int(self.n_entities_),
            "n_regressors": int(self.n_regressors_),
            "sigma2_entity": s2u,
            "sigma2_idiosyncratic": s2e,
            "sigma_entity": _finite(self.sigma_entity_),
            "sigma_idiosyncratic": _finite(self.sigma_idiosyncratic_),
            "entity_share": self.entity_share_,
            "theta": {
                "min": float(theta.min()) if theta.size else 0.0,
                "median": float(np.median(theta)) if theta.size else 0.0,
                "max": float(theta.max()) if theta.size else 0.0,
                # the spread of the weight over entities (numpy's linear quantiles)
                **{f"p{q}": float(np.quantile(theta, q / 100)) if theta.size else 0.0
                   for q in (10, 25, 75, 90)},
            },
            "truncated_negative": self.truncated_negative_,
            "raw_sigma2_entity": _finite(self.raw_sigma2_entity_),
            "dropped_within": list(self.dropped_within_),
            "dropped_between": list(self.dropped_between_),
            "dropped_pooled": list(self.dropped_pooled_),
            "dof": {key: _finite(value) for key, value in self.dof_.items()},
            "findings": [dict(f) for f in self.findings_],
        }


def estimate_components(
    y: np.ndarray,
    X: np.ndarray | None,
    entity_codes: np.ndarray,
    counts: np.ndarray,
    method: str = "swamy-arora",
    names: Sequence[str] | None = None,
) -> VarianceComponents:
    """Fit :class:`VarianceComponents` with ``method`` and return it."""
    return VarianceComponents(method=method).fit(y, X, entity_codes, counts, names=names)
