"""Mergeable central moments: one stream up to the fourth moment, and many groups up to the second.

Both keep central sums (count, mean, Σ(x - mean)^k) rather than raw power sums, so merging two
parts never subtracts large, nearly equal numbers. The pairwise update formulas are the ones of
Chan, Golub and LeVeque (1979) for the second moment and Pébay (2008) for the third and fourth.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]


@dataclass
class StreamMoments:
    """Count, mean and central sums of powers 2 to 4 of one stream of values; mergeable.

    Attributes
    ----------
    n : int
        Number of values seen.
    mean : float
        Their mean (0.0 while empty).
    m2, m3, m4 : float
        Σ(x - mean)^2, Σ(x - mean)^3 and Σ(x - mean)^4.
    """

    n: int = 0
    mean: float = 0.0
    m2: float = 0.0
    m3: float = 0.0
    m4: float = 0.0

    def update(self, values: FloatArray) -> None:
        """Add a block of values (computed exactly on the block, then merged)."""
        if values.size == 0:
            return
        mean = float(values.mean())
        dev = values - mean
        dev2 = dev * dev
        block = StreamMoments(
            n=int(values.size),
            mean=mean,
            m2=float(dev2.sum()),
            m3=float((dev2 * dev).sum()),
            m4=float((dev2 * dev2).sum()),
        )
        self.merge(block)

    def merge(self, other: StreamMoments) -> None:
        """Fold `other` into this one (Pébay's pairwise formulas; order does not matter)."""
        if other.n == 0:
            return
        if self.n == 0:
            self.n, self.mean = other.n, other.mean
            self.m2, self.m3, self.m4 = other.m2, other.m3, other.m4
            return
        na, nb = float(self.n), float(other.n)
        n = na + nb
        delta = other.mean - self.mean
        d_n = delta / n
        m2 = self.m2 + other.m2 + delta * d_n * na * nb
        m3 = (
            self.m3
            + other.m3
            + delta * d_n * d_n * na * nb * (na - nb)
            + 3.0 * d_n * (na * other.m2 - nb * self.m2)
        )
        m4 = (
            self.m4
            + other.m4
            + delta * d_n**3 * na * nb * (na * na - na * nb + nb * nb)
            + 6.0 * d_n * d_n * (na * na * other.m2 + nb * nb * self.m2)
            + 4.0 * d_n * (na * other.m3 - nb * self.m3)
        )
        self.mean = self.mean + nb * d_n
        self.n = self.n + other.n
        self.m2, self.m3, self.m4 = m2, m3, m4

    def skewness(self) -> float:
        """Moment skewness m3/n / (m2/n)^1.5 (no small-sample correction); NaN without spread."""
        if self.n == 0 or self.m2 <= 0.0:
            return float("nan")
        var = self.m2 / self.n
        return float(self.m3 / self.n / var**1.5)

    def kurtosis(self) -> float:
        """Moment kurtosis m4/n / (m2/n)² (3 for a normal; no correction); NaN without spread."""
        if self.n == 0 or self.m2 <= 0.0:
            return float("nan")
        var = self.m2 / self.n
        return float(self.m4 / self.n / (var * var))


def pool_groups(
    index: IntArray,
    count: FloatArray,
    mean: FloatArray,
    m2: FloatArray,
    n_groups: int,
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Pool parts (count, mean, Σ(x - mean)²) into groups given by `index`.

    A single value is a part with count 1 and m2 0, so the same function turns a batch of rows
    into per-group sums and merges two sets of per-group sums.

    Parameters
    ----------
    index : ndarray of shape (n_parts,)
        Group of each part, in ``0 .. n_groups - 1``.
    count, mean, m2 : ndarray of shape (n_parts,)
        Count, mean and centred sum of squares of each part.
    n_groups : int
        Number of groups in the result.

    Returns
    -------
    count, mean, m2 : ndarray of shape (n_groups,)
        Pooled values; an empty group has count 0, mean 0 and m2 0.
    """
    # bincount with weights returns float64; asarray only tells the type checker.
    total = np.asarray(np.bincount(index, weights=count, minlength=n_groups), dtype=np.float64)
    weighted = np.bincount(index, weights=count * mean, minlength=n_groups)
    pooled_mean = np.zeros(n_groups)
    np.divide(weighted, total, out=pooled_mean, where=total > 0)
    delta = mean - pooled_mean[index]
    pooled_m2 = np.asarray(
        np.bincount(index, weights=m2 + count * delta * delta, minlength=n_groups),
        dtype=np.float64,
    )
    return total, pooled_mean, pooled_m2


def pool_values(
    index: IntArray,
    values: FloatArray,
    count: FloatArray,
    mean: FloatArray,
    m2: FloatArray,
    n_groups: int,
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Pool single values into groups that hold (count, mean, Σ(x - mean)²) already.

    The same numbers as `pool_groups` on the groups followed by each value as a part of
    count 1 and m2 0, without making those parts: the counts of ones, the products with them
    and the zeros cost 1 ms of 2.2 per batch of 110,749 values here.

    Parameters
    ----------
    index : ndarray of shape (n_values,)
        Group of each value, in ``0 .. n_groups - 1``.
    values : ndarray of shape (n_values,)
        The values.
    count, mean, m2 : ndarray of shape (n_old,)
        The groups so far, ``n_old <= n_groups`` (groups past them start empty).
    n_groups : int
        Number of groups in the result.
    """
    old = np.arange(count.size)
    both = np.concatenate((old, index))
    # Counts are whole numbers, so adding the values' counts after the groups' is exact.
    total = np.bincount(index, minlength=n_groups).astype(np.float64)
    total[: count.size] += count
    weighted = np.bincount(both, weights=np.concatenate((count * mean, values)), minlength=n_groups)
    pooled_mean = np.zeros(n_groups)
    np.divide(weighted, total, out=pooled_mean, where=total > 0)
    old_delta = mean - pooled_mean[: count.size]
    delta = values - pooled_mean[index]
    delta *= delta
    spread = np.concatenate((m2 + count * old_delta * old_delta, delta))
    # bincount with weights returns float64; asarray only tells the type checker.
    pooled_m2 = np.asarray(np.bincount(both, weights=spread, minlength=n_groups), np.float64)
    return total, pooled_mean, pooled_m2
