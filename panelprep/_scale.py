"""Centring and power-of-two scaling of column blocks before any cross product.

Every second moment the package forms (sums of squares, cross products,
traces of small projector products) is taken on columns that are first
centred on their mean and divided by a power of two near their spread:

``x = centre + scale * z``, ``z`` with mean 0 and root mean square near 1.

Centring removes the cancellation that a large common level causes (a
regressor around 1e9 with a spread of 1 loses every digit of its spread in
``sum x^2 - n xbar^2``); the power-of-two scaling keeps squares away from
underflow (values near 1e-300) and overflow (values near 1e300), and is
exact, so scaling a column by a power of two changes no digit of ``z``.
The mean itself is taken after dividing by a power of two at least the
column's largest magnitude, so it cannot overflow either.

Both steps are column-wise reductions over rows (one sum and one sum of
squares per column), so a partitioned engine can compute them as a first
pass of partial sums.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


def power_of_two(size: np.ndarray) -> np.ndarray:
    """The power of two nearest (in log scale) to each positive ``size``; 1 elsewhere."""
    size = np.asarray(size, dtype=np.float64)
    out = np.ones_like(size)
    good = np.isfinite(size) & (size > 0)
    # frexp: size = m * 2**e with 0.5 <= m < 1, so 2**(e - 1) <= size < 2**e
    mantissa, exponent = np.frexp(size[good])
    exponent = exponent - (mantissa < np.sqrt(0.5))
    out[good] = np.ldexp(1.0, exponent)
    return out


@dataclass(frozen=True)
class Standardised:
    """A column block as ``values = centre + scale * z``.

    Attributes
    ----------
    z : ndarray (n, k), Fortran order
        Centred and scaled columns.
    centre : ndarray (k,)
        Column means in the original units (finite for finite input).
    scale : ndarray (k,)
        Powers of two; 1 for a column without spread.
    """

    z: np.ndarray
    centre: np.ndarray
    scale: np.ndarray


def standardise(values: np.ndarray) -> Standardised:
    """Centre each column on its mean and divide it by a power of two near its spread.

    Parameters
    ----------
    values : array (n,) or (n, k)
        Finite float64 values (a 1-D input is treated as one column).

    Returns
    -------
    Standardised
        With ``z`` of shape (n, k).  Rows: none is dropped or reordered.

    Notes
    -----
    Two passes per column: ``v = x / 2^a`` with ``max |x| / 2 < 2^a <= max |x|`` (exact),
    ``m = mean(v)``, ``w = v - m``; then ``z = w / 2^b`` with ``2^b`` the power
    of two nearest the root mean square of ``w`` (ddof 0), at most
    ``2^(1023 - a)`` so that the scale is a finite float.  ``centre =
    2^a m`` and ``scale = 2^(a + b)``.  A column of one repeated value has
    ``w = 0`` and keeps ``b = 0``.

    Examples
    --------
    >>> s = standardise(np.array([1e9 + 1.0, 1e9 - 1.0, 1e9 + 3.0]))
    >>> float(s.centre[0]), float(s.scale[0])
    (1000000001.0, 2.0)
    """
    block = np.asarray(values, dtype=np.float64)
    if block.ndim == 1:
        block = block[:, None]
    n, k = block.shape
    if n == 0:
        return Standardised(np.zeros((0, k), order="F"), np.zeros(k), np.ones(k))
    largest = np.abs(block).max(axis=0)
    # a power of two within a factor 2 of the largest magnitude: |v| < 2, so no
    # sum overflows (2^exponent itself overflows for values near the largest float)
    _, exponent = np.frexp(np.where(largest > 0, largest, 1.0))
    first = np.ldexp(1.0, exponent - 1)
    z = np.divide(block, first, order="F")
    mean = z.mean(axis=0)
    z -= mean
    spread = np.sqrt(np.einsum("ij,ij->j", z, z) / n)
    # at most 2^(1024 - exponent), so that scale = first * second stays finite for
    # columns spread near the largest float (z's root mean square is then up to 2)
    second = _capped_second(spread, exponent)
    z /= second
    return Standardised(z=z, centre=first * mean, scale=first * second)


@dataclass(frozen=True)
class Scaling:
    """The parameters of :func:`standardise`, to scale a block on the fly, row range by row range.

    ``z = (x / first - mean) / second`` column-wise, the same operations in
    the same order as :func:`standardise`, so a block scaled piece by piece
    needs no (n, k) scaled copy of the sample.
    """

    first: np.ndarray
    mean: np.ndarray
    second: np.ndarray

    @property
    def centre(self) -> np.ndarray:
        return self.first * self.mean

    @property
    def scale(self) -> np.ndarray:
        return self.first * self.second

    def column(self, values: np.ndarray, j: int, out: np.ndarray | None = None) -> np.ndarray:
        """Column ``j`` of the scaled block (``values`` is the raw (n, k) block)."""
        out = np.divide(values[:, j], self.first[j], out=out)
        out -= self.mean[j]
        out /= self.second[j]
        return out

    def take(self, columns: list[int] | slice) -> Scaling:
        """The scaling of some of the columns, in the order given."""
        return Scaling(self.first[columns], self.mean[columns], self.second[columns])

    def rows(self, values: np.ndarray, start: int, stop: int) -> np.ndarray:
        """Rows ``start:stop`` of the scaled block, Fortran-ordered."""
        out = np.divide(values[start:stop], self.first, order="F")
        out -= self.mean
        out /= self.second
        return out


def scaled_group_means(values: np.ndarray, codes: np.ndarray, counts: np.ndarray
                       ) -> tuple[Scaling, np.ndarray]:
    """:func:`standardise`'s parameters of an (n, k) block and the group means of its
    scaled columns, column by column with one buffer (no scaled copy of the block).

    One sweep per column: the scaling's pass leaves ``x / first - mean`` in
    the buffer, one division by the (power of two) ``second`` makes it the
    scaled column :meth:`Scaling.column` gives, and one ``bincount`` sums it
    per group.  ``codes`` are dense group codes, ``counts`` (G,) the rows of
    each; a group without rows has mean 0.  The means are the ones the
    variation table, the variance components and the evidence all read.
    """
    block = np.asarray(values, dtype=np.float64)
    n, k = block.shape
    n_groups = len(counts)
    first, mean, second = np.ones(k), np.zeros(k), np.ones(k)
    means = np.zeros((n_groups, k), order="F")
    if n == 0:
        return Scaling(first, mean, second), means
    first = first_divisor(largest(block))
    _, exponent = np.frexp(first)
    sizes = np.asarray(counts, dtype=np.float64)
    inverse = np.zeros(n_groups)
    np.divide(1.0, sizes, out=inverse, where=sizes > 0)
    buffer = np.empty(n)
    for j in range(k):
        np.divide(block[:, j], first[j], out=buffer)
        mean[j] = buffer.mean()
        buffer -= mean[j]
        spread = np.sqrt(np.dot(buffer, buffer) / n)
        second[j] = _capped_second(np.array([spread]), exponent[j:j + 1])[0]
        buffer /= second[j]
        means[:, j] = np.bincount(codes, weights=buffer, minlength=n_groups) * inverse
    return Scaling(first, mean, second), means


def largest(block: np.ndarray) -> np.ndarray:
    """Largest magnitude per column (k,), from the extremes (no block-sized array of
    magnitudes); 0 for a block without rows."""
    if block.shape[0] == 0:
        return np.zeros(block.shape[1])
    return np.array([max(-float(block[:, j].min()), float(block[:, j].max()))
                     for j in range(block.shape[1])])


def first_divisor(largest_magnitude: np.ndarray) -> np.ndarray:
    """A power of two within a factor 2 of each column's largest magnitude: ``|x / it| < 2``,
    so no sum overflows (2^exponent itself overflows for values near the largest float).
    ``frexp`` of it gives back the exponent :func:`scaling_from` caps the scale with."""
    _, exponent = np.frexp(np.where(largest_magnitude > 0, largest_magnitude, 1.0))
    return np.ldexp(1.0, exponent - 1)


def level_sums(block: np.ndarray, first: np.ndarray) -> np.ndarray:
    """``sum x / first`` per column (k,): the dask engine's second scaling pass."""
    buffer = np.empty(block.shape[0])
    out = np.zeros(block.shape[1])
    for j in range(block.shape[1]):
        np.divide(block[:, j], first[j], out=buffer)
        out[j] = buffer.sum()
    return out


def spread_sums(block: np.ndarray, first: np.ndarray, mean: np.ndarray) -> np.ndarray:
    """``sum (x / first - mean)^2`` per column (k,): the dask engine's third scaling pass."""
    buffer = np.empty(block.shape[0])
    out = np.zeros(block.shape[1])
    for j in range(block.shape[1]):
        np.divide(block[:, j], first[j], out=buffer)
        buffer -= mean[j]
        out[j] = np.dot(buffer, buffer)
    return out


def scaling_from(first: np.ndarray, mean: np.ndarray, spread_sum: np.ndarray, n: int) -> Scaling:
    """The :class:`Scaling` of ``n`` rows from :func:`first_divisor`, the level sums / n and
    :func:`spread_sums`, each added up over the parts of the rows (the dask engine); the
    same numbers :func:`scaled_group_means` takes in one sweep, up to the order of additions."""
    _, exponent = np.frexp(first)
    return Scaling(first, mean, _capped_second(np.sqrt(spread_sum / n), exponent))


def _capped_second(spread: np.ndarray, exponent: np.ndarray) -> np.ndarray:
    """The power of two near ``spread``, at most 2^(1024 - exponent): the scale stays finite."""
    return np.minimum(power_of_two(spread), np.ldexp(1.0, np.minimum(1024 - exponent, 1023)))
