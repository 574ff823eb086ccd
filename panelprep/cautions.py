"""Cautions about what the numbers of a run can and cannot be used for, with the run's numbers.

Each function returns plain sentences (none when nothing applies); ``prepare``
adds them to ``summary["cautions"]``, which the text log, the HTML page and
the JSON all show.  Nothing here changes a number: these say where a number
could mislead.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any, NamedTuple

import numpy as np

from panelprep._moments import ScaledMoments
from panelprep.components import VarianceComponents
from panelprep.index import PanelIndex
from panelprep.lags import Shift
from panelprep.words import plural

# methods whose s2_u comes from the entity means of within residuals (or the
# estimated entity effects), which also hold the effect of regressors the
# within regression cannot see
_WITHIN_BASED = ("amemiya", "nerlove")


def _theta_median(components: VarianceComponents) -> float:
    return float(np.median(components.theta_)) if len(components.theta_) else float("nan")


def time_invariant_cautions(
    components: VarianceComponents, sample: ScaledMoments, counts: np.ndarray,
    names: Sequence[str],
) -> list[str]:
    """Amemiya and Nerlove with regressors the within regression left out.

    Their s2_u is built from within residuals (Amemiya) or estimated entity
    effects (Nerlove), so the part of the response the left-out (time-
    invariant or collinear) regressors explain goes into s2_u; Swamy-Arora's
    between regression keeps those regressors.  Both estimates are given.
    """
    method, left_out = components.method, list(components.dropped_within_)
    if method not in _WITHIN_BASED or not left_out:
        return []
    # from the same scaled moments (``sample``, ``counts`` rows per entity): the dask
    # engine's added-up moments serve as well as the rows
    reference = VarianceComponents(method="swamy-arora").fit_sample(sample, counts,
                                                                    names=list(names))
    out = [
        (f"{method} with regressors left out of the within regression ({', '.join(left_out)}): "
        f"their effect on the response goes into s2_u. Here s2_u = "
        f"{components.sigma2_entity_:.6g} and median theta {_theta_median(components):.3f}, "
        f"against Swamy-Arora's s2_u = {reference.sigma2_entity_:.6g} and median theta "
        f"{_theta_median(reference):.3f}, whose between regression keeps them; prefer "
        "swamy-arora or wallace-hussain when time-invariant regressors matter.")
    ]
    if method == "nerlove":
        out.append(
            "nerlove's s2_u is the variance of the estimated entity effects, which absorb the "
            f"columns left out of the within regression ({', '.join(left_out)}): with columns "
            "collinear after demeaning, which one is left out changes the entity effects and so "
            "s2_u; name the column to keep in --x (leave the other out) or use another method."
        )
    return out


def lagged_response_cautions(shifts: Sequence[Shift], y: str, x: Sequence[str],
                             transforms: Sequence[str], counts: np.ndarray) -> list[str]:
    """A lag of the response among the regressors of a within, quasi or two-way file."""
    lags = [s.name for s in shifts if s.kind == "lag" and s.variable == y and s.name in x]
    files = [t for t in ("within", "quasi", "twoway") if t in transforms]
    if not lags or not files:
        return []
    median_t = float(np.median(counts)) if len(counts) else 0.0
    return [
        (f"{', '.join(lags)} (a lag of the response {y}) is a regressor in the {', '.join(files)} "
        f"file(s): within and random-effects slopes are then biased when T is short (the bias "
        f"of the within estimator with a lagged dependent variable is of order 1/T, Nickell "
        f"1981; here the median T is {median_t:g}). Consider first differences with "
        "instruments for the lag.")
    ]


def listwise_cautions(findings: Sequence[dict[str, Any]]) -> list[str]:
    """Which columns cause most of the listwise deletion."""
    found = next((f for f in findings if f["id"] == "values-missing"), None)
    if found is None:
        return []
    per_variable = found["details"].get("per_variable", {})
    only = found["details"].get("only_missing", {})
    worst = sorted((n for n in per_variable if per_variable[n]), key=lambda n: -per_variable[n])
    shown = ", ".join(f"{n} ({per_variable[n]:,} rows, {only.get(n, 0):,} missing nothing else)"
                      for n in worst[:3])
    return [(f"Listwise deletion removed {found['count']:,} row(s); most of them miss {shown}. "
            "Dropping or imputing those columns would keep more rows.")]


class PeriodsLost(NamedTuple):
    """Periods that had rows before listwise deletion and have none after it."""

    count: int
    labels: list[str]      # the first few of them
    data_first: str | None
    sample_first: str | None


_LOST_SHOWN = 5


def periods_lost(index: PanelIndex, before: np.ndarray, after: np.ndarray) -> PeriodsLost:
    """Which periods listwise deletion emptied (``before``, ``after``: row masks of ``index``)."""
    codes = index.period_codes
    had = np.unique(codes[before & (codes >= 0)])
    kept = np.unique(codes[after & (codes >= 0)])
    lost = np.setdiff1d(had, kept, assume_unique=True)
    firsts = index.period_labels([had[0], kept[0]]) if len(had) and len(kept) else [None, None]
    return PeriodsLost(len(lost), index.period_labels(lost[:_LOST_SHOWN]), *firsts)


def lag_period_cautions(shifts: Sequence[Shift], x: Sequence[str], y: str,
                        findings: Sequence[dict[str, Any]], lost: PeriodsLost) -> list[str]:
    """Periods lost because a lag or difference has no value in an entity's first periods."""
    found = next((f for f in findings if f["id"] == "values-missing"), None)
    per_variable = found["details"].get("per_variable", {}) if found else {}
    used = [s for s in shifts if s.kind in ("lag", "diff") and s.name in (*x, y)
            and per_variable.get(s.name)]
    if not used:
        return []
    parts = ", ".join(f"{s.name} (k = {s.k}: {plural(per_variable[s.name], 'row')} without a "
                      "value)" for s in used)
    said = (f"Lags and differences have no value in an entity's first k periods or after a "
            f"hole: {parts}; listwise deletion removed those rows")
    if not lost.count:
        return [f"{said}; no period lost all its rows."]
    shown = ", ".join(lost.labels) + (", ..." if lost.count > len(lost.labels) else "")
    return [(f"{said}, so {plural(lost.count, 'period')} ({shown}) "
             f"{'has' if lost.count == 1 else 'have'} no row left: the sample starts at "
             f"{lost.sample_first}, the data at {lost.data_first}.")]
