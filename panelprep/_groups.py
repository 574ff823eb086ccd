"""Per-group reductions and broadcasts on integer codes.

Everything that grows with the data is written as one of these: a group sum
(``np.bincount`` with weights, one call per column), a broadcast back to rows
(fancy indexing by the codes), or a sorted segment reduction
(``np.minimum.reduceat`` and friends on rows sorted by code).  None of them
loops over groups in Python, and each works the same way on one partition of
the rows as on all of them, which keeps the numeric core ready to run
partition by partition.
"""

from __future__ import annotations

import numpy as np


def group_counts(codes: np.ndarray, n_groups: int) -> np.ndarray:
    """Number of rows per group; ``codes`` are 0..n_groups-1, no negatives."""
    return np.bincount(codes, minlength=n_groups).astype(np.int64, copy=False)


def group_sums(codes: np.ndarray, values: np.ndarray, n_groups: int) -> np.ndarray:
    """Column-wise group sums.

    ``values`` is 1-D (n,) or 2-D (n, k); the result is (n_groups,) or
    (n_groups, k).  One ``bincount`` per column: the loop is over variables,
    never over groups.
    """
    if values.ndim == 1:
        return np.bincount(codes, weights=values, minlength=n_groups)
    out = np.empty((n_groups, values.shape[1]), dtype=np.float64, order="F")
    for j in range(values.shape[1]):
        out[:, j] = np.bincount(codes, weights=values[:, j], minlength=n_groups)
    return out


def group_means(codes: np.ndarray, values: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """Column-wise group means; groups with no rows get 0 (never NaN)."""
    sums = group_sums(codes, values, len(counts))
    safe = np.where(counts > 0, counts, 1).astype(np.float64)
    return sums / (safe if values.ndim == 1 else safe[:, None])


def demean(codes: np.ndarray, values: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """Deviations from group means, same shape as ``values``."""
    return values - group_means(codes, values, counts)[codes]


def segment_bounds(sorted_codes: np.ndarray) -> np.ndarray:
    """Start index of each run of equal codes in an already sorted array."""
    if len(sorted_codes) == 0:
        return np.zeros(0, dtype=np.int64)
    change = np.flatnonzero(sorted_codes[1:] != sorted_codes[:-1]) + 1
    return np.concatenate(([0], change)).astype(np.int64)


def occurring(codes: np.ndarray, n_groups: int | None = None
              ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The groups that occur, the codes renumbered over them, and their row counts.

    ``(present, compact, counts)`` as ``np.unique(codes, return_inverse=True,
    return_counts=True)`` gives them, for non-negative ``codes`` below
    ``n_groups`` (taken from the codes when not given).  A count per group
    and a renumbering by cumulative sum when the groups are not many more
    than the rows, which is linear where the sort is not; the sort otherwise,
    so a sparse grid of groups costs no more than the rows.
    """
    codes = np.asarray(codes).reshape(-1)
    if n_groups is None:
        n_groups = int(codes.max()) + 1 if len(codes) else 0
    if n_groups > 4 * len(codes) + 1024:
        present, compact, counts = np.unique(codes, return_inverse=True, return_counts=True)
        return present, compact.reshape(-1), counts.astype(np.int64, copy=False)
    per_group = np.bincount(codes, minlength=n_groups)
    seen = per_group > 0
    present = np.flatnonzero(seen)
    renumber = np.cumsum(seen) - 1
    return present, renumber[codes], per_group[present].astype(np.int64, copy=False)


def compact_codes(codes: np.ndarray, n_groups: int) -> tuple[np.ndarray, int]:
    """Codes renumbered over the groups that occur, when there are more groups than rows.

    A per-group array then never outgrows the rows (a period grid spanning
    centuries holds mostly empty periods).  Returns ``(codes, n_groups)``
    unchanged when ``n_groups`` is at most ``len(codes)``; group order is kept.
    """
    if n_groups <= len(codes):
        return codes, n_groups
    present, compact = np.unique(codes, return_inverse=True)
    return compact.reshape(-1).astype(np.int64, copy=False), len(present)


def select_rows(block: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """The rows of a 2-D ``block`` where ``mask`` holds, Fortran-ordered.

    One ``np.compress`` per column straight into the result, which is about
    three times faster than boolean indexing followed by a change of memory
    order (two full copies) on a column-major block.
    """
    out = np.empty((int(np.count_nonzero(mask)), block.shape[1]), order="F")
    for j in range(block.shape[1]):
        np.compress(mask, block[:, j], out=out[:, j])
    return out
