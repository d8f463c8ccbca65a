"""RunEntryView: live plots of a run entry's fan, with threshold and batch-size scrubbing."""

from __future__ import annotations

import math

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from app.axes import LogAxis
from app.colors import CLEAN_COLOR, LINE_STYLES, OUTLIER_COLOR, method_color
from app.export import export_menu
from core.fan import FAN_SIZE, fan_factors, member_for
from core.run_model import DONE, FAILED, RUNNING, STOPPED, RunEntryModel, StackData, regime

pg.setConfigOptions(background="w", foreground="k", antialias=False)

PLOTS = (
    ("loss", "clean validation loss", "loss"),
    ("norms", "batch gradient norm", "L2 norm: pre solid, post dashed"),
    ("clipped", "clipped share", "share of examples / units / steps"),
    ("outliers", "outliers in the update", "share solid, pass-through dashed"),
)


class RunEntryView(QtWidgets.QFrame):
    """Shows one RunEntryModel; keeps no copy of it, only which member is on display."""

    run_requested = QtCore.Signal(object)
    stop_requested = QtCore.Signal(object)
    selected = QtCore.Signal(object)

    def __init__(self, model: RunEntryModel, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        self.model = model
        self.redraws = 0  # plot refreshes, for the UI benchmark
        self._dirty = False
        self.setFrameShape(QtWidgets.QFrame.Shape.StyledPanel)
        self.setMinimumHeight(900)
        self.setSizePolicy(
            QtWidgets.QSizePolicy.Policy.Ignored, QtWidgets.QSizePolicy.Policy.Preferred
        )
        layout = QtWidgets.QVBoxLayout(self)

        header = QtWidgets.QHBoxLayout()
        self.title_label = QtWidgets.QLabel(f"<b>{model.title}</b>")
        self.status_label = QtWidgets.QLabel()
        self.run_button = QtWidgets.QPushButton("Run")
        self.stop_button = QtWidgets.QPushButton("Stop")
        self.reset_button = QtWidgets.QPushButton("Reset")
        for widget in (self.title_label, self.status_label):
            header.addWidget(widget)
        header.addStretch(1)
        self.export_button = QtWidgets.QToolButton()
        self.export_button.setText("Export")
        self.export_button.setPopupMode(QtWidgets.QToolButton.ToolButtonPopupMode.InstantPopup)
        for button in (self.run_button, self.stop_button, self.reset_button, self.export_button):
            header.addWidget(button)
        layout.addLayout(header)

        controls = QtWidgets.QHBoxLayout()
        controls.addWidget(QtWidgets.QLabel("batch size"))
        self.batch_box = QtWidgets.QComboBox()
        controls.addWidget(self.batch_box)
        controls.addWidget(QtWidgets.QLabel("threshold x preset"))
        self.slider = QtWidgets.QSlider(QtCore.Qt.Orientation.Horizontal)
        self.slider.setRange(0, FAN_SIZE - 1)
        self.slider.setValue(FAN_SIZE // 2)
        self.slider.setToolTip("Log scale: each step multiplies every method's threshold alike.")
        controls.addWidget(self.slider, 1)
        self.factor_box = QtWidgets.QDoubleSpinBox()
        self.factor_box.setDecimals(3)
        self.factor_box.setRange(float(fan_factors()[0]), float(fan_factors()[-1]))
        self.factor_box.setValue(1.0)
        self.factor_box.setSuffix(" x")
        controls.addWidget(self.factor_box)
        layout.addLayout(controls)
        self.method_checks: dict[str, QtWidgets.QCheckBox] = {}
        self.methods_row = QtWidgets.QHBoxLayout()
        self.methods_row.addWidget(QtWidgets.QLabel("show"))
        layout.addLayout(self.methods_row)

        self.readout = QtWidgets.QLabel()
        self.readout.setWordWrap(True)
        self.readout.setTextFormat(QtCore.Qt.TextFormat.RichText)
        layout.addWidget(self.readout)
        self.hover_label = QtWidgets.QLabel(" ")
        layout.addWidget(self.hover_label)

        self.canvas = pg.GraphicsLayoutWidget()
        self.canvas.setMinimumHeight(700)
        layout.addWidget(self.canvas, 1)
        self.plots: dict[str, pg.PlotItem] = {}
        for i, (key, title, unit) in enumerate(PLOTS):
            axes = {"left": LogAxis("left")} if key in ("loss", "norms") else None
            plot = self.canvas.addPlot(row=i // 2, col=i % 2, title=title, axisItems=axes)
            plot.setLabel("bottom", "step")
            plot.setLabel("left", unit)
            plot.showGrid(x=False, y=False)
            plot.setClipToView(True)
            plot.setDownsampling(mode="peak", auto=True)
            plot.getAxis("left").enableAutoSIPrefix(False)
            plot.addLegend(offset=(-10, 10), labelTextSize="8pt", brush=(255, 255, 255, 210))
            self.plots[key] = plot
        for col in range(2):
            self.canvas.ci.layout.setColumnStretchFactor(col, 1)
        self.plots["norms"].setLogMode(y=True)
        self.plots["loss"].setLogMode(y=True)
        hist = self.canvas.addPlot(
            row=2, col=0, colspan=2, title="per-example gradient norms, latest step"
        )
        hist.setLabel("bottom", "per-example gradient norm (log10)")
        hist.setLabel("left", "examples")
        hist.getAxis("left").enableAutoSIPrefix(False)
        hist.addLegend(offset=(10, 10), labelTextSize="8pt", brush=(255, 255, 255, 210))
        self.plots["hist"] = hist
        self.hist_clean, self.hist_outlier = (
            hist.plot([0, 1], [0], stepMode="center", fillLevel=0, brush=c + "99", pen=c, name=n)
            for c, n in ((CLEAN_COLOR, "clean"), (OUTLIER_COLOR, "outliers"))
        )
        self.hist_line = pg.InfiniteLine(
            angle=90, pen=pg.mkPen("#000000", width=2, style=QtCore.Qt.PenStyle.DashLine)
        )
        hist.addItem(self.hist_line)

        self.export_button.setMenu(export_menu(self, self.canvas, self.model))
        self.curves: dict[tuple[str, str], pg.PlotDataItem] = {}
        self.threshold_lines: dict[str, pg.InfiniteLine] = {}
        self._build_curves()

        self.run_button.clicked.connect(lambda: self.run_requested.emit(self))
        self.stop_button.clicked.connect(lambda: self.stop_requested.emit(self))
        self.reset_button.clicked.connect(self.model.reset)
        self.slider.valueChanged.connect(self._on_slider_changed)
        self.factor_box.editingFinished.connect(self._on_factor_changed)
        self.batch_box.currentIndexChanged.connect(lambda _: self.refresh())
        self._hover = pg.SignalProxy(
            self.plots["loss"].scene().sigMouseMoved, rateLimit=30, slot=self._on_mouse_moved
        )
        model.subscribe(self._on_model_changed)
        self._fill_batches()
        self._update_status()
        self.refresh()

    # -- model -> view -----------------------------------------------------------------------

    def _on_model_changed(self, what: str) -> None:
        if what == "title":
            self.title_label.setText(f"<b>{self.model.title}</b>")
            return
        if what == "scenario":
            self._build_curves()
            self._fill_batches()
        if what in ("scenario", "status"):
            self._update_status()
        self._dirty = True  # the window's redraw timer calls refresh, never each record
        if what != "data":
            self.refresh()

    def detach(self) -> None:
        """Stop listening to the model (before the view is dropped)."""
        self.model.unsubscribe(self._on_model_changed)

    def refresh_if_dirty(self) -> None:
        if self._dirty:
            self.refresh()

    def _labels(self) -> list[tuple[str, str, int]]:
        """(label, method, occurrence of that method) per [[clip]] table."""
        seen: dict[str, int] = {}
        out = []
        for clip in self.model.scenario.clip:
            seen[clip.method] = seen.get(clip.method, -1) + 1
            out.append((clip.display_name, clip.method, seen[clip.method]))
        return out

    def _build_curves(self) -> None:
        for key in ("loss", "norms", "clipped", "outliers"):
            plot = self.plots[key]
            plot.clear()
            if plot.legend is not None:
                plot.legend.clear()
        self.curves, self.threshold_lines = {}, {}
        for check in self.method_checks.values():
            self.methods_row.removeWidget(check)
            check.deleteLater()
        self.method_checks = {}
        for label, method, occurrence in self._labels():
            color = method_color(method)
            style = LINE_STYLES[occurrence % len(LINE_STYLES)]
            solid = pg.mkPen(color, width=2, style=style)
            dashed = pg.mkPen(color, width=2, style=QtCore.Qt.PenStyle.DashLine)
            self.curves[(label, "loss")] = self.plots["loss"].plot(name=label, pen=solid)
            self.curves[(label, "pre")] = self.plots["norms"].plot(name=label, pen=solid)
            self.curves[(label, "post")] = self.plots["norms"].plot(pen=dashed)
            self.curves[(label, "clipped")] = self.plots["clipped"].plot(name=label, pen=solid)
            self.curves[(label, "share")] = self.plots["outliers"].plot(
                name=label, pen=solid, connect="finite"
            )
            self.curves[(label, "pass")] = self.plots["outliers"].plot(pen=dashed, connect="finite")
            if method != "none":
                line = pg.InfiniteLine(
                    angle=0, pen=pg.mkPen(color, width=1, style=QtCore.Qt.PenStyle.DotLine)
                )
                self.plots["norms"].addItem(line)
                self.threshold_lines[label] = line
            check = QtWidgets.QCheckBox(label)
            check.setChecked(True)
            check.setStyleSheet(f"color: {color}")
            check.toggled.connect(lambda on, name=label: self._on_method_toggled(name, on))
            self.methods_row.addWidget(check)
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

    def _update_status(self) -> None:
        m = self.model
        text = {RUNNING: "training", DONE: "finished", STOPPED: "stopped", FAILED: "failed"}.get(
            m.status, "not run"
        )
        if m.stale:
            text += " - stale: the scenario changed since this run, its plots are hidden"
        if m.status == FAILED:
            text += f": {m.error.strip().splitlines()[-1] if m.error else ''}"
        self.status_label.setText(text)
        color = "#B00000" if m.stale or m.status == FAILED else "#333333"
        self.status_label.setStyleSheet(f"color: {color}")
        self.run_button.setEnabled(m.status != RUNNING)
        self.stop_button.setEnabled(m.status == RUNNING)

    # -- selection ---------------------------------------------------------------------------

    @property
    def batch_size(self) -> int:
        text = self.batch_box.currentText()
        return int(text) if text else self.model.scenario.train.batch_size

    @property
    def factor(self) -> float:
        return float(fan_factors()[self.slider.value()])

    def set_factor(self, factor: float) -> None:
        """Move the threshold selection to the fan member nearest `factor` x the preset's."""
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
        self.refresh()

    def _on_factor_changed(self) -> None:
        self.set_factor(self.factor_box.value())

    def _on_method_toggled(self, label: str, visible: bool) -> None:
        for (name, _), curve in self.curves.items():
            if name == label:
                curve.setVisible(visible)
        if label in self.threshold_lines:
            self.threshold_lines[label].setVisible(visible)

    def mousePressEvent(self, event: object) -> None:
        self.selected.emit(self)

    # -- drawing -----------------------------------------------------------------------------

    def refresh(self) -> None:
        """Point every curve at the selected members; one setData per curve."""
        self._dirty = False
        self.redraws += 1
        # Results of another scenario are never drawn: an edit clears the plots until a new run
        # (or an undo back to the scenario they belong to).
        stack = None if self.model.stale else self.model.stacks.get(self.batch_size)
        lines = []
        for label, method, _ in self._labels():
            clip = next(c for c in self.model.scenario.clip if c.display_name == label)
            if stack is None or stack.filled == 0:
                for key in ("loss", "pre", "post", "clipped", "share", "pass"):
                    self.curves[(label, key)].setData([], [])
                continue
            i = member_for(stack.members, label, self.factor)
            rows = slice(0, stack.filled)
            x = stack.steps[rows]
            v = stack.values
            self.curves[(label, "loss")].setData(x, v["val_loss"][rows, i])
            self.curves[(label, "pre")].setData(x, v["grad_norm_pre"][rows, i])
            self.curves[(label, "post")].setData(x, v["grad_norm_post"][rows, i])
            self.curves[(label, "clipped")].setData(x, v["clipped_share"][rows, i])
            self.curves[(label, "share")].setData(x, v["outlier_share"][rows, i])
            self.curves[(label, "pass")].setData(x, v["outlier_pass"][rows, i])
            threshold = stack.members[i].threshold
            if label in self.threshold_lines and method in (
                "global-norm",
                "microbatch-norm",
                "example-norm",
            ):
                self.threshold_lines[label].setPos(math.log10(threshold) if threshold > 0 else 0)
                self.threshold_lines[label].setVisible(self.method_checks[label].isChecked())
            elif label in self.threshold_lines:
                self.threshold_lines[label].setVisible(
                    False
                )  # AGC ratios, value bounds: other units
            lines.append(self._readout_line(stack, label, method, clip.rule, i))
        self._draw_histogram(stack)
        header = f"batch size {self.batch_size}, thresholds {self.factor:.3g} x preset"
        empty = (
            ": the results belong to an earlier scenario; run again, or undo the edit"
            if self.model.stale
            else ": not run yet"
        )
        self.readout.setText(header + "<br>" + "<br>".join(lines) if lines else header + empty)

    def _readout_line(self, stack: StackData, label: str, method: str, rule: str, i: int) -> str:
        v, rows = stack.values, slice(0, stack.filled)
        share = _finite_mean(v["clipped_share"][rows, i])
        passed = _finite_mean(v["outlier_pass"][rows, i])
        final = v["val_loss"][stack.filled - 1, i]
        same = [j for j, m in enumerate(stack.members) if m.name == label]
        finals = v["val_loss"][stack.filled - 1, same]
        best = np.nanmin(finals) if np.isfinite(finals).any() else math.nan
        color = method_color(method)
        threshold = stack.members[i].threshold
        thr = (
            ""
            if math.isnan(threshold)
            else f" at {threshold:.3g}" + ("" if rule == "fixed" else f" ({rule} rule)")
        )
        diverged = bool(v["diverged"][stack.filled - 1, i] > 0)
        result = "diverged" if diverged else f"final loss {final:.4g} (best in fan {best:.4g})"
        if method == "none":
            name = f'<span style="color:{color}"><b>{label}</b></span>'
            return f"{name}: {result}, outliers pass unchanged"
        return (
            f'<span style="color:{color}"><b>{label}</b></span>{thr}: {regime(share)}, clips '
            f"{share:.0%}; outlier pass-through {_pct(passed)}; {result}"
        )

    def _draw_histogram(self, stack: StackData | None) -> None:
        labels = [(label, method) for label, method, _ in self._labels() if method != "none"]
        empty = stack is None or stack.example_norms is None or stack.outlier is None or not labels
        for item in (self.hist_clean, self.hist_outlier, self.hist_line):
            item.setVisible(not empty)
        if empty or stack is None or stack.example_norms is None or stack.outlier is None:
            return
        label, method = next(((lab, m) for lab, m in labels if m == "example-norm"), labels[0])
        i = member_for(stack.members, label, self.factor)
        norms, flags = stack.example_norms[i], stack.outlier[i]
        finite = np.isfinite(norms) & (norms > 0)
        logs = np.log10(norms[finite])
        if logs.size == 0:
            return
        edges = np.linspace(logs.min() - 0.05, logs.max() + 0.05, 31)
        clean, _ = np.histogram(logs[~flags[finite]], edges)
        outlier, _ = np.histogram(logs[flags[finite]], edges)
        self.hist_clean.setData(edges, clean)
        self.hist_outlier.setData(edges, outlier)
        threshold = stack.members[i].threshold
        self.hist_line.setVisible(method == "example-norm" and threshold > 0)
        if threshold > 0:
            self.hist_line.setPos(math.log10(threshold))
        self.plots["hist"].setTitle(
            f"per-example gradient norms at the latest logged step ({label} member)"
        )

    def _on_mouse_moved(self, event: tuple[object]) -> None:
        stack = self.model.stacks.get(self.batch_size)
        plot = self.plots["loss"]
        position = event[0]
        if stack is None or stack.filled == 0 or not plot.sceneBoundingRect().contains(position):
            return
        step = plot.vb.mapSceneToView(position).x()
        row = int(np.nanargmin(np.abs(stack.steps[: stack.filled] - step)))
        parts = [f"step {int(stack.steps[row])}"]
        for label, _, _ in self._labels():
            i = member_for(stack.members, label, self.factor)
            parts.append(
                f"{label}: loss {stack.values['val_loss'][row, i]:.4g}, "
                f"norm {stack.values['grad_norm_pre'][row, i]:.3g}"
            )
        self.hover_label.setText("  |  ".join(parts))


def _finite_mean(values: np.ndarray) -> float:
    finite = values[np.isfinite(values)]
    return float(finite.mean()) if finite.size else math.nan


def _pct(value: float) -> str:
    return "n/a (no outliers seen)" if math.isnan(value) else f"{value:.0%}"
