"""Axis items shared by the plots."""

from __future__ import annotations

import math

import pyqtgraph as pg


class LogAxis(pg.AxisItem):  # type: ignore[misc]
    """A log axis that labels only 1, 2 and 5 times a power of ten: the minor ticks pyqtgraph
    adds inside one decade stay, unlabelled, instead of piling their labels on each other."""

    def logTickStrings(self, values: list[float], scale: float, spacing: float) -> list[str]:
        labels, kept = [], 0
        for v in values:
            value = 10.0 ** (v * scale)
            mantissa = value / 10.0 ** math.floor(math.log10(value)) if value > 0 else 0.0
            keep = any(abs(mantissa - m) < 1e-6 * m for m in (1.0, 2.0, 5.0, 10.0))
            kept += keep
            labels.append(f"{value:.3g}" if keep else "")
        if kept < 2:  # a narrow range: its few ticks are all needed
            return [f"{10.0 ** (v * scale):.3g}" for v in values]
        return labels
