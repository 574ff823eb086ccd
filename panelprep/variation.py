"""The variation table: spread of each variable overall, between and within entities."""

from __future__ import annotations

import numpy as np

from panelprep._groups import compact_codes, group_counts, group_sums
from panelprep._scale import Scaling, scaled_group_means
from panelprep.index import PanelIndex


def variation_table(
    index: PanelIndex, values: np.ndarray, names: list[str], constant_rtol: float = 1e-9,
    shared: tuple[Scaling, np.ndarray] | None = None,
) -> dict[str, dict]:
    """Spread of each variable on a sample whose ``index`` has dense codes.

    With x_it the value, xbar_i the entity mean, xbar the overall mean, n
    rows and N entities:

    * ``sd_overall`` = sqrt(sum (x_it - xbar)^2 / (n - 1));
    * ``sd_between`` = SD of the N entity means, unweighted, ddof 1:
      sqrt(sum_i (xbar_i - mean_i xbar_i)^2 / (N - 1));
    * ``sd_within`` = sqrt(sum (x_it - xbar_i)^2 / (n - N)), the
      degrees-of-freedom corrected spread of deviations from entity means;
    * ``varying_share``: share of entities with at least two rows whose
      values are not constant;
    * ``time_invariant``: no entity with two or more rows varies;
      ``period_invariant``: no period with two or more rows varies.

    Every sum of squares is taken on the columns centred on their mean and
    scaled by a power of two (:func:`panelprep._scale.scaled_group_means`,
    whose result may be passed as ``shared`` when the caller has it), so
    shifting a variable by a constant changes only its mean, min and max,
    and scaling it scales the SDs, at any magnitude float64 holds.

    A group is constant when the root mean square deviation from its mean
    is at most ``constant_rtol`` times the variable's largest absolute
    deviation from its overall mean (a decision that shifting or scaling
    the variable does not change).  A statistic whose denominator is zero
    is None.
    """
    codes = index.entity_codes
    n, n_entities = values.shape[0], index.n_entities
    if n == 0:
        return {name: empty_row() for name in names}
    counts = group_counts(codes, n_entities)
    scaled, entity_means = shared if shared is not None else scaled_group_means(
        values, codes, counts)
    period, n_periods = compact_codes(index.period_codes, index.n_periods)
    period_counts = group_counts(period, n_periods)
    inv_period = 1.0 / np.maximum(period_counts, 1)
    multi = counts >= 2
    multi_period = period_counts >= 2
    # one column at a time, into two n-vectors reused: no (n, k) copy of the block
    col = np.empty(n)
    squares = np.empty(n)
    out: dict[str, dict] = {}
    for j, name in enumerate(names):
        raw = values[:, j]
        scaled.column(values, j, out=col)
        unit, centre = float(scaled.scale[j]), float(scaled.centre[j])
        means = entity_means[:, j]
        np.subtract(col, np.take(means, codes, out=squares), out=squares)
        np.square(squares, out=squares)
        entity_ss = group_sums(codes, squares, n_entities)
        period_means = group_sums(period, col, n_periods) * inv_period
        np.subtract(col, np.take(period_means, period, out=squares), out=squares)
        np.square(squares, out=squares)
        period_ss = group_sums(period, squares, n_periods)
        scale = max(float(np.abs(col, out=squares).max()), np.finfo(float).tiny)
        # the overall SD as ndarray.std(ddof=1) takes it, in the buffer
        np.subtract(col, col.mean(), out=squares)
        np.square(squares, out=squares)
        overall = float(np.sqrt(squares.sum() / (n - 1))) if n > 1 else None
        tol = (constant_rtol * scale) ** 2
        varying = entity_ss > tol * counts
        period_varying = period_ss > tol * period_counts
        out[name] = variation_row(
            n=n, n_entities=n_entities, centre=centre, unit=unit, level=float(col.mean()),
            sd=overall, sd_means=float(means.std(ddof=1)) if n_entities > 1 else None,
            within_ss=float(entity_ss.sum()), low=float(raw.min()), high=float(raw.max()),
            multi=int(multi.sum()), varying=int(varying[multi].sum()),
            period_varies=bool(period_varying[multi_period].any()),
            multi_period=bool(multi_period.any()))
    return out


def variation_row(n: int, n_entities: int, centre: float, unit: float, level: float,
                  sd: float | None, sd_means: float | None, within_ss: float, low: float,
                  high: float, multi: int, varying: int, period_varies: bool,
                  multi_period: bool) -> dict:
    """One row of the variation table from its sums, on the scaled column ``z``
    (``x = centre + unit * z``): ``level`` = mean of z, ``sd`` its SD (ddof 1),
    ``sd_means`` the SD of the entity means of z (ddof 1), ``within_ss`` the
    within sum of squares; ``multi`` entities with two rows or more, of which
    ``varying`` are not constant; ``period_varies`` when a period with two
    rows or more is not constant.  Shared by both engines."""
    return {
        "n": int(n),
        "mean": float(centre + unit * level),
        "sd_overall": _in_units(sd, unit) if sd is not None else None,
        "sd_between": _in_units(sd_means, unit) if sd_means is not None else None,
        "sd_within": (_in_units(np.sqrt(within_ss / (n - n_entities)), unit)
                      if n > n_entities else None),
        "min": low,
        "max": high,
        "varying_share": float(varying / multi) if multi else None,
        "time_invariant": bool(multi and not varying),
        "period_invariant": bool(multi_period and not period_varies),
    }


def pooled(parts: list[tuple[int, float, float]]) -> tuple[int, float, float]:
    """``(count, mean, sum of squared deviations)`` of the union of parts given the same way
    (the parallel update of Chan, Golub and LeVeque), without a pass over the rows again."""
    count, mean, m2 = 0, 0.0, 0.0
    for n_b, mean_b, m2_b in parts:
        if n_b == 0:
            continue
        total = count + n_b
        delta = mean_b - mean
        mean += delta * n_b / total
        m2 += m2_b + delta * delta * count * n_b / total
        count = total
    return count, mean, m2


def spread_part(values: np.ndarray) -> tuple[int, float, float]:
    """``(count, mean, sum of squared deviations)`` of a 1-D array, for :func:`pooled`."""
    if len(values) == 0:
        return 0, 0.0, 0.0
    mean = float(values.mean())
    return len(values), mean, float(np.sum((values - mean) ** 2))


def _in_units(scaled: float, unit: float) -> float | None:
    """An SD of the scaled column in the variable's units; None beyond float64 (near 1e308)."""
    with np.errstate(over="ignore"):
        value = float(scaled * unit)
    return value if np.isfinite(value) else None


def empty_row() -> dict:
    """The row of a variable on an empty sample: no statistic."""
    keys = ("mean", "sd_overall", "sd_between", "sd_within", "min", "max", "varying_share")
    return {"n": 0, **dict.fromkeys(keys), "time_invariant": False, "period_invariant": False}


def within_measures(row: dict) -> dict[str, float | None]:
    """The two within quantities of a variation row, each under its own name.

    * ``within_sd_ratio`` = sd_within / sd_overall, the ratio the
      ``var-thin-within`` check compares with ``Thresholds.low_within_ratio``;
    * ``within_variance_share`` = sd_within^2 / (sd_within^2 + sd_between^2),
      the share of the variance that lies within entities (between share =
      1 - within variance share).

    Each is None when an SD it needs is missing or its denominator is zero.
    The SDs come from centred, scaled columns (see ``variation_table``), so a
    constant column has exactly zero spread and no threshold on the level is
    needed; both quantities are computed on SDs divided by the larger one, so
    they neither overflow nor underflow at any magnitude.
    """
    within, between, overall = row.get("sd_within"), row.get("sd_between"), row.get("sd_overall")
    ratio = share = None
    if within is not None and overall is not None and overall > 0:
        ratio = within / overall
    if within is not None and between is not None:
        largest = max(within, between)
        if largest > 0:
            w, b = within / largest, between / largest
            share = min(max(w * w / (w * w + b * b), 0.0), 1.0)
    return {"within_sd_ratio": ratio, "within_variance_share": share}


def with_within_measures(table: dict[str, dict]) -> dict[str, dict]:
    """A variation table with ``within_measures`` added to every row (in place)."""
    for row in table.values():
        row.update(within_measures(row))
    return table
