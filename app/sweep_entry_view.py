"""SweepEntryView: a sweep entry's stability maps, threshold windows and plain sentences."""

from __future__ import annotations

import math

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from app.colors import method_color
from app.export import export_menu
from core.analysis import sentence, stability_map
from core.sweep_model import DONE, FAILED, RUNNING, STOPPED, SweepEntryModel


class SweepEntryView(QtWidgets.QFrame):
    run_requested = QtCore.Signal(object)
    stop_requested = QtCore.Signal(object)
    selected = QtCore.Signal(object)

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
        header.addWidget(QtWidgets.QLabel(f"<b>{model.title}</b> (sweep)"))
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

    def refresh_if_dirty(self) -> None:
        self._update_status()

    def _on_model_changed(self, what: str) -> None:
        self._update_status()
        if what == "status" and self.model.status == DONE:
            self._draw()

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
            text += " - scenario changed since this sweep: results are stale, run again"
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
        )
        chart.setLogMode(x=True, y=True)
        sizes = sorted({w.batch_size for r in self.model.results.values() for w in r.windows})
        chart.getAxis("bottom").setTicks([[(math.log10(b), str(b)) for b in sizes]])
        chart.setLabel("bottom", "batch size")
        chart.setLabel("left", "threshold")
        chart.addLegend(offset=(10, 10), brush=(255, 255, 255, 210))
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
        self.canvas.setMinimumHeight(330 * ((len(labels) + 1) // 2 + 1))
        self.sentences.setText("<br>".join(sentence(w) for w in self.model.results.values()))
