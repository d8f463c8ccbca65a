"""MapView: a map entry's stability maps, threshold windows, norm profile and plain sentences."""

from __future__ import annotations

import math

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from app.axes import LogAxis, PlainAxis, tick_text
from app.colors import method_color
from app.entry_header import EntryHeader
from app.export import export_menu
from core.analysis import MethodWindows, StabilityMap, sentence, stability_map
from core.map_model import MapModel
from core.profile import NormProfile, profile_sentence

FADED = 0.3  # opacity of the plots of an earlier scenario


class MapView(QtWidgets.QFrame):
    train_requested = QtCore.Signal(object, float)  # the view; the factor is unused for maps
    stop_requested = QtCore.Signal(object)
    selected = QtCore.Signal(object)
    drawn = QtCore.Signal()  # the plots of a finished map were (re)built

    def __init__(self, model: MapModel, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        self.model = model
        self.heatmaps: dict[str, np.ndarray] = {}  # what each map shows: log10 loss (B, threshold)
        self.levels: tuple[float, float] = (0.0, 1.0)  # the one colour range of every map
        self.setSizePolicy(
            QtWidgets.QSizePolicy.Policy.Ignored, QtWidgets.QSizePolicy.Policy.Preferred
        )
        layout = QtWidgets.QVBoxLayout(self)
        layout.setContentsMargins(6, 2, 6, 6)
        self.header = EntryHeader(
            "Train", "Train the whole map: every batch size, threshold and seed"
        )
        self.progress = QtWidgets.QProgressBar()
        self.progress.setMinimumWidth(220)
        self.header.insertWidget(1, self.progress)
        layout.addLayout(self.header)
        self.state_label = self.header.state_label
        self.train_button, self.stop_button = self.header.train_button, self.header.stop_button
        self.sentences = QtWidgets.QLabel()
        self.sentences.setWordWrap(True)
        self.sentences.setTextFormat(QtCore.Qt.TextFormat.RichText)
        layout.addWidget(self.sentences)
        self.canvas = pg.GraphicsLayoutWidget()
        self.canvas.setMinimumHeight(0)
        layout.addWidget(self.canvas, 1)
        self.header.export_button.setMenu(export_menu(self, self.canvas, self.model))
        self.train_button.clicked.connect(lambda: self.train_requested.emit(self, 1.0))
        self.stop_button.clicked.connect(lambda: self.stop_requested.emit(self))
        model.subscribe(self._on_model_changed)
        self._update_state()
        self.show_results()

    def mousePressEvent(self, event: object) -> None:
        self.selected.emit(self)

    def detach(self) -> None:
        """Stop listening to the model (before the view is dropped)."""
        self.model.unsubscribe(self._on_model_changed)

    def refresh_if_dirty(self) -> None:
        self._update_state()

    def refresh(self) -> None:
        self._update_state()

    def headline(self) -> str:
        """The entry's headline figure: each method's verdict on one threshold for all sizes."""
        if not self.model.results:
            return self.model.state_text()
        parts = []
        for w in self.model.results.values():
            if w.common is None:
                parts.append(f"{w.label}: no common window")
            else:
                parts.append(f"{w.label}: {tick_text(w.common[0])} to {tick_text(w.common[1])}")
        return "; ".join(parts)

    def _on_model_changed(self, what: str) -> None:
        self._update_state()
        if what in ("status", "scenario"):
            self.show_results()

    def show_results(self) -> None:
        """The plots of the latest finished map; faded when the scenario changed since."""
        if self.model.results:
            self._draw()
        else:
            self.canvas.clear()
            self.heatmaps = {}
            self.sentences.setText("")

    def _update_state(self) -> None:
        m = self.model
        self.progress.setMaximum(max(m.members_total, 1))
        self.progress.setValue(m.members_done if m.status == "training" else m.members_total)
        self.progress.setVisible(m.status == "training")
        text = m.state_text()
        if m.status == "training":
            text += f": {m.progress_text()}"
            left = m.seconds_left()
            if left is not None:
                text += f", about {left:.0f} s left"
        self.header.show_state(text, m.edited or m.status == "failed", m.status == "training")

    def _draw(self) -> None:
        self.canvas.clear()
        self.heatmaps = {}
        rows = self.model.rows
        results = self.model.results
        maps = {label: stability_map(rows, label) for label in results}
        for label, smap in maps.items():
            self.heatmaps[label] = np.log10(np.where(smap.diverged, np.nan, smap.loss))
        finite = np.concatenate([v[np.isfinite(v)] for v in self.heatmaps.values()] or [[]])
        low, high = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
        self.levels = (low, high if high > low else low + 1e-6)
        colormap = pg.colormap.get("viridis")  # perceptually even and colour-blind safe
        image = None
        for i, (label, result) in enumerate(results.items()):
            image = self._draw_map(i, label, maps[label], result, colormap)
        if image is not None:
            bar = pg.ColorBarItem(
                values=self.levels,
                colorMap=colormap,
                label="log10 final loss, one range for every map (x: diverged)",
                interactive=False,
                width=14,
            )
            self.canvas.ci.addItem(bar, row=0, col=2, rowspan=max(1, (len(results) + 1) // 2))
        rows_used = (len(results) + 1) // 2
        self._draw_windows(rows_used)
        rows_used += 1
        if self.model.profile is not None:
            self._draw_profile(self.model.profile, rows_used)
            rows_used += 1
        self.canvas.setMinimumHeight(330 * rows_used)
        lines = [sentence(w) for w in results.values()]
        if self.model.profile is not None:
            lines.append(profile_sentence(self.model.profile))
        prefix = ""
        if self.model.edited or self.model.status == "training":
            prefix = (
                "<i>Before the edit (faded): these results are of the earlier scenario.</i><br>"
            )
        self.sentences.setText(prefix + "<br>".join(lines))
        opacity = FADED if (self.model.edited or self.model.status == "training") else 1.0
        for item in self.canvas.ci.items:
            item.setOpacity(opacity)
        self.drawn.emit()

    def _draw_map(
        self, i: int, label: str, smap: StabilityMap, result: MethodWindows, colormap: object
    ) -> pg.ImageItem:
        values = self.heatmaps[label]
        plot = self.canvas.addPlot(
            row=i // 2,
            col=i % 2,
            title=f"{label}: final validation loss",
            axisItems={"bottom": PlainAxis("bottom"), "left": PlainAxis("left")},
        )
        image = pg.ImageItem(values.T)  # x: threshold index, y: batch-size index
        image.setColorMap(colormap)
        image.setLevels(self.levels)
        plot.addItem(image)
        step = max(1, len(smap.thresholds) // 5)
        plot.getAxis("bottom").setTicks(
            [[(j + 0.5, tick_text(t)) for j, t in enumerate(smap.thresholds) if j % step == 0]]
        )
        plot.getAxis("left").setTicks([[(j + 0.5, str(b)) for j, b in enumerate(smap.batch_sizes)]])
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
        inside = [
            (j + 0.5, bi + 0.5)
            for bi, w in enumerate(result.windows)
            for j, t in enumerate(smap.thresholds)
            if t in set(w.inside)
        ]
        if inside:
            xs, ys = zip(*inside, strict=True)
            plot.addItem(
                pg.ScatterPlotItem(
                    list(xs),
                    list(ys),
                    symbol="o",
                    size=5,
                    pen=None,
                    brush=pg.mkBrush(255, 255, 255, 230),
                )
            )
        own = next((c.threshold for c in self.model.scenario.clip if c.display_name == label), None)
        if own is not None and smap.thresholds:
            nearest = int(np.argmin(np.abs(np.log(np.array(smap.thresholds)) - math.log(own))))
            plot.addItem(
                pg.InfiniteLine(
                    pos=nearest + 0.5,
                    angle=90,
                    pen=pg.mkPen("#FFFFFF", width=1.5, style=QtCore.Qt.PenStyle.DashLine),
                    label=f"entry's {tick_text(own)}",
                    labelOpts={"position": 0.95, "color": "#FFFFFF"},
                )
            )
        return image

    def _draw_windows(self, row: int) -> None:
        chart = self.canvas.addPlot(
            row=row,
            col=0,
            colspan=3,
            title="threshold windows against batch size (white dots on the maps; shaded: one "
            "threshold for every size; arrows: the window reaches the grid's end)",
            axisItems={"left": LogAxis("left"), "bottom": PlainAxis("bottom")},
        )
        chart.setLogMode(x=True, y=True)
        results = self.model.results
        sizes = sorted({w.batch_size for r in results.values() for w in r.windows})
        chart.getAxis("bottom").setTicks([[(math.log10(b), str(b)) for b in sizes]])
        chart.setLabel("bottom", "batch size")
        chart.setLabel("left", "threshold")
        legend = chart.addLegend(offset=(10, -10), brush=(255, 255, 255, 210))
        count = len(results)
        for i, (label, result) in enumerate(results.items()):
            color = method_color(result.method)
            xs, ys, open_up, open_down = [], [], [], []
            for w in result.windows:
                if w.lower is None or w.upper is None:
                    continue
                x = w.batch_size * (1.0 + 0.08 * (i - (count - 1) / 2))
                xs += [x, x]
                ys += [w.lower, w.upper]
                if w.at_upper_edge:
                    open_up.append((x, w.upper))
                if w.at_lower_edge:
                    open_down.append((x, w.lower))
            chart.plot(xs, ys, connect="pairs", pen=pg.mkPen(color, width=4), name=label)
            for points, symbol in ((open_up, "t1"), (open_down, "t")):
                if points:
                    px, py = zip(*points, strict=True)
                    chart.plot(
                        list(px),
                        list(py),
                        pen=None,
                        symbol=symbol,
                        symbolSize=12,
                        symbolBrush=color,
                        symbolPen=None,
                    )
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
        legend.setParentItem(chart.vb)

    def _draw_profile(self, profile: NormProfile, row: int) -> None:
        """Predicted batch-mean gradient norm against B, with the thresholds drawn across it."""
        plot = self.canvas.addPlot(
            row=row,
            col=0,
            colspan=3,
            title=f"norm profile at step {profile.checkpoint_step}: "
            "expected batch-mean gradient norm, clean data",
            axisItems={"left": LogAxis("left"), "bottom": PlainAxis("bottom")},
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
                name=f"{label} threshold {tick_text(threshold)}",
            )
        plot.getAxis("bottom").setTicks([[(math.log10(b), str(b)) for b in profile.batch_sizes]])
        plot.setLabel("bottom", "batch size")
        plot.setLabel("left", "L2 norm")
