"""FanView: a fan entry's fence, its live plots and a readout, with threshold and batch-size
scrubbing. Keeps no copy of the model, only which member is on display."""

from __future__ import annotations

import math
import time

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from app.axes import tick_text
from app.colors import method_color
from app.entry_header import EntryHeader
from app.export import export_menu
from app.fan_plots import FanPlots
from app.fence import FenceView
from core.fan import FAN_SIZE, fan_factors, member_for
from core.fan_model import FanModel, StackData, clip_regime
from core.scenario import ClipConfig

LIVE_S = 0.2  # while records stream in, the plots redraw at most 5 times a second


class FanView(QtWidgets.QFrame):
    """Shows one FanModel."""

    train_requested = QtCore.Signal(object, float)  # the view, the slider's factor
    stop_requested = QtCore.Signal(object)
    selected = QtCore.Signal(object)

    def __init__(self, model: FanModel, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        self.model = model
        self.redraws = 0  # plot refreshes, for the UI benchmark
        self._dirty = False
        self._drawn_at = 0.0  # time.monotonic() of the last refresh
        self.setMinimumHeight(1000)
        self.setSizePolicy(
            QtWidgets.QSizePolicy.Policy.Ignored, QtWidgets.QSizePolicy.Policy.Preferred
        )
        layout = QtWidgets.QVBoxLayout(self)
        layout.setContentsMargins(6, 2, 6, 6)

        self.header = EntryHeader(
            "Train", "Train this fan: every method at 17 thresholds, 4 batch sizes"
        )
        layout.addLayout(self.header)
        self.state_label = self.header.state_label
        self.train_button, self.stop_button = self.header.train_button, self.header.stop_button

        self.fence = FenceView(model)
        layout.addWidget(self.fence)

        controls = QtWidgets.QHBoxLayout()
        controls.addWidget(QtWidgets.QLabel("Batch size"))
        self.batch_box = QtWidgets.QComboBox()
        controls.addWidget(self.batch_box)
        controls.addSpacing(12)
        controls.addWidget(QtWidgets.QLabel("Thresholds"))
        self.slider = QtWidgets.QSlider(QtCore.Qt.Orientation.Horizontal)
        self.slider.setRange(0, FAN_SIZE - 1)
        self.slider.setValue(FAN_SIZE // 2)
        self.slider.setToolTip(
            "Every method's threshold, scaled alike on a log scale: 1/30 to 30 times the "
            "threshold its [[clip]] table gives."
        )
        controls.addWidget(self.slider, 1)
        self.factor_box = QtWidgets.QDoubleSpinBox()
        self.factor_box.setDecimals(3)
        self.factor_box.setRange(float(fan_factors()[0]), float(fan_factors()[-1]))
        self.factor_box.setValue(1.0)
        self.factor_box.setPrefix("× ")
        self.factor_box.setToolTip("The scale of every threshold: 1 is the entry's own")
        controls.addWidget(self.factor_box)
        layout.addLayout(controls)
        self.method_checks: dict[str, QtWidgets.QCheckBox] = {}
        self.methods_row = QtWidgets.QHBoxLayout()
        self.methods_row.addWidget(QtWidgets.QLabel("Show"))
        self.methods_row.addStretch(1)
        layout.addLayout(self.methods_row)

        self.readout = QtWidgets.QLabel()
        self.readout.setWordWrap(True)
        self.readout.setTextFormat(QtCore.Qt.TextFormat.RichText)
        layout.addWidget(self.readout)
        self.hover_label = QtWidgets.QLabel(" ")
        self.hover_label.setStyleSheet("color: #5C5C5C")
        layout.addWidget(self.hover_label)

        self.canvas = FanPlots()
        layout.addWidget(self.canvas, 1)

        self.header.export_button.setMenu(export_menu(self, self.canvas, self.model))
        self._build_curves()

        self.train_button.clicked.connect(lambda: self.train_requested.emit(self, self.factor))
        self.stop_button.clicked.connect(lambda: self.stop_requested.emit(self))
        self.slider.valueChanged.connect(self._on_slider_changed)
        self.factor_box.editingFinished.connect(self._on_factor_changed)
        self.batch_box.currentIndexChanged.connect(lambda _: self._on_selection_changed())
        self.fence.chosen.connect(self._on_fence_chosen)
        self._hover = pg.SignalProxy(
            self.plots["loss"].scene().sigMouseMoved, rateLimit=30, slot=self._on_mouse_moved
        )
        model.subscribe(self._on_model_changed)
        self._fill_batches()
        self._update_state()
        self.refresh()

    def use_columns(self, columns: int) -> None:
        """Lay the plots out in `columns` columns (2 in a study, 3 on a wide slide)."""
        self.canvas.use_columns(columns)

    @property
    def plots(self) -> dict[str, pg.PlotItem]:
        return self.canvas.plots

    @property
    def curves(self) -> dict[tuple[str, str], pg.PlotDataItem]:
        return self.canvas.curves

    @property
    def faded(self) -> dict[tuple[str, str], pg.PlotDataItem]:
        return self.canvas.faded

    @property
    def hist_clean(self) -> pg.PlotDataItem:
        return self.canvas.hist_clean

    # -- model -> view -----------------------------------------------------------------------

    def _on_model_changed(self, what: str) -> None:
        if what == "scenario":
            self._build_curves()
            self._fill_batches()
            self.fence.refresh()
        if what in ("scenario", "status"):
            self._update_state()
        self._dirty = True  # the window's redraw timer calls refresh, never each record
        if what != "data":
            self.refresh()

    def detach(self) -> None:
        """Stop listening to the model (before the view is dropped)."""
        self.model.unsubscribe(self._on_model_changed)

    def refresh_if_dirty(self) -> bool:
        """Redraw for records that arrived, at most every LIVE_S; whether it redrew."""
        if not self._dirty or time.monotonic() - self._drawn_at < LIVE_S:
            return False
        self.refresh()
        return True

    def headline(self) -> str:
        """The entry's headline figure: the best member at the entry's own batch size."""
        batch = self.model.scenario.train.batch_size
        stack = self.model.shown_stack(batch) or self.model.shown_stack(self.batch_size)
        if stack is None:
            return self.model.state_text()
        last = stack.values["val_loss"][-1] if stack.done else None
        if last is None or not np.isfinite(last).any():
            return self.model.state_text()
        best = int(np.nanargmin(np.where(np.isfinite(last), last, np.nan)))
        member = stack.members[best]
        at = "" if math.isnan(member.threshold) else f" at {tick_text(member.threshold)}"
        return f"best at B={stack.batch_size}: {member.name}{at}, loss {last[best]:.3g}"

    def _labels(self) -> list[tuple[ClipConfig, int]]:
        """Each [[clip]] table with the occurrence of its method (for the line style)."""
        seen: dict[str, int] = {}
        out = []
        for clip in self.model.scenario.clip:
            seen[clip.method] = seen.get(clip.method, -1) + 1
            out.append((clip, seen[clip.method]))
        return out

    def _build_curves(self) -> None:
        # Members switched off stay off through an edit of the scenario.
        off = {label for label, check in self.method_checks.items() if not check.isChecked()}
        self.canvas.build(self._labels())
        for check in self.method_checks.values():
            self.methods_row.removeWidget(check)
            check.deleteLater()
        self.method_checks = {}
        for clip, _ in self._labels():
            label, color = clip.display_name, method_color(clip.method)
            check = QtWidgets.QCheckBox(label)
            check.setChecked(label not in off)
            if label in off:
                self.canvas.set_visible(label, False)
            check.setStyleSheet(f"color: {color}")
            check.toggled.connect(lambda on, name=label: self.canvas.set_visible(name, on))
            self.methods_row.insertWidget(self.methods_row.count() - 1, check)
            self.method_checks[label] = check

    def _fill_batches(self) -> None:
        current = self.batch_box.currentText()
        self.batch_box.blockSignals(True)
        self.batch_box.clear()
        sizes = [str(b) for b in self.model.batch_sizes]
        self.batch_box.addItems(sizes)
        preset = str(self.model.scenario.train.batch_size)
        self.batch_box.setCurrentText(current if current in sizes else preset)
        self.batch_box.blockSignals(False)
        self.fence.set_selection(self.batch_size, self.slider.value())

    def _update_state(self) -> None:
        m = self.model
        text = m.state_text()
        if m.status == "training":
            text += f": {m.progress_text()}"
        self.header.show_state(text, m.edited or m.status == "failed", m.status == "training")

    # -- selection ---------------------------------------------------------------------------

    @property
    def batch_size(self) -> int:
        text = self.batch_box.currentText()
        return int(text) if text else self.model.scenario.train.batch_size

    @property
    def factor(self) -> float:
        return float(fan_factors()[self.slider.value()])

    def set_factor(self, factor: float) -> None:
        """Move the threshold selection to the fan member nearest `factor` x the entry's."""
        position = int(np.argmin(np.abs(np.log(fan_factors()) - math.log(max(factor, 1e-12)))))
        self.slider.setValue(position)

    def set_batch_size(self, batch: int) -> None:
        self.batch_box.setCurrentText(str(batch))

    def member_index(self, label: str) -> int | None:
        stack = self.model.stacks.get(self.batch_size)
        if stack is None:
            return None
        return member_for(stack.members, label, self.factor)

    def _on_slider_changed(self, _: int) -> None:
        self.factor_box.blockSignals(True)
        self.factor_box.setValue(self.factor)
        self.factor_box.blockSignals(False)
        self._on_selection_changed()

    def _on_factor_changed(self) -> None:
        self.set_factor(self.factor_box.value())

    def _on_selection_changed(self) -> None:
        self.fence.set_selection(self.batch_size, self.slider.value())
        self.refresh()

    def _on_fence_chosen(self, batch: int, position: int) -> None:
        self.batch_box.blockSignals(True)
        self.set_batch_size(batch)
        self.batch_box.blockSignals(False)
        if position != self.slider.value():
            self.slider.setValue(position)  # refreshes
        else:
            self._on_selection_changed()

    def mousePressEvent(self, event: object) -> None:
        self.selected.emit(self)

    # -- drawing -----------------------------------------------------------------------------

    def refresh(self) -> None:
        """Point every curve at the selected members; one setData per curve."""
        self._dirty = False
        self._drawn_at = time.monotonic()
        self.redraws += 1
        current = self.model.current_stack(self.batch_size)
        earlier = self.model.earlier_stack(self.batch_size)
        lines = []
        for clip, _ in self._labels():
            label = clip.display_name
            self.canvas.draw_member(False, current, label, self.factor)
            self.canvas.draw_member(True, earlier, label, self.factor)
            if current is not None:
                lines.append(self._readout_line(current, clip))
        self.canvas.draw_histogram(
            current or earlier,
            [c for c, _ in self._labels()],
            self.factor,
            lambda label: self.method_checks[label].isChecked(),
            faded=current is None,
        )
        self.fence.update()
        head = f"Batch size {self.batch_size}, thresholds × {self.factor:.3g}"
        if current is None and earlier is not None:
            head += " (faded: before the edit; train to see the edited scenario)"
        elif current is None:
            head += ": not trained yet"
        self.readout.setText(head + ("<br>" + "<br>".join(lines) if lines else ""))

    def _readout_line(self, stack: StackData, clip: ClipConfig) -> str:
        label = clip.display_name
        i = member_for(stack.members, label, self.factor)
        v, rows = stack.values, slice(0, stack.rows(i))
        color = method_color(clip.method)
        name = f'<span style="color:{color}"><b>{label}</b></span>'
        if stack.rows(i) == 0:
            return f"{name}: not trained yet"
        last = stack.rows(i) - 1
        final = v["val_loss"][last, i]
        finals = np.array(
            [
                v["val_loss"][stack.rows(j) - 1, j]
                for j in range(len(stack.members))
                if stack.rows(j)
            ]
        )
        best = np.nanmin(finals) if np.isfinite(finals).any() else math.nan
        diverged = bool(v["diverged"][last, i] > 0)
        word = "final" if stack.finished[i] else "latest"
        if diverged:
            result = "diverged"
        else:
            result = f"{word} loss {final:.4g} ({final / best:.2f} x the best at this batch size)"
        if clip.method == "none":
            return f"{name}: {result}; outliers pass unchanged"
        threshold = stack.members[i].threshold
        at = "" if math.isnan(threshold) else f" at {tick_text(threshold)}"
        if clip.rule != "fixed":
            at = f" ({clip.rule} rule)"
        share = _finite_mean(v["clipped_share"][rows, i])
        passed = _finite_mean(v["outlier_pass"][rows, i])
        through = "no outliers seen yet" if math.isnan(passed) else f"{passed:.0%}"
        return (
            f"{name}{at}: {clip_regime(share, clip.spec.counts)}; outlier pass-through "
            f"{through}; {result}"
        )

    def _on_mouse_moved(self, event: tuple[object]) -> None:
        stack = self.model.current_stack(self.batch_size)
        plot = self.plots["loss"]
        position = event[0]
        if stack is None or not plot.sceneBoundingRect().contains(position):
            return
        step = plot.vb.mapSceneToView(position).x()
        row = int(np.nanargmin(np.abs(stack.steps - step)))
        parts = [f"step {int(stack.steps[row])}"]
        for clip, _ in self._labels():
            i = member_for(stack.members, clip.display_name, self.factor)
            if row < stack.rows(i):
                parts.append(
                    f"{clip.display_name}: loss {stack.values['val_loss'][row, i]:.4g}, "
                    f"norm {stack.values['grad_norm_pre'][row, i]:.3g}"
                )
        self.hover_label.setText("  |  ".join(parts))


def _finite_mean(values: np.ndarray) -> float:
    finite = values[np.isfinite(values)]
    return float(finite.mean()) if finite.size else math.nan
