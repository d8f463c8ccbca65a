"""Axis ticks: one positional notation, and at least three labelled ticks on any range."""

from __future__ import annotations

import math

import pytest
from pytestqt.qtbot import QtBot

from app.axes import LogAxis, round_values, tick_text


@pytest.mark.parametrize(
    ("value", "text"),
    [(0.001, "0.001"), (0.0316, "0.0316"), (2.0, "2"), (100.0, "100"), (12000.0, "12000")],
)
def test_ticks_read_in_one_positional_notation(value: float, text: str) -> None:
    assert tick_text(value) == text


@pytest.mark.parametrize(
    ("low", "high", "expected"),
    [
        (0.245, 0.33, [0.26, 0.28, 0.3, 0.32]),
        (1.0, 1000.0, [200.0, 400.0, 600.0, 800.0, 1000.0]),
        (0.0101, 0.0109, [0.0102, 0.0104, 0.0106, 0.0108]),
    ],
)
def test_round_values_are_the_widest_1_2_5_spacing_with_three(
    low: float, high: float, expected: list[float]
) -> None:
    # Ticks at multiples of 1, 2 or 5 times a power of ten: common practice for axes.
    values = round_values(low, high)
    assert values == pytest.approx(expected)
    assert all(low <= v <= high for v in values)


@pytest.mark.parametrize(("low", "high"), [(0.25, 0.33), (0.9, 1.1), (3.0, 3.2), (0.001, 100.0)])
def test_a_log_axis_labels_at_least_three_ticks(qtbot: QtBot, low: float, high: float) -> None:
    axis = LogAxis("left")
    axis.setLogMode(False, True)
    ticks = axis.tickValues(math.log10(low), math.log10(high), 200)
    values = sorted({v for _, level in ticks for v in level})
    labels = [t for t in axis.logTickStrings(values, 1.0, 1.0) if t]
    assert len(labels) >= 3, (low, high, labels)
