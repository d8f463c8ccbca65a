"""Axis items and tick text shared by the plots: one notation on every axis (0.001 ... 100)."""

from __future__ import annotations

import math

import pyqtgraph as pg


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


class LogAxis(pg.AxisItem):  # type: ignore[misc]
    """A log axis that labels only 1, 2 and 5 times a power of ten, in positional notation: the
    minor ticks pyqtgraph adds inside one decade stay, unlabelled, instead of piling their
    labels on each other."""

    def __init__(self, orientation: str) -> None:
        super().__init__(orientation)
        self.enableAutoSIPrefix(False)

    def logTickStrings(self, values: list[float], scale: float, spacing: float) -> list[str]:
        labels, kept = [], 0
        for v in values:
            value = 10.0 ** (v * scale)
            mantissa = value / 10.0 ** math.floor(math.log10(value)) if value > 0 else 0.0
            keep = any(abs(mantissa - m) < 1e-6 * m for m in (1.0, 2.0, 5.0, 10.0))
            kept += keep
            labels.append(tick_text(value) if keep else "")
        if kept < 3:  # a narrow range: its few ticks are all needed
            return [tick_text(10.0 ** (v * scale)) for v in values]
        return labels


class PlainAxis(pg.AxisItem):  # type: ignore[misc]
    """A linear axis in the same notation as LogAxis, and no SI prefix on the unit."""

    def __init__(self, orientation: str) -> None:
        super().__init__(orientation)
        self.enableAutoSIPrefix(False)

    def tickStrings(self, values: list[float], scale: float, spacing: float) -> list[str]:
        return [tick_text(v * scale) for v in values]
