"""The fence: a fan's own stability map. A click shows that member, the arrow keys move along it,
and each cell's colour follows the member's loss relative to the best at its batch size."""

from __future__ import annotations

import numpy as np
from PySide6 import QtCore, QtGui
from pytestqt.qtbot import QtBot

from app.fence import latest_losses, relative_colour
from app.main_window import MainWindow
from core.fan import fan_factors, member_for
from tests.app.conftest import trained


def click(qtbot: QtBot, widget: object, point: QtCore.QPointF) -> None:
    qtbot.mouseClick(widget, QtCore.Qt.MouseButton.LeftButton, pos=point.toPoint())


def test_clicking_a_fence_cell_shows_that_members_arrays(qtbot: QtBot, window: MainWindow) -> None:
    view = trained(qtbot, window)
    fence = view.fence
    batch = view.model.batch_sizes[2]
    click(qtbot, fence, fence.cell_rect("global-norm", batch, 3).center())
    assert view.batch_size == batch and view.slider.value() == 3
    stack = view.model.stacks[batch]
    member = member_for(stack.members, "global-norm", float(fan_factors()[3]))
    _, y = view.curves[("global-norm", "loss")].getOriginalDataset()
    np.testing.assert_array_equal(y, stack.values["val_loss"][:, member])
    assert (fence.batch, fence.position) == (batch, 3)


def test_the_arrow_keys_move_the_choice_along_the_fence(qtbot: QtBot, window: MainWindow) -> None:
    view = trained(qtbot, window)
    fence = view.fence
    sizes = list(view.model.batch_sizes)
    click(qtbot, fence, fence.cell_rect("example-norm", sizes[0], 8).center())
    qtbot.keyClick(fence, QtCore.Qt.Key.Key_Right)
    qtbot.keyClick(fence, QtCore.Qt.Key.Key_Right)
    qtbot.keyClick(fence, QtCore.Qt.Key.Key_Down)
    assert view.slider.value() == 10 and view.batch_size == sizes[1]
    qtbot.keyClick(fence, QtCore.Qt.Key.Key_Up)
    qtbot.keyClick(fence, QtCore.Qt.Key.Key_Up)  # the first batch size: it stays
    assert view.batch_size == sizes[0]


def test_a_cells_colour_is_its_members_loss_against_the_best_at_that_batch_size(
    qtbot: QtBot, window: MainWindow
) -> None:
    view = trained(qtbot, window)
    fence = view.fence
    batch = view.batch_size
    losses = latest_losses(view.model.stacks[batch])
    best = int(np.nanargmin(losses))
    image = QtGui.QImage(fence.size(), QtGui.QImage.Format.Format_RGB32)
    fence.render(image)
    strip = next(s for s in fence.strips() if best in s.columns)
    position = strip.columns.index(best) if len(strip.columns) > 1 else fence.position
    rect = fence.cell_rect(strip.label, batch, position)
    inside = rect.adjusted(3, 3, -3, -3).center().toPoint()
    assert QtGui.QColor(image.pixel(inside)) == relative_colour(1.0)
    # The colour scale itself: the best is deepest, worse is paler, a diverged member is dark.
    greens = [relative_colour(r).green() for r in (1.0, 1.5, 3.0)]
    lights = [relative_colour(r).lightness() for r in (1.0, 1.2, 1.5, 2.0, 3.0, 10.0)]
    assert lights == sorted(lights) and greens[0] < greens[-1]
    assert relative_colour(float("inf")).lightness() < relative_colour(1.0).lightness()
