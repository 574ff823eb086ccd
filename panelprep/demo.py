"""An invented panel of manufacturing firms with known, planted defects.

Demo data: invented, no real firms.  The scenario is a few hundred fictional
manufacturers observed yearly, some entering late and some leaving early, with
a firm effect that drives both capital and sales (so pooled, random- and
fixed-effects estimates of the capital elasticity disagree).  On top of the
clean panel a handful of defects are planted, each on its own set of firms so
that their counts do not interact and can be recovered exactly.

Everything that grows with the number of firms or rows is a numpy array
operation; the only Python loops are over the few defect kinds.
"""

from __future__ import annotations

from os import PathLike
from pathlib import Path

import numpy as np
import pandas as pd

DEFAULT_SEED = 20261202

# Invented four-digit industry codes for the scenario, not any official classification.
_INDUSTRIES = np.array([1104, 1322, 2016, 2231, 2418, 2593, 2714, 2826, 2917], dtype=np.int64)

# Share of firms that carry each planted defect (at least one firm each).
_SHARES = {
    "gap": 0.04,
    "lookalike": 0.02,
    "missing": 0.05,
    "duplicate": 0.03,
    "conflict": 0.02,
    "singleton": 0.02,
    "short_missing": 0.01,
}

# Generating model, on logs: elasticities of sales and how strongly the firm
# effect loads on capital (the source of the random- vs fixed-effects gap).
_ELASTICITY_CAPITAL = 0.30
_ELASTICITY_STAFF = 0.60
_EFFECT_ON_CAPITAL = 0.9

_VARIABLES = ("sales", "capital", "staff")
_MIN_YEARS = 8
_MIN_FIRMS = 50


def make_demo_panel(
    seed: int = DEFAULT_SEED, n_firms: int = 300, years: tuple = (2005, 2024)
) -> tuple[pd.DataFrame, dict]:
    """Build the invented firm panel and report the defects planted in it.

    Demo data: invented, no real firms.

    Parameters
    ----------
    seed : int
        Seed for ``numpy.random.default_rng``; the same seed gives the same panel.
    n_firms : int
        Number of fictional firms (at least 50, so every defect kind gets its own firms).
    years : tuple of int
        First and last calendar year, inclusive (at least 8 years).

    Returns
    -------
    frame : pandas.DataFrame
        Columns ``firm_id`` (text such as ``'F00042'``; a few rows carry a
        look-alike spelling), ``year`` (int), ``industry`` (int code, fixed per
        firm), ``founded`` (int year, fixed per firm), ``sales`` and
        ``capital`` (float, millions, three decimals) and ``staff`` (float,
        full-time equivalents, one decimal).  Rows are sorted by firm and year;
        a planted copy follows the row it copies.
    planted : dict
        Exact counts of what was planted, JSON-serialisable.  Counts on the
        *estimation sample* follow the audit convention: complete key, exact
        duplicate rows collapsed, all of sales/capital/staff present, ids taken
        as written.

        ``rows``, ``firms``, ``entities_as_written`` (firms plus one per
        look-alike spelling), ``years``, ``balanced`` (always False),
        ``entered_late`` / ``exited_early`` (firms whose first / last year is
        inside the range), ``exact_duplicate_rows`` (extra copies; a row
        written three times counts two), ``conflicting_duplicate_keys``
        (firm-years on two rows whose sales differ), ``lookalike_groups``
        (firms also written with surrounding spaces or in lower case, always
        for their last two years), ``lookalike_rows``, ``gap_firms`` and
        ``gap_periods`` (interior years removed, one run of 1-3 years per
        firm, counted on all rows), ``singleton_firms`` (firms with a single
        year), ``missing_cells`` ({variable: count}; one empty cell per row),
        ``listwise_rows_removed``, ``listwise_new_singletons`` (two-year firms
        that lose one year), ``entities_with_gaps`` and ``singleton_entities``
        (on the estimation sample), ``firms_by_defect`` ({kind: sorted
        canonical ids}) and ``model`` (the generating elasticities).

    Raises
    ------
    ValueError
        If ``n_firms`` or the year range is too small to plant every defect.
    """
    first, last = int(years[0]), int(years[1])
    n_years = last - first + 1
    if n_years < _MIN_YEARS:
        raise ValueError(f"years {years} span {n_years} years; the demo needs at least {_MIN_YEARS}")
    if n_firms < _MIN_FIRMS:
        raise ValueError(f"n_firms={n_firms}; the demo needs at least {_MIN_FIRMS} firms")
    rng = np.random.default_rng(seed)
    n = int(n_firms)

    # Entry and exit: late entrants still have six or more years of room.
    late = rng.random(n) < 0.35
    entry = np.where(late, rng.integers(1, n_years - 5, n), 0)
    room = n_years - entry
    leaves = rng.random(n) < 0.30
    life = np.where(leaves, rng.integers(3, room + 1), room)

    roles = _assign_roles(rng, life, n)
    life[roles["singleton"]] = 1
    life[roles["short_missing"]] = 2

    industry = rng.choice(_INDUSTRIES, n)
    age_at_entry = np.where(late, rng.integers(0, 4, n), rng.integers(2, 60, n))
    founded = first + entry - age_at_entry
    effect = rng.normal(0.0, 0.5, n)
    industry_shift = rng.normal(0.0, 0.3, len(_INDUSTRIES))[np.searchsorted(_INDUSTRIES, industry)]

    # Expand firms to rows without a per-firm loop.
    firm = np.repeat(np.arange(n), life)
    start = np.cumsum(life) - life
    pos = np.arange(len(firm)) - start[firm]
    year = first + entry[firm] + pos
    sales, capital, staff = _firm_values(rng, firm, start, year - first, effect, industry_shift)
    values = {"sales": sales, "capital": capital, "staff": staff}

    canonical = np.char.add("F", np.char.zfill(np.arange(1, n + 1).astype(str), 5))
    firm_id = canonical[firm].astype(object)

    # Interior gaps: drop one run of 1-3 years strictly inside the firm's span.
    gap_len = np.zeros(n, dtype=np.int64)
    gap_start = np.zeros(n, dtype=np.int64)
    g = roles["gap"]
    gap_len[g] = rng.integers(1, 4, len(g))
    gap_start[g] = rng.integers(1, life[g] - gap_len[g])
    keep = ~((pos >= gap_start[firm]) & (pos < gap_start[firm] + gap_len[firm]))

    # Look-alike ids on each chosen firm's last two years.
    lk = roles["lookalike"]
    kind = rng.integers(0, 4, len(lk))
    base = canonical[lk]
    spelled = np.where(
        kind == 0,
        np.char.add(" ", base),
        np.where(
            kind == 1,
            np.char.add(base, " "),
            np.where(kind == 2, np.char.add(np.char.add(" ", base), " "), np.char.lower(base)),
        ),
    )
    variant = np.full(n, -1, dtype=np.int64)
    variant[lk] = np.arange(len(lk))
    relabel = (variant[firm] >= 0) & (pos >= life[firm] - 2)
    firm_id[relabel] = spelled[variant[firm[relabel]]]

    # Missing cells: one cell on one row of each chosen firm.
    interior_missing = 0
    missing_cells = dict.fromkeys(_VARIABLES, 0)
    for group in ("missing", "short_missing"):
        m = roles[group]
        where = rng.integers(0, life[m])
        column = rng.integers(0, len(_VARIABLES), len(m))
        rows = start[m] + where
        for j, name in enumerate(_VARIABLES):
            values[name][rows[column == j]] = np.nan
            missing_cells[name] += int((column == j).sum())
        interior_missing += int(((where > 0) & (where < life[m] - 1)).sum())

    # Exact copies (one or two) and conflicting copies (sales off by 3-20 %).
    d = roles["duplicate"]
    copies = rng.integers(1, 3, len(d))
    dup_rows = np.repeat(start[d] + rng.integers(0, life[d]), copies)
    c = roles["conflict"]
    conf_rows = start[c] + rng.integers(0, life[c])
    factor = 1.0 + rng.choice([-1.0, 1.0], len(c)) * rng.uniform(0.03, 0.20, len(c))

    take = np.concatenate([np.flatnonzero(keep), dup_rows, conf_rows])
    out_sales = values["sales"][take]
    out_sales[len(take) - len(c):] = np.round(out_sales[len(take) - len(c):] * factor, 3)
    tag = np.concatenate([np.zeros(int(keep.sum()), np.int64), np.ones(len(dup_rows), np.int64),
                          np.full(len(conf_rows), 2, np.int64)])
    order = np.lexsort((tag, year[take], firm[take]))
    take, out_sales = take[order], out_sales[order]

    frame = pd.DataFrame(
        {
            "firm_id": firm_id[take],
            "year": year[take].astype(np.int64),
            "industry": industry[firm[take]].astype(np.int64),
            "founded": founded[firm[take]].astype(np.int64),
            "sales": out_sales,
            "capital": values["capital"][take],
            "staff": values["staff"][take],
        }
    )

    n_short = len(roles["short_missing"])
    planted = {
        "seed": int(seed),
        "years": [first, last],
        "rows": len(frame),
        "firms": n,
        "entities_as_written": n + len(lk),
        "balanced": False,
        "entered_late": int((entry > 0).sum()),
        "exited_early": int((entry + life < n_years).sum()),
        "exact_duplicate_rows": int(copies.sum()),
        "conflicting_duplicate_keys": len(c),
        "lookalike_groups": len(lk),
        "lookalike_rows": int(relabel.sum()),
        "gap_firms": len(g),
        "gap_periods": int(gap_len.sum()),
        "singleton_firms": len(roles["singleton"]),
        "missing_cells": missing_cells,
        "listwise_rows_removed": len(roles["missing"]) + n_short,
        "listwise_new_singletons": n_short,
        "entities_with_gaps": len(g) + interior_missing,
        "singleton_entities": len(roles["singleton"]) + n_short,
        "firms_by_defect": {k: sorted(canonical[v].tolist()) for k, v in roles.items()},
        "model": {
            "elasticity_capital": _ELASTICITY_CAPITAL,
            "elasticity_staff": _ELASTICITY_STAFF,
            "firm_effect_on_log_capital": _EFFECT_ON_CAPITAL,
        },
    }
    return frame, planted


def write_demo_csv(
    path: str | PathLike[str],
    seed: int = DEFAULT_SEED,
    n_firms: int = 300,
    years: tuple = (2005, 2024),
) -> dict:
    """Write the invented demo panel to ``path`` as CSV and return what was planted.

    Demo data: invented, no real firms.  Floats are written with ``repr``
    precision (shortest text that reads back to the same float), missing
    cells as empty fields, lines ending in ``\\n``; ids are text, so their
    zero padding and any surrounding spaces are written as they are.  The
    same arguments give byte-identical files.

    Parameters
    ----------
    path : str or path-like
        Destination file; overwritten.
    seed, n_firms, years
        As for ``make_demo_panel``.

    Returns
    -------
    dict
        The ``planted`` dictionary of ``make_demo_panel``.
    """
    frame, planted = make_demo_panel(seed=seed, n_firms=n_firms, years=years)
    frame.to_csv(path, index=False, lineterminator="\n", float_format=lambda x: repr(float(x)))
    return planted


# Share of firms carrying each planted change between the two demo vintages.
_VINTAGE_SHARES = {"restated": 0.06, "rekeyed": 0.01, "unit": 0.01, "gone": 0.01}
_VINTAGE_RESTATED_YEAR = 2021


def make_demo_vintages(seed: int = DEFAULT_SEED, n_firms: int = 300) -> tuple[pd.DataFrame,
                                                                                pd.DataFrame, dict]:
    """Two deliveries of the invented firm panel, the later one revised: a pair to compare.

    Demo data: invented, no real firms.  The previous vintage covers
    2005-2023: the demo panel of ``make_demo_panel`` with its ids trimmed and
    case-folded and one row per firm-year (the first), so that every
    difference below is one of the planted ones.  The current vintage, built
    from it, plants on separate firms:

    * ``restated``: sales of the restated year (2021) revised by 2-8 %;
    * ``rekeyed``: firms delivered under a new id (``F9`` + the old number);
    * ``unit``: firms whose capital is now in thousands (the old value x 1000);
    * ``gone``: firms left out entirely (firms observed in 2005 alone are
      gone too);
    * 2005 (the first year) left out, 2024 added for the firms observed in
      2023 (and not gone), values grown 3 %;
    * ``now_missing``: one sales value withheld on five further firms;
      ``filled_in``: every missing value of the previous vintage delivered.

    Returns
    -------
    old, new : pandas.DataFrame
        Columns ``firm_id``, ``year``, ``industry``, ``founded``, ``sales``,
        ``capital``, ``staff``.
    planted : dict
        Exact counts of each planted change, with the firms of each kind, as
        the comparison should find them: ``rows_removed``, ``rows_added``,
        ``entities_gone``, ``entities_new``, ``restated`` ({variable: cells},
        unit changes included), ``unit_change_cells``, ``rekeyed`` (pairs of
        ids), ``unit_firms``, ``became_missing``, ``filled_in``,
        ``periods_gone``, ``periods_new``.
    """
    panel, _ = make_demo_panel(seed=seed, n_firms=n_firms, years=(2005, 2023))
    old = panel.assign(firm_id=panel["firm_id"].str.strip().str.upper())
    old = old.drop_duplicates(["firm_id", "year"], keep="first").reset_index(drop=True)
    variables = list(_VARIABLES)
    rng = np.random.default_rng(seed + 1)
    per_firm = old.groupby("firm_id").agg(first=("year", "min"), last=("year", "max"),
                                          rows=("year", "size"))
    holes = old[variables].isna().any(axis=1).groupby(old["firm_id"]).any()
    # the changes go to firms observed through 2023 from 2019 or before, with no missing value
    eligible = per_firm[(per_firm["first"] <= 2019) & (per_firm["last"] == 2023)
                        & (per_firm["rows"] >= 4) & ~holes].index.to_numpy()
    eligible = rng.permutation(np.sort(eligible))
    n = old["firm_id"].nunique()
    roles, start = {}, 0
    for kind in (*_VINTAGE_SHARES, "now_missing"):
        size = max(1, round(_VINTAGE_SHARES[kind] * n)) if kind in _VINTAGE_SHARES else 5
        roles[kind] = np.sort(eligible[start:start + size])
        start += size

    new = old.copy()
    missing_before = old[variables].isna()
    for name in variables:
        new.loc[missing_before[name].to_numpy(), name] = np.round(old[name].mean(), 3)
    revise = new["firm_id"].isin(roles["restated"]) & (new["year"] == _VINTAGE_RESTATED_YEAR)
    factor = 1 + rng.choice([-1.0, 1.0], int(revise.sum())) * rng.uniform(
        0.02, 0.08, int(revise.sum()))
    new.loc[revise, "sales"] = np.round(new.loc[revise, "sales"] * factor, 3)
    unit = new["firm_id"].isin(roles["unit"])
    new.loc[unit, "capital"] = new.loc[unit, "capital"] * 1000
    withheld = new["firm_id"].isin(roles["now_missing"]) & (new["year"] == 2022)
    new.loc[withheld, "sales"] = np.nan
    rekey = new["firm_id"].isin(roles["rekeyed"])
    new.loc[rekey, "firm_id"] = "F9" + new.loc[rekey, "firm_id"].str[1:]
    new = new[~new["firm_id"].isin(roles["gone"]) & (new["year"] != 2005)]
    later = new[new["year"] == 2023].assign(year=2024)
    for name in ("sales", "capital"):
        later[name] = np.round(later[name] * 1.03, 3)
    new = pd.concat([new, later], ignore_index=True)
    new = new.sort_values(["firm_id", "year"], kind="stable").reset_index(drop=True)

    after_first = old["year"] != 2005
    moved = old["firm_id"].isin([*roles["gone"], *roles["rekeyed"]])
    # rows of re-keyed firms are removed under the old id and added under the new one
    rekeyed_rows = int((old["firm_id"].isin(roles["rekeyed"]) & after_first).sum())
    unit_cells = int((old["firm_id"].isin(roles["unit"]) & after_first).sum())
    planted = {
        "periods_gone": ["2005"],
        "periods_new": ["2024"],
        "rows_removed": int((~after_first).sum() + (moved & after_first).sum()),
        "rows_added": len(later) + rekeyed_rows,
        # gone: the left-out and re-keyed firms, and those observed in 2005 alone
        "entities_gone": (len(roles["gone"]) + len(roles["rekeyed"])
                          + int((per_firm["last"] == 2005).sum())),
        "entities_new": len(roles["rekeyed"]),
        "restated": {"sales": int(revise.sum()), "capital": unit_cells, "staff": 0},
        "unit_change_cells": unit_cells,
        "unit_firms": roles["unit"].tolist(),
        "rekeyed": [[f, "F9" + f[1:]] for f in roles["rekeyed"].tolist()],
        "gone_firms": roles["gone"].tolist(),
        "became_missing": {"sales": int(withheld.sum()), "capital": 0, "staff": 0},
        # the role firms have no missing value, so every earlier gap after 2005 is filled
        "filled_in": {name: int((missing_before[name] & after_first).sum())
                      for name in variables},
    }
    return old, new, planted


def write_demo_vintages(folder: str | Path, seed: int = DEFAULT_SEED,
                        n_firms: int = 300) -> dict:
    """Write the two demo vintages as ``firms_2023.csv`` (previous) and ``firms_2024.csv``.

    Demo data: invented, no real firms.  Returns ``planted`` of ``make_demo_vintages``.
    """
    old, new, planted = make_demo_vintages(seed=seed, n_firms=n_firms)
    folder = Path(folder)
    for name, frame in (("firms_2023.csv", old), ("firms_2024.csv", new)):
        frame.to_csv(folder / name, index=False, lineterminator="\n",
                     float_format=lambda x: repr(float(x)))
    return planted


def _assign_roles(rng: np.random.Generator, life: np.ndarray, n: int) -> dict[str, np.ndarray]:
    """Disjoint sets of firms for each defect kind.

    Gaps and look-alikes need six or more years of life (a run of up to three
    interior years, or two relabelled years with more left over), so the
    multi-year kinds are drawn from long-lived firms; singletons and the
    two-year firms are drawn from the rest and have their lives cut.
    """
    counts = {k: max(1, round(share * n)) for k, share in _SHARES.items()}
    long_kinds = ("gap", "lookalike", "missing", "duplicate", "conflict")
    short_kinds = ("singleton", "short_missing")
    long_firms = rng.permutation(np.flatnonzero(life >= 6))
    need = sum(counts[k] for k in long_kinds)
    if len(long_firms) < need or n - need < sum(counts[k] for k in short_kinds):
        raise ValueError(f"{n} firms are too few to plant every defect on separate firms")
    roles: dict[str, np.ndarray] = {}
    cut = np.cumsum([0] + [counts[k] for k in long_kinds])
    for k, lo, hi in zip(long_kinds, cut[:-1], cut[1:]):
        roles[k] = np.sort(long_firms[lo:hi])
    rest = rng.permutation(np.setdiff1d(np.arange(n), long_firms[:need]))
    cut = np.cumsum([0] + [counts[k] for k in short_kinds])
    for k, lo, hi in zip(short_kinds, cut[:-1], cut[1:]):
        roles[k] = np.sort(rest[lo:hi])
    return roles


def _firm_values(
    rng: np.random.Generator,
    firm: np.ndarray,
    start: np.ndarray,
    t: np.ndarray,
    effect: np.ndarray,
    industry_shift: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Sales, capital and staff per row from a log-linear model with a firm effect.

    Capital follows a per-firm random walk (a cumulative sum restarted at each
    firm's first row), so it has real within variation; the firm effect loads
    on capital, staff and sales alike, which is what makes the firm effect
    correlated with the regressors.
    """
    n_rows = len(firm)
    shock = rng.normal(0.0, 0.08, n_rows)
    walk = np.cumsum(shock)
    walk -= (walk[start] - shock[start])[firm]
    cycle = rng.normal(0.0, 0.04, int(t.max()) + 1)
    log_k = (2.0 + _EFFECT_ON_CAPITAL * effect[firm] + industry_shift[firm] + 0.02 * t + walk
             + rng.normal(0.0, 0.10, n_rows))
    log_l = 4.2 + 0.5 * effect[firm] + 0.4 * (log_k - 2.0) + rng.normal(0.0, 0.10, n_rows)
    log_y = (-0.9 + _ELASTICITY_CAPITAL * log_k + _ELASTICITY_STAFF * log_l + effect[firm]
             + cycle[t] + rng.normal(0.0, 0.12, n_rows))
    return np.round(np.exp(log_y), 3), np.round(np.exp(log_k), 3), np.round(np.exp(log_l), 1)


def run_demo(folder: str | Path, force: bool = False, progress=None):
    """Write the demo data and run file into ``folder`` and run the preparation.

    Returns ``(preparation, planted)`` where ``planted`` counts the defects
    planted in the invented data.  Outputs go to ``folder/out``; two
    deliveries of the panel to compare (``write_demo_vintages``) go to
    ``folder/vintages``.
    """
    from importlib import resources

    from panelprep.config import load_run_file
    from panelprep.errors import InputError
    from panelprep.prepare import run_from_file

    folder = Path(folder)
    if folder.exists() and not folder.is_dir():
        raise InputError(f"{folder}: exists and is not a folder")
    if folder.exists() and any(folder.iterdir()) and not force:
        raise InputError(f"{folder}: folder exists and is not empty (use --force to redo the demo)")
    folder.mkdir(parents=True, exist_ok=True)
    planted = write_demo_csv(folder / "firms.csv")
    (folder / "vintages").mkdir(exist_ok=True)
    write_demo_vintages(folder / "vintages")
    run_text = resources.files("panelprep").joinpath("data/demo_run.toml").read_text("utf-8")
    (folder / "run.toml").write_text(run_text, encoding="utf-8")
    run = load_run_file(folder / "run.toml", {"output.force": True if force else None})
    kwargs = {} if progress is None else {"progress": progress}
    return run_from_file(run, **kwargs), planted
