"""Axis items and tick text shared by the plots: one notation on every axis (0.001 ... 100)."""

from __future__ import annotations

import math

import pyqtgraph as pg
from PySide6 import QtCore


def tick_text(value: float) -> str:
    """A number as an axis or a cell shows it: 0.001, 0.0316, 2, 100, 12000; scientific only
    outside 1e-6 .. 1e7, where positional digits would be unreadable."""
    if value == 0 or not math.isfinite(value):
        return f"{value:g}"
    size = abs(value)
    if not 1e-6 <= size < 1e7:
        return f"{value:.2g}"
    digits = max(0, 2 - math.floor(math.log10(size)))  # three significant digits
    text = f"{value:.{digits}f}"
    return text.rstrip("0").rstrip(".") if "." in text else text


def round_values(low: float, high: float, at_least: int = 3) -> list[float]:
    """Evenly spaced multiples of 1, 2 or 5 times a power of ten inside [low, high]: the widest
    spacing that gives `at_least` of them."""
    power = 10.0 ** math.ceil(math.log10(high - low))
    while True:
        for mantissa in (5.0, 2.0, 1.0):
            step = mantissa * power
            first, last = math.ceil(low / step - 1e-9), math.floor(high / step + 1e-9)
            if last - first + 1 >= at_least:
                return [round(k * step, 12) for k in range(first, last + 1)]
        power /= 10.0


class LogAxis(pg.AxisItem):  # type: ignore[misc]
    """A log axis that labels only 1, 2 and 5 times a power of ten, in positional notation: the
    minor ticks pyqtgraph adds inside one decade stay, unlabelled, instead of piling their
    labels on each other."""

    def __init__(self, orientation: str) -> None:
        super().__init__(orientation)
        self.enableAutoSIPrefix(False)

    def logTickValues(
        self, minVal: float, maxVal: float, size: float, stdTicks: list[tuple[float, list[float]]]
    ) -> list[tuple[float | None, list[float]]]:
        """pyqtgraph's log ticks, unless a range inside one decade leaves fewer than three: then
        evenly spaced round values (0.26, 0.28, 0.3, ...) placed on the log scale."""
        ticks = super().logTickValues(minVal, maxVal, size, stdTicks)
        shown = {round(v, 9) for _, values in ticks for v in values if minVal <= v <= maxVal}
        if len(shown) >= 3 or not maxVal > minVal:
            return ticks  # type: ignore[no-any-return]
        values = round_values(10.0**minVal, 10.0**maxVal)
        return [(None, [math.log10(v) for v in values if v > 0])]

    def logTickStrings(self, values: list[float], scale: float, spacing: float) -> list[str]:
        """Labels on 1, 2 and 5 times a power of ten; on 1, 2, 3 and 5 when that leaves fewer
        than three; on every tick when even that does."""
        numbers = [10.0 ** (v * scale) for v in values]
        for mantissas in ((1.0, 2.0, 5.0), (1.0, 2.0, 3.0, 5.0)):
            keep = [value > 0 and has_mantissa(value, mantissas) for value in numbers]
            if sum(keep) >= 3:
                return [tick_text(n) if k else "" for n, k in zip(numbers, keep, strict=True)]
        return [tick_text(n) for n in numbers]  # a narrow range: its few ticks are all needed


def has_mantissa(value: float, mantissas: tuple[float, ...]) -> bool:
    mantissa = value / 10.0 ** math.floor(math.log10(value))
    return any(abs(mantissa - m) < 1e-6 * m for m in (*mantissas, 10.0))


class PlainAxis(pg.AxisItem):  # type: ignore[misc]
    """A linear axis in the same notation as LogAxis, and no SI prefix on the unit."""

    def __init__(self, orientation: str) -> None:
        super().__init__(orientation)
        self.enableAutoSIPrefix(False)

    def tickStrings(self, values: list[float], scale: float, spacing: float) -> list[str]:
        return [tick_text(v * scale) for v in values]


def overhanging_title(plot: pg.PlotItem) -> None:
    """Let a plot's title overhang its plot instead of widening the whole canvas: pyqtgraph
    makes the title's width the plot's minimum on every resize, which pushes the right-hand
    plots of a narrow canvas out of sight."""
    label = plot.titleLabel

    def update_min() -> None:
        bounds = label.itemRect()
        label.setMinimumWidth(0)
        label.setMinimumHeight(bounds.height())
        label._sizeHint = {
            QtCore.Qt.SizeHint.MinimumSize: (0, bounds.height()),
            QtCore.Qt.SizeHint.PreferredSize: (0, bounds.height()),
            QtCore.Qt.SizeHint.MaximumSize: (-1, -1),
            QtCore.Qt.SizeHint.MinimumDescent: (0, 0),
        }
        label.updateGeometry()

    label.updateMin = update_min
    update_min()
