"""FenceView: a fan's own stability map, one compact threshold x batch-size strip per method.

Each cell is one member of the fan, coloured by its latest clean validation loss relative to the
best member at that batch size (so it fills in as training goes and ends as the final loss); the
member on display is outlined. Clicking a cell shows that member; with the fence focused, Left and
Right move along the thresholds, Up and Down along the batch sizes.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np
from PySide6 import QtCore, QtGui, QtWidgets

from app.axes import tick_text
from app.colors import MUTED, method_color
from core.fan import FAN_SIZE, fan_factors
from core.fan_model import FanModel, StackData

CELL_H = 13
LABEL_W = 50  # the batch sizes down the left of the first strip
TITLE_H = 16
GAP = 14
# Relative loss (loss / best at that batch size) -> colour: deep green at the best, amber at
# 1.5x, pale at 3x and beyond. Diverged members are dark and crossed; untrained ones empty.
STOPS = ((1.0, (22, 110, 86)), (1.5, (232, 185, 75)), (3.0, (244, 239, 230)))
DIVERGED = QtGui.QColor(40, 40, 40)  # darker than any loss, and crossed
EMPTY = QtGui.QColor(236, 236, 236)


def relative_colour(ratio: float) -> QtGui.QColor:
    """The fence colour of a member whose loss is `ratio` times the best."""
    if not math.isfinite(ratio):
        return DIVERGED
    ratio = max(ratio, 1.0)
    for (r0, c0), (r1, c1) in itertools.pairwise(STOPS):
        if ratio <= r1:
            t = (math.log(ratio) - math.log(r0)) / (math.log(r1) - math.log(r0))
            return QtGui.QColor(*(round(a + (b - a) * t) for a, b in zip(c0, c1, strict=True)))
    return QtGui.QColor(*STOPS[-1][1])


@dataclass(frozen=True)
class Strip:
    label: str
    method: str
    columns: tuple[int, ...]  # member columns, by fan position (one for an unfanned table)


def latest_losses(stack: StackData) -> np.ndarray:
    """Each member's latest clean validation loss (NaN: none yet, inf: diverged)."""
    out = np.full(len(stack.members), np.nan)
    loss, diverged = stack.values["val_loss"], stack.values["diverged"]
    for i in range(len(stack.members)):
        rows = stack.rows(i)
        if rows:
            out[i] = math.inf if diverged[rows - 1, i] > 0 else loss[rows - 1, i]
    return out


class FenceView(QtWidgets.QWidget):
    """Shows one FanModel; the selection (batch size, fan position) is the fan view's."""

    chosen = QtCore.Signal(int, int)  # batch size, fan position 0 .. FAN_SIZE - 1

    def __init__(self, model: FanModel, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        self.model = model
        self.batch = model.scenario.train.batch_size
        self.position = FAN_SIZE // 2
        self.setFocusPolicy(QtCore.Qt.FocusPolicy.StrongFocus)
        self.setMouseTracking(True)
        self.setToolTip("Click a cell to show that member; arrow keys move along the fence.")
        self._update_height()

    # -- what is drawn ------------------------------------------------------------------------

    def strips(self) -> list[Strip]:
        stack = next(iter(self.model.stacks.values()), None)
        members = stack.members if stack is not None else []
        out: list[Strip] = []
        for clip in self.model.scenario.clip:
            columns = tuple(i for i, m in enumerate(members) if m.name == clip.display_name)
            out.append(Strip(clip.display_name, clip.method, columns))
        return out

    def batch_sizes(self) -> list[int]:
        return sorted(self.model.stacks) or list(self.model.batch_sizes)

    def set_selection(self, batch: int, position: int) -> None:
        if (batch, position) != (self.batch, self.position):
            self.batch, self.position = batch, position
            self.update()

    def _update_height(self) -> None:
        rows = max(len(self.model.batch_sizes), 1)
        self.setMinimumHeight(TITLE_H + rows * CELL_H + 6)
        self.setMaximumHeight(TITLE_H + rows * CELL_H + 6)

    def _geometry(self) -> tuple[float, list[tuple[Strip, float, float]]]:
        """Cell width and, per strip, its left edge and width."""
        strips = self.strips()
        slots = sum(max(len(s.columns), 1) for s in strips) or 1
        free = self.width() - LABEL_W - GAP * max(len(strips) - 1, 0) - 4
        cell = max(4.0, min(22.0, free / slots))
        placed, x = [], float(LABEL_W)
        for strip in strips:
            width = cell * max(len(strip.columns), 1)
            placed.append((strip, x, width))
            x += width + GAP
        return cell, placed

    def refresh(self) -> None:
        """Follow the model: the number of batch sizes, and every cell."""
        self._update_height()
        self.update()

    def paintEvent(self, event: QtGui.QPaintEvent) -> None:
        painter = QtGui.QPainter(self)
        painter.setRenderHint(QtGui.QPainter.RenderHint.Antialiasing, False)
        small = painter.font()
        small.setPointSizeF(max(7.0, small.pointSizeF() * 0.85))
        painter.setFont(small)
        cell, placed = self._geometry()
        sizes = self.batch_sizes()
        painter.setPen(QtGui.QColor(MUTED))
        for r, batch in enumerate(sizes):
            rect = QtCore.QRectF(0, TITLE_H + r * CELL_H, LABEL_W - 4, CELL_H)
            painter.drawText(rect, QtCore.Qt.AlignmentFlag.AlignRight, f"B={batch}")
        for strip, left, width in placed:
            painter.setPen(QtGui.QColor(method_color(strip.method)))
            painter.drawText(
                QtCore.QRectF(left, 0, width + GAP, TITLE_H - 2),
                QtCore.Qt.AlignmentFlag.AlignLeft | QtCore.Qt.AlignmentFlag.AlignBottom,
                strip.label,
            )
            for r, batch in enumerate(sizes):
                self._paint_row(painter, strip, batch, left, TITLE_H + r * CELL_H, cell)
        painter.end()

    def _paint_row(
        self,
        painter: QtGui.QPainter,
        strip: Strip,
        batch: int,
        left: float,
        top: float,
        cell: float,
    ) -> None:
        stack = self.model.shown_stack(batch)
        losses = latest_losses(stack) if stack is not None else None
        finite = losses[np.isfinite(losses)] if losses is not None else np.array([])
        best = float(finite.min()) if finite.size else math.nan
        for slot, column in enumerate(strip.columns or (-1,)):
            rect = QtCore.QRectF(left + slot * cell, top, cell - 1, CELL_H - 1)
            value = losses[column] if losses is not None and column >= 0 else math.nan
            if math.isnan(value):
                painter.fillRect(rect, EMPTY)
            else:
                painter.fillRect(rect, relative_colour(value / best if best > 0 else math.inf))
                if math.isinf(value):
                    painter.setPen(QtGui.QPen(QtGui.QColor(255, 255, 255), 1))
                    painter.drawLine(rect.topLeft(), rect.bottomRight())
            selected = batch == self.batch and (len(strip.columns) <= 1 or slot == self.position)
            if selected:
                painter.setPen(QtGui.QPen(QtGui.QColor(0, 0, 0), 2))
                painter.setBrush(QtCore.Qt.BrushStyle.NoBrush)
                painter.drawRect(rect.adjusted(0.5, 0.5, -0.5, -0.5))

    # -- input --------------------------------------------------------------------------------

    def cell_at(self, point: QtCore.QPointF) -> tuple[Strip, int, int] | None:
        """The strip, batch size and fan position under `point`, if any."""
        cell, placed = self._geometry()
        row = int((point.y() - TITLE_H) // CELL_H)
        sizes = self.batch_sizes()
        if point.y() < TITLE_H or not 0 <= row < len(sizes):
            return None
        for strip, left, width in placed:
            if left <= point.x() < left + width:
                slot = int((point.x() - left) // cell)
                position = slot if len(strip.columns) > 1 else self.position
                return strip, sizes[row], min(position, FAN_SIZE - 1)
        return None

    def cell_rect(self, strip_label: str, batch: int, position: int) -> QtCore.QRectF:
        """Where a cell is drawn (for tests and tooltips)."""
        cell, placed = self._geometry()
        row = self.batch_sizes().index(batch)
        for strip, left, _ in placed:
            if strip.label == strip_label:
                slot = position if len(strip.columns) > 1 else 0
                return QtCore.QRectF(left + slot * cell, TITLE_H + row * CELL_H, cell, CELL_H)
        raise KeyError(strip_label)

    def mousePressEvent(self, event: QtGui.QMouseEvent) -> None:
        found = self.cell_at(event.position())
        self.setFocus()
        if found is not None:
            _, batch, position = found
            self.chosen.emit(batch, position)

    def mouseMoveEvent(self, event: QtGui.QMouseEvent) -> None:
        found = self.cell_at(event.position())
        if found is None:
            self.setToolTip("Click a cell to show that member; arrow keys move along the fence.")
            return
        strip, batch, position = found
        self.setToolTip(self.describe(strip, batch, position))

    def describe(self, strip: Strip, batch: int, position: int) -> str:
        stack = self.model.shown_stack(batch)
        if stack is None or not strip.columns:
            return f"{strip.label} at B = {batch}: not trained yet"
        column = strip.columns[position if len(strip.columns) > 1 else 0]
        member = stack.members[column]
        losses = latest_losses(stack)
        finite = losses[np.isfinite(losses)]
        where = "" if math.isnan(member.threshold) else f" at {tick_text(member.threshold)}"
        value = losses[column]
        if math.isnan(value):
            return f"{strip.label}{where}, B = {batch}: not trained yet"
        if math.isinf(value):
            return f"{strip.label}{where}, B = {batch}: diverged"
        ratio = value / float(finite.min()) if finite.size else math.nan
        return (
            f"{strip.label}{where}, B = {batch}: clean validation loss {value:.4g} "
            f"({ratio:.2f} x the best member at this batch size)"
        )

    def keyPressEvent(self, event: QtGui.QKeyEvent) -> None:
        key = QtCore.Qt.Key
        sizes = self.batch_sizes()
        row = sizes.index(self.batch) if self.batch in sizes else 0
        moves = {
            key.Key_Left: (0, -1),
            key.Key_Right: (0, 1),
            key.Key_Up: (-1, 0),
            key.Key_Down: (1, 0),
        }
        move = moves.get(QtCore.Qt.Key(event.key()))
        if move is None or not sizes:
            super().keyPressEvent(event)
            return
        row = max(0, min(len(sizes) - 1, row + move[0]))
        position = max(0, min(FAN_SIZE - 1, self.position + move[1]))
        self.chosen.emit(sizes[row], position)

    def sizeHint(self) -> QtCore.QSize:
        return QtCore.QSize(800, self.minimumHeight())


def factor_at(position: int) -> float:
    return float(fan_factors()[position])
