"""Order statistics and rank counts of every prefix of a sequence, for all prefixes at once.

A wavelet matrix (Claude, Navarro and Ordóñez 2015, "The wavelet matrix", Information Systems;
cited from memory) over the ranks of the values: one bit level per bit of a rank, each level a
stable partition of the previous one by that bit with a prefix count of its zeros. A query
descends the levels once, so a million queries cost about twenty vectorised passes instead of a
million sorts.
"""

from __future__ import annotations

import numpy as np

# Queries run in chunks that keep their working arrays in the processor's cache.
_CHUNK = 1 << 16


class PrefixOrder:
    """The k-th smallest of values[:h], and how many of values[:h] are below a value."""

    def __init__(self, values: np.ndarray) -> None:
        values = np.asarray(values, dtype=np.float64)
        n = len(values)
        order = np.argsort(values)  # ties may come in any order: equal values are one value
        self.sorted = values[order]
        ranks = np.empty(n, dtype=np.int32)
        ranks[order] = np.arange(n, dtype=np.int32)
        self.size = n
        self.bits = max(1, (n - 1).bit_length())
        self.zeros: list[np.ndarray] = []  # per level, top bit first: zeros among [0, i)
        self.total_zeros: list[int] = []
        positions = np.arange(n + 1, dtype=np.int32)
        current = ranks
        for level in range(self.bits - 1, -1, -1):
            ones = ((current >> level) & 1).astype(np.uint8)
            ones_before = np.zeros(n + 1, dtype=np.int32)
            np.cumsum(ones, out=ones_before[1:])
            self.zeros.append(positions - ones_before)
            self.total_zeros.append(n - int(ones_before[-1]))
            # The stable partition, zeros first: a radix sort of one byte.
            current = current[np.argsort(ones, kind="stable")]
        self.final = current  # the ranks in the order below the last level

    def kth(self, counts: np.ndarray, ks: np.ndarray) -> np.ndarray:
        """For each query j, the ks[j]-th smallest (from 0) of values[:counts[j]].

        Needs 0 <= ks[j] < counts[j] <= len(values).
        """
        counts = np.asarray(counts, dtype=np.int32)
        ks = np.asarray(ks, dtype=np.int32)
        ends = np.empty(len(counts), dtype=np.int32)
        for start in range(0, len(counts), _CHUNK):
            right_end = counts[start : start + _CHUNK].copy()
            k = ks[start : start + _CHUNK].copy()
            left_end = np.zeros_like(right_end)
            for zeros, total in zip(self.zeros, self.total_zeros, strict=True):
                zeros_left, zeros_right = zeros[left_end], zeros[right_end]
                in_range = zeros_right - zeros_left
                one = k >= in_range  # the k-th has a 1 at this bit: descend into the ones
                k -= in_range * one
                left_end = np.where(one, left_end - zeros_left + total, zeros_left)
                right_end = np.where(one, right_end - zeros_right + total, zeros_right)
            ends[start : start + _CHUNK] = left_end
        # Below the last level a range holds one rank only, so its start names the answer.
        return self.sorted[self.final[ends]]

    def count_below(self, counts: np.ndarray, values: np.ndarray) -> np.ndarray:
        """For each query j, how many of the first counts[j] values are smaller than values[j]."""
        counts = np.asarray(counts, dtype=np.int32)
        # The values below x are exactly those whose rank is below x's first rank in sorted order.
        bounds = np.searchsorted(self.sorted, np.asarray(values, dtype=np.float64), side="left")
        bounds = bounds.astype(np.int64)
        below = np.empty(len(counts), dtype=np.int64)
        for start in range(0, len(counts), _CHUNK):
            right_end = counts[start : start + _CHUNK].copy()
            bound = bounds[start : start + _CHUNK]
            left_end = np.zeros_like(right_end)
            total_below = np.zeros(len(right_end), dtype=np.int64)
            everything = bound >= self.size  # every stored value is below x
            for i, level in enumerate(range(self.bits - 1, -1, -1)):
                zeros, total = self.zeros[i], self.total_zeros[i]
                zeros_left, zeros_right = zeros[left_end], zeros[right_end]
                one = ((bound >> level) & 1).astype(bool)
                # Where the bound has a 1, every value of this range with a 0 here is below it.
                total_below += np.where(one, zeros_right - zeros_left, 0)
                left_end = np.where(one, left_end - zeros_left + total, zeros_left)
                right_end = np.where(one, right_end - zeros_right + total, zeros_right)
            total_below = np.where(everything, counts[start : start + _CHUNK], total_below)
            below[start : start + _CHUNK] = total_below
        return below
