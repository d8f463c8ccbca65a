"""MapView: a map entry's stability maps, threshold windows, norm profile and plain sentences."""

from __future__ import annotations

import math

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from app.axes import LogAxis, PlainAxis, overhanging_title, tick_text
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
                label="log10 final loss (x: diverged)",
                interactive=False,
                width=14,
            )
            self.canvas.ci.addItem(bar, row=0, col=2, rowspan=max(1, (len(results) + 1) // 2))
        row = (len(results) + 1) // 2
        self._draw_windows(row)  # a plot row and a legend strip under it
        plots, strips = row + 1, 1
        if self.model.profile is not None:
            self._draw_profile(self.model.profile, row + 2)
            plots, strips = plots + 1, strips + 1
        self.canvas.setMinimumHeight(330 * plots + 50 * strips)
        for item in self.canvas.ci.items:
            if isinstance(item, pg.PlotItem):
                overhanging_title(item)
        lines = [sentence(w) for w in results.values()]
        if self.model.profile is not None:
            lines.append(profile_sentence(self.model.profile))
        lines.append(
            "<small>On the maps: white dots, the thresholds inside each window; dashed, the "
            "entry's own threshold; x, diverged. Dark is a low loss.</small>"
        )
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
        own = next((c.threshold for c in self.model.scenario.clip if c.display_name == label), None)
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
        if own is not None and smap.thresholds:
            nearest = int(np.argmin(np.abs(np.log(np.array(smap.thresholds)) - math.log(own))))
            plot.addItem(
                pg.InfiniteLine(
                    pos=nearest + 0.5,
                    angle=90,
                    pen=pg.mkPen("#FFFFFF", width=1.5, style=QtCore.Qt.PenStyle.DashLine),
                )
            )
        return image

    def _draw_windows(self, row: int) -> None:
        chart = self.canvas.addPlot(
            row=row,
            col=0,
            colspan=3,
            title="threshold windows against batch size",
            axisItems={"left": LogAxis("left"), "bottom": PlainAxis("bottom")},
        )
        chart.setLogMode(x=True, y=True)
        results = self.model.results
        sizes = sorted({w.batch_size for r in results.values() for w in r.windows})
        chart.getAxis("bottom").setTicks([[(math.log10(b), str(b)) for b in sizes]])
        chart.setLabel("bottom", "batch size")
        chart.setLabel("left", "threshold")
        legend = pg.LegendItem(colCount=2, labelTextSize="8pt")
        self.canvas.ci.addItem(legend, row=row + 1, col=0, colspan=3)
        self.canvas.ci.layout.setRowMaximumHeight(row + 1, 50)
        count = len(results)
        shaded = opened = False
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
            bars = chart.plot(xs, ys, connect="pairs", pen=pg.mkPen(color, width=4))
            legend.addItem(bars, label)
            # End ticks: a window of one threshold is a tick, not an invisible bar of no length.
            chart.plot(
                xs, ys, pen=None, symbol="_", symbolSize=14, symbolPen=pg.mkPen(color, width=3)
            )
            opened = opened or bool(open_up or open_down)
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
                shaded = True
        if shaded:
            shade = pg.PlotDataItem(pen=pg.mkPen("#bbbbbb", width=8))
            legend.addItem(shade, "shaded: one threshold for every size")
        if opened:
            arrow = pg.PlotDataItem(pen=None, symbol="t1", symbolBrush="#777777", symbolPen=None)
            legend.addItem(arrow, "arrow: the window runs on past the grid's end")

    def _draw_profile(self, profile: NormProfile, row: int) -> None:
        """Each norm method's predicted clean norm against B, in the units it clips, with its
        threshold; and the predicted pass-through of a step with the outliers, per method."""
        grid = np.asarray(profile.grid, dtype=np.float64)
        ticks = [[(math.log10(b), str(b)) for b in profile.batch_sizes]]
        norms = self.canvas.addPlot(
            row=row,
            col=0,
            title=f"norm profile at step {profile.checkpoint_step}: clean norm per unit",
            axisItems={"left": LogAxis("left"), "bottom": PlainAxis("bottom")},
        )
        passing = self.canvas.addPlot(
            row=row,
            col=1,
            colspan=2,
            title="norm profile: outlier pass-through",
            axisItems={"left": PlainAxis("left"), "bottom": PlainAxis("bottom")},
        )
        norms.setLogMode(x=True, y=True)
        passing.setLogMode(x=True, y=False)
        passing.setYRange(0.0, 1.05, padding=0)
        passing.getAxis("left").setTickSpacing(0.25, 0.25)
        for plot in (norms, passing):
            plot.getAxis("bottom").setTicks(ticks)
            plot.setLabel("bottom", "batch size")
        norms.setLabel("left", "L2 norm")
        passing.setLabel("left", "pass-through (0 to 1)")
        legend = pg.LegendItem(colCount=1, labelTextSize="8pt")
        self.canvas.ci.addItem(legend, row=row + 1, col=0, colspan=3)
        self.canvas.ci.layout.setRowMaximumHeight(row + 1, 20 * (len(profile.methods) + 1) + 10)
        half = pg.InfiniteLine(
            pos=0.5, angle=0, pen=pg.mkPen("#999999", width=1, style=QtCore.Qt.PenStyle.DashLine)
        )
        passing.addItem(half)
        styles = (QtCore.Qt.PenStyle.SolidLine, QtCore.Qt.PenStyle.DashDotLine)
        for i, method in enumerate(profile.methods.values()):
            color = method_color(method.method)
            style = styles[i % len(styles)]
            unit = {0: "the batch", 1: "one example"}.get(method.unit, f"a group of {method.unit}")
            curve = norms.plot(
                grid, np.asarray(method.norm), pen=pg.mkPen(color, width=2, style=style)
            )
            norms.plot(
                grid,
                np.full(len(grid), method.threshold),
                pen=pg.mkPen(color, width=1.5, style=QtCore.Qt.PenStyle.DotLine),
            )
            legend.addItem(
                curve,
                f"{method.label}: norm of {unit}, dotted at {tick_text(method.threshold)}",
            )
            through = np.asarray(method.pass_through, dtype=np.float64)
            if np.isfinite(through).any():
                passing.plot(
                    grid, through, pen=pg.mkPen(color, width=2, style=style), connect="finite"
                )
                if method.half_batch is not None:
                    passing.plot(
                        [method.half_batch],
                        [0.5],
                        pen=None,
                        symbol="o",
                        symbolSize=8,
                        symbolBrush=color,
                        symbolPen=None,
                    )
        grey = pg.PlotDataItem(pen=pg.mkPen("#999999", style=QtCore.Qt.PenStyle.DashLine))
        legend.addItem(grey, "dot: where half passes")
