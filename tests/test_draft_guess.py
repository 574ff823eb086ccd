"""draft: the entity guess makes a (near) unique key with the time column, prefers id-like
columns, and is the same for CSV and Parquet copies of one data set.

Outside data: statsmodels' Grunfeld investment panel (``statsmodels.datasets.grunfeld``),
whose key is (firm, year) by its documentation; the other panels are invented.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from statsmodels.datasets import grunfeld

from panelprep.config import load_run_file
from panelprep.draft import starter_run_file


def _guess(path: Path, tmp_path: Path) -> tuple[list[str], str, str]:
    text = starter_run_file(path, run_dir=tmp_path)
    run_file = tmp_path / f"{path.stem}-{path.suffix[1:]}.toml"
    run_file.write_text(text, encoding="utf-8")
    run = load_run_file(run_file)
    line = next(line for line in text.splitlines() if line.startswith("entity ="))
    return run.panel.entity, run.panel.time, line


def _copies(frame: pd.DataFrame, tmp_path: Path, stem: str) -> list[Path]:
    csv, parquet = tmp_path / f"{stem}.csv", tmp_path / f"{stem}.parquet"
    frame.to_csv(csv, index=False)
    frame.to_parquet(parquet, index=False)
    return [csv, parquet]


def _households(seed: int = 3) -> pd.DataFrame:
    """Invented survey: a size count named like an id comes first, the person code later."""
    rng = np.random.default_rng(seed)
    people, years = 60, [2019, 2020, 2021]
    frame = pd.DataFrame({
        "household_size": rng.integers(1, 6, people * len(years)),   # a count: many repeats
        "income": rng.normal(30_000, 5_000, people * len(years)).round(0),  # a measure
        "year": np.tile(years, people),
        "nr": np.repeat([f"r{i:03d}" for i in range(people)], len(years)),
        "hours": rng.normal(38, 6, people * len(years)).round(1),
    })
    return frame


def test_a_count_named_like_an_id_loses_to_the_column_that_makes_the_key(tmp_path):
    for path in _copies(_households(), tmp_path, "survey"):
        entity, time, line = _guess(path, tmp_path)
        assert (entity, time) == (["nr"], "year"), path.suffix
        # the comment gives the duplicate-key count (60 people x 3 years, each once)
        assert re.search(r"# guessed: 0 duplicate \(nr, year\) keys in 180 distinct rows", line)


def test_a_measure_loses_to_a_city_column(tmp_path):
    rng = np.random.default_rng(5)
    cities = [f"Town {c}" for c in "ABCDEFGHIJKL"]
    frame = pd.DataFrame({
        "region_population": rng.integers(10_000, 90_000, 12 * 8),  # a measure, unique per row
        "year": np.tile(np.arange(2010, 2018), 12),
        "city": np.repeat(cities, 8),
        "rent": rng.normal(900, 80, 12 * 8).round(2),
    })
    for path in _copies(frame, tmp_path, "towns"):
        assert _guess(path, tmp_path)[:2] == (["city"], "year"), path.suffix


def test_csv_and_parquet_copies_of_grunfeld_get_the_same_guess(tmp_path):
    data = grunfeld.load_pandas().data  # statsmodels ships year as floats 1935.0 ...
    guesses = {path.suffix: _guess(path, tmp_path) for path in _copies(data, tmp_path, "grunfeld")}
    assert guesses[".csv"] == guesses[".parquet"]
    assert guesses[".csv"][:2] == (["firm"], "year")
    assert "0 duplicate (firm, year) keys" in guesses[".csv"][2]


def test_exact_repeated_rows_do_not_count_as_duplicate_keys(tmp_path):
    frame = _households()
    frame = pd.concat([frame, frame.iloc[:5]], ignore_index=True)
    for path in _copies(frame, tmp_path, "repeats"):
        entity, _, line = _guess(path, tmp_path)
        assert entity == ["nr"] and "0 duplicate (nr, year) keys" in line


@pytest.mark.parametrize("suffix", [".csv", ".parquet"])
def test_two_waves_draft_states_the_step(tmp_path, suffix):
    frame = pd.DataFrame({"id": np.repeat(np.arange(1, 21), 2), "wave": np.tile([80, 90], 20),
                          "y": np.arange(40.0), "x": np.arange(40.0) ** 0.5})
    path = _copies(frame, tmp_path, "waves")[suffix == ".parquet"]
    text = starter_run_file(path, run_dir=tmp_path)
    assert '# freq = "int:10"' in text
    assert _guess(path, tmp_path)[:2] == (["id"], "wave")
