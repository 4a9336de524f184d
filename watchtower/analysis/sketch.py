"""Mergeable quantile sketches with a relative-error guarantee, many at once (DDSketch).

DDSketch (Masson, Rim & Lee, "DDSketch: a fast and fully-mergeable quantile sketch with relative-error
guarantees", VLDB 2019): with γ = (1 + a) / (1 − a), a positive value x falls in bucket k = ⌈log_γ x⌉,
which covers (γ^(k−1), γ^k]; the bucket answers 2γ^k / (γ + 1), within relative ``a`` of every value in it
(their Proposition 3). Counting values per bucket keeps the rank of every value, so the q-quantile is
answered within relative ``a`` of the exact one, and two sketches merge by adding their counts: the merge is
*identical* to the sketch of the union, in any order and grouping.

Here one ``Sketches`` holds the sketches of many groups (one per link and message-size bin) as three sparse
columns, so folding, merging and querying them are a few numpy calls whatever the number of groups. Only
positive values are sketched: the figures that use them (transfer times) drop the others anyway.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

RELATIVE_ACCURACY = 1e-3  # a: every quantile within 0.1 % of the exact one; ample next to timer noise
_BUCKET_BITS = 20  # bucket indices are kept in the low bits of one int64 key: ±524k buckets, groups < 2^43
MIN_ACCURACY = 1e-3  # at this accuracy every positive float64 has a bucket within ±524k


@dataclass(frozen=True)
class Sketches:
    """Per group, a DDSketch: sorted unique (group, bucket) keys and their counts."""

    key: np.ndarray  # int64: group << _BUCKET_BITS | (bucket + offset), sorted, unique
    count: np.ndarray  # int64
    accuracy: float = RELATIVE_ACCURACY

    @classmethod
    def empty(cls, accuracy: float = RELATIVE_ACCURACY) -> Sketches:
        return cls(np.empty(0, np.int64), np.empty(0, np.int64), accuracy)

    @classmethod
    def of(cls, group: np.ndarray, values: np.ndarray, accuracy: float = RELATIVE_ACCURACY) -> Sketches:
        """Sketch ``values`` by ``group`` (non-negative ints); values that are not positive and finite are left out."""
        if accuracy < MIN_ACCURACY:
            raise ValueError(f"sketch accuracy below {MIN_ACCURACY} needs more bucket bits")
        values = np.asarray(values, np.float64)
        ok = np.isfinite(values) & (values > 0)
        bucket = np.ceil(np.log(values[ok]) / np.log(_gamma(accuracy))).astype(np.int64)
        key = (np.asarray(group, np.int64)[ok] << _BUCKET_BITS) | (bucket + (1 << (_BUCKET_BITS - 1)))
        return _collapse(key, np.ones(len(key), np.int64), accuracy)

    def groups(self) -> np.ndarray:
        return self.key >> _BUCKET_BITS

    def counts(self, n_groups: int) -> np.ndarray:
        """Values sketched per group."""
        return np.bincount(self.groups(), weights=self.count, minlength=n_groups).astype(np.int64)

    def select(self, keep_group: np.ndarray) -> Sketches:
        """Only the groups where ``keep_group`` (bool, indexed by group) is true."""
        keep = keep_group[self.groups()]
        return Sketches(self.key[keep], self.count[keep], self.accuracy)

    def regroup(self, new_group: np.ndarray) -> Sketches:
        """The same values under other group ids (``new_group`` indexed by old id); groups may fold together."""
        bucket = self.key & ((1 << _BUCKET_BITS) - 1)
        return _collapse((np.asarray(new_group, np.int64)[self.groups()] << _BUCKET_BITS) | bucket, self.count,
                         self.accuracy)

    def renumber(self, groups: np.ndarray) -> Sketches:
        """The same sketches with each group renamed to its position in ``groups`` (sorted, holding all)."""
        position = np.searchsorted(groups, self.groups()).astype(np.int64)
        return Sketches((position << _BUCKET_BITS) | (self.key & ((1 << _BUCKET_BITS) - 1)), self.count,
                        self.accuracy)

    def quantile(self, q: float, n_groups: int) -> np.ndarray:
        """Per group, the q-quantile of its values (NaN for an empty group), within relative ``accuracy`` of
        the exact value of rank ⌊q (n − 1)⌋ (0-based), i.e. ``numpy.quantile(..., method="lower")``."""
        out = np.full(n_groups, np.nan)
        if len(self.key) == 0:
            return out
        group = self.groups()
        cum = np.cumsum(self.count)
        totals = np.bincount(group, weights=self.count, minlength=n_groups).astype(np.int64)
        starts = np.flatnonzero(np.r_[True, group[1:] != group[:-1]])
        present = group[starts]
        before = np.r_[0, cum[starts[1:] - 1]]  # values in the groups before each present group
        rank = np.floor(q * (totals[present] - 1)).astype(np.int64)
        at = np.searchsorted(cum, before + rank, side="right")  # first bucket whose cumulative count passes rank
        bucket = (self.key[at] & ((1 << _BUCKET_BITS) - 1)) - (1 << (_BUCKET_BITS - 1))
        gamma = _gamma(self.accuracy)
        out[present] = 2.0 * gamma ** bucket.astype(np.float64) / (gamma + 1.0)
        return out


def merge(sketches: Sequence[Sketches]) -> Sketches:
    """The sketches of the union of the values (identical whatever the order or grouping of the merge)."""
    if not sketches:
        return Sketches.empty()
    accuracy = sketches[0].accuracy
    if any(s.accuracy != accuracy for s in sketches):
        raise ValueError("only sketches of one accuracy merge")
    if len(sketches) == 1:
        return sketches[0]
    return _collapse(np.concatenate([s.key for s in sketches]), np.concatenate([s.count for s in sketches]),
                     accuracy)


def _gamma(accuracy: float) -> float:
    return (1.0 + accuracy) / (1.0 - accuracy)


def _collapse(key: np.ndarray, count: np.ndarray, accuracy: float) -> Sketches:
    """Sort the keys and add the counts of equal ones."""
    if len(key) == 0:
        return Sketches.empty(accuracy)
    order = np.argsort(key)
    key, count = key[order], count[order]
    starts = np.flatnonzero(np.r_[True, key[1:] != key[:-1]])
    return Sketches(key[starts], np.add.reduceat(count, starts), accuracy)
