"""SweepEntryView: a sweep entry's stability maps, threshold windows and plain sentences."""

from __future__ import annotations

import math

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from app.axes import LogAxis
from app.colors import method_color
from app.export import export_menu
from core.analysis import sentence, stability_map
from core.profile import NormProfile, profile_sentence
from core.sweep_model import DONE, FAILED, RUNNING, STOPPED, SweepEntryModel


class SweepEntryView(QtWidgets.QFrame):
    run_requested = QtCore.Signal(object)
    stop_requested = QtCore.Signal(object)
    selected = QtCore.Signal(object)
    sweep_drawn = QtCore.Signal()  # the plots of a finished sweep were (re)built

    def __init__(self, model: SweepEntryModel, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        self.model = model
        self.heatmaps: dict[str, np.ndarray] = {}  # what each map shows: log10 loss (B, threshold)
        self.setFrameShape(QtWidgets.QFrame.Shape.StyledPanel)
        self.setSizePolicy(
            QtWidgets.QSizePolicy.Policy.Ignored, QtWidgets.QSizePolicy.Policy.Preferred
        )
        layout = QtWidgets.QVBoxLayout(self)
        header = QtWidgets.QHBoxLayout()
        self.title_label = QtWidgets.QLabel(f"<b>{model.title}</b> (sweep)")
        header.addWidget(self.title_label)
        self.status_label = QtWidgets.QLabel()
        header.addWidget(self.status_label)
        header.addStretch(1)
        self.progress = QtWidgets.QProgressBar()
        self.progress.setMinimumWidth(220)
        header.addWidget(self.progress)
        self.run_button = QtWidgets.QPushButton("Run sweep")
        self.cancel_button = QtWidgets.QPushButton("Cancel")
        header.addWidget(self.run_button)
        header.addWidget(self.cancel_button)
        self.export_button = QtWidgets.QToolButton()
        self.export_button.setText("Export")
        self.export_button.setPopupMode(QtWidgets.QToolButton.ToolButtonPopupMode.InstantPopup)
        header.addWidget(self.export_button)
        layout.addLayout(header)
        self.sentences = QtWidgets.QLabel()
        self.sentences.setWordWrap(True)
        self.sentences.setTextFormat(QtCore.Qt.TextFormat.RichText)
        layout.addWidget(self.sentences)
        self.canvas = pg.GraphicsLayoutWidget()
        self.canvas.setMinimumHeight(0)
        layout.addWidget(self.canvas, 1)
        self.export_button.setMenu(export_menu(self, self.canvas, self.model))
        self.run_button.clicked.connect(lambda: self.run_requested.emit(self))
        self.cancel_button.clicked.connect(lambda: self.stop_requested.emit(self))
        model.subscribe(self._on_model_changed)
        self._update_status()

    def mousePressEvent(self, event: object) -> None:
        self.selected.emit(self)

    def detach(self) -> None:
        """Stop listening to the model (before the view is dropped)."""
        self.model.unsubscribe(self._on_model_changed)

    def refresh_if_dirty(self) -> None:
        self._update_status()

    def _on_model_changed(self, what: str) -> None:
        if what == "title":
            self.title_label.setText(f"<b>{self.model.title}</b> (sweep)")
        self._update_status()
        if what in ("status", "scenario"):
            self.show_results()

    def show_results(self) -> None:
        """The plots of a finished sweep of the current scenario; nothing otherwise."""
        if self.model.status == DONE and not self.model.stale:
            self._draw()
        else:
            self.canvas.clear()
            self.heatmaps = {}
            self.sentences.setText("")

    def _update_status(self) -> None:
        m = self.model
        self.progress.setMaximum(max(m.chunks_total, 1))
        self.progress.setValue(m.chunks_done)
        left = m.seconds_left()
        text = {RUNNING: "running", DONE: "finished", STOPPED: "cancelled", FAILED: "failed"}.get(
            m.status, "not run"
        )
        if left is not None:
            text += f", about {left:.0f} s left"
        if m.stale:
            text += " - stale: the scenario changed since this sweep, its plots are hidden"
        if m.status == FAILED and m.error:
            text += ": " + m.error.strip().splitlines()[-1]
        self.status_label.setText(text)
        self.run_button.setEnabled(m.status != RUNNING)
        self.cancel_button.setEnabled(m.status == RUNNING)

    def _draw(self) -> None:
        self.canvas.clear()
        self.heatmaps = {}
        rows = self.model.rows
        labels = list(self.model.results)
        colormap = pg.colormap.get("viridis")  # perceptually even and colour-blind safe
        for i, label in enumerate(labels):
            smap = stability_map(rows, label)
            values = np.log10(np.where(smap.diverged, np.nan, smap.loss))
            self.heatmaps[label] = values
            plot = self.canvas.addPlot(
                row=i // 2, col=(i % 2) * 2, title=f"{label}: final validation loss"
            )
            image = pg.ImageItem(values.T)  # x: threshold index, y: batch-size index
            image.setColorMap(colormap)
            finite = values[np.isfinite(values)]
            low, high = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
            image.setLevels((low, high if high > low else low + 1e-6))
            plot.addItem(image)
            plot.getAxis("bottom").setTicks(
                [
                    [
                        (j + 0.5, f"{t:.2g}")
                        for j, t in enumerate(smap.thresholds)
                        if j % max(1, len(smap.thresholds) // 5) == 0
                    ]
                ]
            )
            plot.getAxis("left").setTicks(
                [[(j + 0.5, str(b)) for j, b in enumerate(smap.batch_sizes)]]
            )
            plot.setLabel("bottom", "threshold (log grid)")
            plot.setLabel("left", "batch size")
            crossed = np.argwhere(smap.diverged)
            if len(crossed):
                plot.addItem(
                    pg.ScatterPlotItem(
                        crossed[:, 1] + 0.5,
                        crossed[:, 0] + 0.5,
                        symbol="x",
                        size=10,
                        pen="#FFFFFF",
                        brush="#FFFFFF",
                    )
                )
            bar = pg.ColorBarItem(
                values=(low, high),
                colorMap=colormap,
                label="log10 loss (x: diverged)",
                interactive=False,
            )
            bar.setImageItem(image, insert_in=plot)
        chart = self.canvas.addPlot(
            row=(len(labels) + 1) // 2,
            col=0,
            colspan=4,
            title="threshold windows against batch size (shaded: one threshold for all)",
            axisItems={"left": LogAxis("left")},
        )
        chart.setLogMode(x=True, y=True)
        sizes = sorted({w.batch_size for r in self.model.results.values() for w in r.windows})
        chart.getAxis("bottom").setTicks([[(math.log10(b), str(b)) for b in sizes]])
        chart.setLabel("bottom", "batch size")
        chart.setLabel("left", "threshold")
        chart.addLegend(offset=(10, -10), brush=(255, 255, 255, 210))  # low left: no window there
        for i, (label, result) in enumerate(self.model.results.items()):
            color = method_color(result.method)
            xs, ys = [], []
            for w in result.windows:
                if w.lower is None or w.upper is None:
                    continue
                x = w.batch_size * (1.0 + 0.08 * (i - (len(labels) - 1) / 2))
                xs += [x, x]
                ys += [w.lower, w.upper]
            chart.plot(xs, ys, connect="pairs", pen=pg.mkPen(color, width=4), name=label)
            if result.common is not None:
                lo, hi = result.common
                region = pg.LinearRegionItem(
                    values=(math.log10(lo), math.log10(hi)),
                    orientation="horizontal",
                    movable=False,
                    brush=pg.mkBrush(color + "33"),
                    pen=pg.mkPen(color + "88"),
                )
                chart.addItem(region)
        rows_used = (len(labels) + 1) // 2 + 1
        if self.model.profile is not None:
            self._draw_profile(self.model.profile, rows_used)
            rows_used += 1
        self.canvas.setMinimumHeight(330 * rows_used)
        lines = [sentence(w) for w in self.model.results.values()]
        if self.model.profile is not None:
            lines.append(profile_sentence(self.model.profile))
        self.sentences.setText("<br>".join(lines))
        self.sweep_drawn.emit()

    def _draw_profile(self, profile: NormProfile, row: int) -> None:
        """Predicted batch-mean gradient norm against B, with the thresholds drawn across it."""
        plot = self.canvas.addPlot(
            row=row,
            col=0,
            colspan=4,
            title=f"norm profile at step {profile.checkpoint_step}: "
            "expected batch-mean gradient norm, clean data",
            axisItems={"left": LogAxis("left")},
        )
        plot.setLogMode(x=True, y=True)
        low, high = min(profile.batch_sizes), max(profile.batch_sizes)
        xs = np.geomspace(max(1, low / 2), min(high * 2, profile.population), 60)
        ys = [math.sqrt(profile.predicted_sq(float(b))) for b in xs]
        plot.addLegend(offset=(-10, 10), brush=(255, 255, 255, 210))
        plot.plot(xs, ys, pen=pg.mkPen("#000000", width=2), name="sqrt(|G|^2 + tr(Sigma)/B)")
        plot.plot(
            xs,
            np.full(len(xs), math.sqrt(max(profile.grad_sq, 1e-300))),
            pen=pg.mkPen("#777777", width=1, style=QtCore.Qt.PenStyle.DashLine),
            name="|G|, the mean gradient",
        )
        for label, threshold in profile.thresholds.items():
            clip = next((c for c in self.model.scenario.clip if c.display_name == label), None)
            color = method_color(clip.method if clip else "global-norm")
            plot.plot(
                xs,
                np.full(len(xs), threshold),
                pen=pg.mkPen(color, width=2, style=QtCore.Qt.PenStyle.DotLine),
                name=f"{label} threshold {threshold:g}",
            )
        hiding = profile.hiding_batch
        if hiding is not None and xs[0] <= hiding <= xs[-1]:
            line = pg.InfiniteLine(
                pos=math.log10(hiding),
                angle=90,
                pen=pg.mkPen("#D55E00", width=1, style=QtCore.Qt.PenStyle.DashLine),
                label=f"outliers hidden past B = {hiding:.0f}",
                labelOpts={"position": 0.85, "color": "#D55E00"},
            )
            plot.addItem(line)
        plot.getAxis("bottom").setTicks([[(math.log10(b), str(b)) for b in profile.batch_sizes]])
        plot.setLabel("bottom", "batch size")
        plot.setLabel("left", "L2 norm")
