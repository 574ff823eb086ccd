"""Shared fixtures: the Grunfeld investment panel and random unbalanced panels."""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pytest

# Property tests keep their example counts small so CI stays quick;
# PANELPREP_FUZZ_SCALE=50 multiplies every count for a longer local fuzz.
FUZZ_SCALE = max(1, int(os.environ.get("PANELPREP_FUZZ_SCALE", "1")))


def examples(count: int) -> int:
    """A property test's example count, scaled for a longer local fuzz."""
    return count * FUZZ_SCALE


@pytest.fixture(scope="session")
def grunfeld() -> pd.DataFrame:
    """Grunfeld investment data as shipped with statsmodels, without 'American Steel'.

    10 firms x 20 years (1935-1954); columns invest, value, capital, firm, year.
    This is the 10-firm version used in the textbook worked examples.
    """
    from statsmodels.datasets import grunfeld as source

    frame = source.load_pandas().data
    frame = frame[frame["firm"] != "American Steel"].reset_index(drop=True)
    frame["year"] = frame["year"].astype(np.int64)
    return frame


@dataclass(frozen=True)
class Panel:
    """A generated panel: dense codes, counts and the regressor block."""

    entity: np.ndarray
    period: np.ndarray
    counts: np.ndarray
    n_entities: int
    n_periods: int
    X: np.ndarray

    @property
    def n(self) -> int:
        return len(self.entity)


def random_unbalanced_panel(
    seed: int,
    n_entities: int = 25,
    n_periods: int = 9,
    keep: float = 0.6,
    k: int = 2,
    singletons: int = 3,
) -> Panel:
    """Unbalanced panel with gaps, varying T_i and some single-row entities.

    Each entity keeps a random subset of the periods (probability ``keep``,
    at least one row); the last ``singletons`` entities keep exactly one row.
    Rows are shuffled so nothing relies on sorted input.
    """
    rng = np.random.default_rng(seed)
    entity = np.repeat(np.arange(n_entities), n_periods)
    period = np.tile(np.arange(n_periods), n_entities)
    mask = rng.random(len(entity)) < keep
    first = np.arange(n_entities) * n_periods + rng.integers(0, n_periods, n_entities)
    mask[first] = True
    lone = entity >= n_entities - singletons
    mask[lone] = False
    mask[first[n_entities - singletons :]] = True
    entity, period = entity[mask], period[mask]
    order = rng.permutation(len(entity))
    entity, period = entity[order], period[order]
    counts = np.bincount(entity, minlength=n_entities)
    X = rng.normal(size=(len(entity), k)) + 0.5 * entity[:, None] / n_entities
    X += 0.3 * period[:, None] / n_periods
    return Panel(
        entity=entity.astype(np.int64),
        period=period.astype(np.int64),
        counts=counts,
        n_entities=n_entities,
        n_periods=n_periods,
        X=np.asfortranarray(X),
    )


@pytest.fixture
def make_panel():
    """Factory for :func:`random_unbalanced_panel`."""
    return random_unbalanced_panel
