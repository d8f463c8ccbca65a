"""Prefix order statistics and rank counts against numpy's sort and comparisons."""

from __future__ import annotations

import numpy as np
import pytest

from core.wavelet import PrefixOrder


@pytest.mark.parametrize("n", [1, 2, 3, 17, 64, 65, 1000, 70_000])
def test_kth_is_the_kth_of_the_sorted_prefix(n: int) -> None:
    rng = np.random.default_rng(n)
    values = rng.choice([0.5, 1.0, 2.0, 3.0], size=n) if n < 70 else rng.standard_normal(n)
    values[rng.random(n) < 0.2] = 1.0  # ties
    order = PrefixOrder(values)
    counts = rng.integers(1, n + 1, size=500)
    ks = (rng.random(500) * counts).astype(np.int64)
    expected = [np.sort(values[:h])[k] for h, k in zip(counts, ks, strict=True)]
    np.testing.assert_array_equal(order.kth(counts, ks), expected)


@pytest.mark.parametrize("n", [1, 5, 64, 1000, 70_000])
def test_count_below_counts_the_prefix_values_smaller_than_a_value(n: int) -> None:
    rng = np.random.default_rng(n + 1)
    values = np.round(rng.standard_normal(n), 1)  # many ties
    order = PrefixOrder(values)
    counts = rng.integers(0, n + 1, size=500)
    probes = np.concatenate((rng.choice(values, 400), rng.normal(0.0, 3.0, 100)))
    expected = [int((values[:h] < x).sum()) for h, x in zip(counts, probes, strict=True)]
    np.testing.assert_array_equal(order.count_below(counts, probes), expected)
