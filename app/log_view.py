"""LogView: a log entry's norms with each chosen rule's level and its clip and skip marks, the
norm histogram with the thresholds, a table of every rule, and the predicted norm against the
batch size with the carried threshold where the log has two norms."""

from __future__ import annotations

import math

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from app.axes import LogAxis, PlainAxis, tick_text
from app.colors import MUTED, OUTLIER_COLOR
from app.entry_header import EntryHeader
from app.export import export_menu
from core.advice import Advice, advice_lines
from core.log_model import LogModel
from core.replay import OPEN_LOOP, Replay

RULE_COLORS = ("#0072B2", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#D55E00")
NORM_COLOR = "#8A8A8A"
TABLE_COLUMNS = ("show", "rule", "on a spike", "clips", "skips", "by third", "spikes caught")


def percent(value: float) -> str:
    if not math.isfinite(value):
        return "-"
    return "0%" if value == 0 else (f"{value:.2%}" if value < 0.1 else f"{value:.1%}")


def rule_title(r: Replay) -> str:
    """`fixed 1.5`, `percentile 90`, `ema 2 x average`, `zscore 2.5 std`."""
    c = r.clip
    if c.rule == "fixed":
        return f"fixed {tick_text(c.threshold or math.nan)}"
    if c.rule == "percentile":
        return f"percentile {c.percentile:g}"
    if c.rule == "ema":
        return f"ema {c.k:g} x average"
    return f"zscore {c.z:g} std"


def default_shown(advice: Advice) -> set[int]:
    """The rules drawn at first: the suggested fixed threshold's, and the adaptive ones, clip."""
    shown = set()
    suggested = {g.rule: g.value for g in advice.suggestions.rules}
    fixed = suggested.get("fixed")
    fixed_rows = [
        (i, r)
        for i, r in enumerate(advice.replays)
        if r.clip.rule == "fixed" and r.clip.on_spike == "clip"
    ]
    if fixed is not None and fixed_rows:
        best = min(fixed_rows, key=lambda p: abs(math.log((p[1].clip.threshold or 1) / fixed)))
        shown.add(best[0])
    for i, r in enumerate(advice.replays):
        if r.clip.rule in ("percentile", "zscore") and r.clip.on_spike == "clip":
            shown.add(i)
    return shown


class LogView(QtWidgets.QFrame):
    train_requested = QtCore.Signal(object, float)  # replay again
    stop_requested = QtCore.Signal(object)
    selected = QtCore.Signal(object)

    def __init__(self, model: LogModel, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        self.model = model
        self.shown: set[int] = set()
        self._drawn_for: Advice | None = None
        self.setSizePolicy(
            QtWidgets.QSizePolicy.Policy.Ignored, QtWidgets.QSizePolicy.Policy.Preferred
        )
        layout = QtWidgets.QVBoxLayout(self)
        layout.setContentsMargins(6, 2, 6, 6)
        self.header = EntryHeader("Replay", "Read the log again and replay every rule on it")
        layout.addLayout(self.header)
        self.state_label = self.header.state_label
        self.train_button, self.stop_button = self.header.train_button, self.header.stop_button
        self.source_label = QtWidgets.QLabel()
        self.source_label.setStyleSheet(f"color: {MUTED}")
        self.source_label.setWordWrap(True)
        layout.addWidget(self.source_label)
        self.open_loop = QtWidgets.QLabel(OPEN_LOOP)
        self.open_loop.setWordWrap(True)
        self.open_loop.setStyleSheet("font-style: italic;")
        layout.addWidget(self.open_loop)
        self.canvas = pg.GraphicsLayoutWidget()
        self.canvas.setMinimumHeight(720)
        layout.addWidget(self.canvas)
        self.series = self.canvas.addPlot(
            row=0,
            col=0,
            colspan=2,
            title="pre-clip gradient norm at every logged step",
            axisItems={"left": LogAxis("left"), "bottom": PlainAxis("bottom")},
        )
        self.series.setLogMode(y=True)
        self.series.setLabel("bottom", "step")
        self.series.setLabel("left", "L2 norm")
        self.series.setClipToView(True)
        self.series.setDownsampling(mode="peak", auto=True)
        # Legends in strips under the plots, never over the data.
        self.series_legend = pg.LegendItem(colCount=3, labelTextSize="8pt")
        self.canvas.ci.addItem(self.series_legend, row=1, col=0, colspan=2)
        self.histogram = self.canvas.addPlot(
            row=2,
            col=0,
            title="norms: how often each size was logged",
            axisItems={"left": PlainAxis("left"), "bottom": PlainAxis("bottom")},
        )
        self.histogram.setLabel("bottom", "log10 of the norm")
        self.histogram.setLabel("left", "steps")
        self.noise = self.canvas.addPlot(
            row=2,
            col=1,
            title="predicted batch-mean norm against the batch size",
            axisItems={"left": LogAxis("left"), "bottom": PlainAxis("bottom")},
        )
        self.noise.setLogMode(x=True, y=True)
        self.noise.setLabel("bottom", "batch size")
        self.noise.setLabel("left", "L2 norm")
        self.lower_legend = pg.LegendItem(colCount=2, labelTextSize="8pt")
        self.canvas.ci.addItem(self.lower_legend, row=3, col=0, colspan=2)
        self.canvas.ci.layout.setRowStretchFactor(0, 3)
        self.canvas.ci.layout.setRowStretchFactor(2, 2)
        for strip in (1, 3):
            self.canvas.ci.layout.setRowMaximumHeight(strip, 80)
        self.table = QtWidgets.QTableWidget(0, len(TABLE_COLUMNS))
        self.table.setHorizontalHeaderLabels(list(TABLE_COLUMNS))
        self.table.verticalHeader().setVisible(False)
        self.table.setEditTriggers(QtWidgets.QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.setMinimumHeight(220)
        self.table.itemChanged.connect(self._on_table_changed)
        layout.addWidget(self.table)
        self.lines = QtWidgets.QLabel()
        self.lines.setWordWrap(True)
        self.lines.setTextInteractionFlags(QtCore.Qt.TextInteractionFlag.TextSelectableByMouse)
        layout.addWidget(self.lines)
        self.header.export_button.setMenu(export_menu(self, self.canvas, self.model))
        self.train_button.clicked.connect(lambda: self.train_requested.emit(self, 1.0))
        self.stop_button.clicked.connect(lambda: self.stop_requested.emit(self))
        model.subscribe(self._on_model_changed)
        self._update_state()
        self.refresh()

    # -- model -> view -----------------------------------------------------------------------

    def _on_model_changed(self, what: str) -> None:
        self._update_state()
        if what in ("status", "scenario"):
            self.refresh()

    def detach(self) -> None:
        self.model.unsubscribe(self._on_model_changed)

    def refresh_if_dirty(self) -> None:
        self._update_state()

    def mousePressEvent(self, event: object) -> None:
        self.selected.emit(self)

    def headline(self) -> str:
        advice = self.model.advice
        if advice is None:
            return self.model.state_text()
        fixed = next((g for g in advice.suggestions.rules if g.rule == "fixed"), None)
        spikes = f"{advice.spike_count} spikes in {advice.log.rows} steps"
        if fixed is None or fixed.value is None:
            return spikes
        return f"{spikes}; suggested fixed threshold {tick_text(fixed.value)}"

    def _update_state(self) -> None:
        m = self.model
        self.header.show_state(
            m.state_text(), m.edited or m.status == "failed", m.status == "training"
        )
        src = m.source
        member = f", member {src.member}" if src.member is not None else ""
        self.source_label.setText(f"{src.path}{member}")

    # -- drawing -----------------------------------------------------------------------------

    def refresh(self) -> None:
        advice = self.model.advice
        if advice is None:
            for plot in (self.series, self.histogram, self.noise):
                plot.clear()
            self.table.setRowCount(0)
            self.lines.setText("")
            self._drawn_for = None
            return
        if advice is not self._drawn_for:
            self.shown = default_shown(advice)
            self._fill_table(advice)
            self._drawn_for = advice
        self._draw(advice)
        faded = 0.35 if self.model.edited else 1.0
        for item in self.canvas.ci.items:
            item.setOpacity(faded)
        text = "\n".join(line for line in summary_lines(advice) if line.strip())
        prefix = "Before the edit (faded): replayed on the earlier settings.\n"
        self.lines.setText((prefix if self.model.edited else "") + text)

    def _fill_table(self, advice: Advice) -> None:
        self.table.blockSignals(True)
        self.table.setRowCount(len(advice.replays))
        spikes = advice.spike_count
        for row, r in enumerate(advice.replays):
            check = QtWidgets.QTableWidgetItem()
            check.setFlags(check.flags() | QtCore.Qt.ItemFlag.ItemIsUserCheckable)
            check.setCheckState(
                QtCore.Qt.CheckState.Checked
                if row in self.shown
                else QtCore.Qt.CheckState.Unchecked
            )
            thirds = " / ".join(percent(v) for v in r.clip_rate_thirds)
            cells = [
                rule_title(r),
                r.clip.on_spike,
                percent(r.clip_rate),
                percent(r.skip_rate) if r.clip.on_spike == "skip" else "-",
                thirds,
                f"{r.spikes_caught} of {spikes}" if spikes else "-",
            ]
            self.table.setItem(row, 0, check)
            for column, text in enumerate(cells, start=1):
                item = QtWidgets.QTableWidgetItem(text)
                item.setToolTip(r.key)
                self.table.setItem(row, column, item)
        self.table.resizeColumnsToContents()
        self.table.blockSignals(False)

    def _on_table_changed(self, item: QtWidgets.QTableWidgetItem) -> None:
        if item.column() != 0:
            return
        if item.checkState() == QtCore.Qt.CheckState.Checked:
            self.shown.add(item.row())
        else:
            self.shown.discard(item.row())
        if self.model.advice is not None:
            self._draw(self.model.advice)

    def _draw(self, advice: Advice) -> None:
        log = advice.log
        steps, norm = log.steps.astype(np.float64), log.norm
        finite = np.isfinite(norm) & (norm > 0)
        self.series.clear()
        self.series_legend.clear()
        self.lower_legend.clear()
        legend = self.series_legend
        curve = self.series.plot(
            steps,
            np.where(finite, norm, np.nan),
            pen=pg.mkPen(NORM_COLOR, width=1),
            connect="finite",
        )
        legend.addItem(curve, "logged norm")
        if advice.spike_count:
            marks = self.series.plot(
                steps[advice.spikes],
                norm[advice.spikes],
                pen=None,
                symbol="o",
                symbolSize=7,
                symbolBrush=None,
                symbolPen=pg.mkPen("#000000"),
            )
            legend.addItem(marks, "spikes")
        bad = ~np.isfinite(norm)
        top = float(np.nanmax(norm[finite])) if finite.any() else 1.0
        if bad.any():
            marks = self.series.plot(
                steps[bad],
                np.full(int(bad.sum()), top * 1.5),
                pen=None,
                symbol="x",
                symbolSize=9,
                symbolBrush=OUTLIER_COLOR,
                symbolPen=pg.mkPen(OUTLIER_COLOR),
            )
            legend.addItem(marks, f"non-finite norm ({int(bad.sum())}), drawn at the top")
        clips = skips = False
        for order, row in enumerate(sorted(self.shown)):
            r = advice.replays[row]
            color = RULE_COLORS[order % len(RULE_COLORS)]
            levels = np.where(np.isfinite(r.levels), r.levels, np.nan)
            level = self.series.plot(steps, levels, pen=pg.mkPen(color, width=2), connect="finite")
            legend.addItem(level, f"{rule_title(r)}, {r.clip.on_spike}: its level")
            clipped = r.clipped & ~r.skipped & finite
            clips, skips = clips or bool(clipped.any()), skips or bool((r.skipped & finite).any())
            if clipped.any():
                self.series.plot(
                    steps[clipped],
                    norm[clipped],
                    pen=None,
                    symbol="t",
                    symbolSize=6,
                    symbolBrush=color,
                    symbolPen=None,
                )
            skipped = r.skipped & finite
            if skipped.any():
                self.series.plot(
                    steps[skipped],
                    norm[skipped],
                    pen=None,
                    symbol="x",
                    symbolSize=8,
                    symbolBrush=color,
                    symbolPen=pg.mkPen(color),
                )
        grey = "#555555"
        if clips:
            mark = pg.PlotDataItem(pen=None, symbol="t", symbolBrush=grey, symbolPen=None)
            legend.addItem(mark, "triangle: a step the rule clips")
        if skips:
            mark = pg.PlotDataItem(pen=None, symbol="x", symbolPen=pg.mkPen(grey))
            legend.addItem(mark, "x: a step the rule skips")
        self._draw_histogram(advice)
        self._draw_noise(advice)

    def _draw_histogram(self, advice: Advice) -> None:
        plot = self.histogram
        plot.clear()
        norm = advice.log.norm
        logs = np.log10(norm[np.isfinite(norm) & (norm > 0)])
        if logs.size == 0:
            return
        edges = np.linspace(logs.min() - 0.02, logs.max() + 0.02, 61)
        counts, _ = np.histogram(logs, edges)
        plot.plot(
            edges, counts, stepMode="center", fillLevel=0, brush=NORM_COLOR + "88", pen=NORM_COLOR
        )
        fixed = False
        for order, row in enumerate(sorted(self.shown)):
            r = advice.replays[row]
            if r.clip.rule == "fixed" and r.clip.threshold:
                fixed = True
                color = RULE_COLORS[order % len(RULE_COLORS)]
                plot.addItem(
                    pg.InfiniteLine(
                        pos=math.log10(r.clip.threshold),
                        angle=90,
                        pen=pg.mkPen(color, width=2, style=QtCore.Qt.PenStyle.DotLine),
                    )
                )
        separation = advice.suggestions.separation
        if separation is not None:
            plot.addItem(
                pg.InfiniteLine(
                    pos=math.log10(separation.threshold),
                    angle=90,
                    pen=pg.mkPen("#000000", width=1.5, style=QtCore.Qt.PenStyle.DashLine),
                    label=f"separates the spikes: {tick_text(separation.threshold)}",
                    labelOpts={"position": 0.9, "color": "#000000"},
                )
            )
        if fixed:
            dotted = pg.PlotDataItem(pen=pg.mkPen("#555555", style=QtCore.Qt.PenStyle.DotLine))
            self.lower_legend.addItem(dotted, "left, dotted: a fixed rule's threshold")

    def _draw_noise(self, advice: Advice) -> None:
        plot = self.noise
        plot.clear()
        carry = advice.carried
        noise = advice.noise
        batch = advice.log.batch
        sizes = [] if batch is None else [float(b) for b in batch if np.isfinite(b) and b > 0]
        base = float(sizes[-1]) if sizes else float(carry.from_batch if carry else 32)
        low = max(1.0, base / 16)
        high = max(base * 16, float(carry.to_batch) * 2 if carry else base * 16)
        xs = np.geomspace(low, high, 60)
        if noise is not None:
            ys = np.array([noise.predicted_norm(float(b)) for b in xs])
            bands = [noise.predicted_norm_interval(float(b)) for b in xs]
            # The band's edges are not items of the (log-scaled) plot: give them log10 values.
            lower = pg.PlotDataItem(np.log10(xs), np.log10([max(i.low, 1e-300) for i in bands]))
            upper = pg.PlotDataItem(np.log10(xs), np.log10([i.high for i in bands]))
            band = pg.FillBetweenItem(lower, upper, brush=pg.mkBrush("#0072B233"))
            plot.addItem(band)
            line = plot.plot(xs, ys, pen=pg.mkPen("#0072B2", width=2))
            self.lower_legend.addItem(line, "right: predicted norm sqrt(|G|^2 + tr(Sigma)/B)")
            sample = pg.PlotDataItem(pen=None, fillLevel=0, fillBrush=pg.mkBrush("#0072B255"))
            self.lower_legend.addItem(sample, "its 95% band")
            plot.setTitle("predicted batch-mean norm, 95% band")
        else:
            text = pg.TextItem(
                advice.noise_note or "one norm per step: signal and noise cannot be told apart",
                color=MUTED,
                anchor=(0, 0),
            )
            plot.addItem(text)
            text.setPos(math.log10(low), 0)
            plot.setTitle("no noise estimate (one norm per step)")
        if carry is not None:
            limit_pen = pg.mkPen(MUTED, width=1, style=QtCore.Qt.PenStyle.DashLine)
            limits = plot.plot(
                [carry.from_batch, carry.to_batch],
                [carry.threshold, carry.signal_limit],
                pen=limit_pen,
            )
            plot.plot(
                [carry.from_batch, carry.to_batch],
                [carry.threshold, carry.noise_limit],
                pen=limit_pen,
            )
            given = plot.plot(
                [carry.from_batch],
                [carry.threshold],
                pen=None,
                symbol="o",
                symbolSize=9,
                symbolBrush="#000000",
            )
            self.lower_legend.addItem(
                given, f"threshold {tick_text(carry.threshold)} at B = {carry.from_batch}"
            )
            self.lower_legend.addItem(limits, "dashed: its limits, all signal or all noise")
            if carry.carried_threshold is not None:
                star = plot.plot(
                    [carry.to_batch],
                    [carry.carried_threshold],
                    pen=None,
                    symbol="star",
                    symbolSize=14,
                    symbolBrush="#D55E00",
                    symbolPen=None,
                )
                self.lower_legend.addItem(
                    star,
                    f"carried: {tick_text(carry.carried_threshold)} at B = {carry.to_batch}",
                )
        ticks = sorted(
            {int(b) for b in (base, low, high) if b >= 1}
            | ({carry.from_batch, carry.to_batch} if carry else set())
        )
        plot.getAxis("bottom").setTicks([[(math.log10(b), str(b)) for b in ticks]])


def summary_lines(advice: Advice) -> list[str]:
    """What `gradfence advise` prints after its rules table: suggestions, noise and the carry."""
    lines = advice_lines(advice)
    start = next((i for i, line in enumerate(lines) if line.startswith("Suggested")), len(lines))
    return [lines[0], *lines[start:]]
