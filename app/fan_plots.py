"""FanPlots: a fan's plot grid, one curve per series made once and moved with setData.

Loss, batch-mean norm (before clipping solid, after dashed, the applied threshold dotted),
clipped share, the outliers' share of the update, their pass-through as markers on the steps
that held outliers, and the latest per-example norms with the per-example thresholds. Each
series has a faded twin for the results of an earlier scenario. One legend strip above the
plots names the methods and the line styles.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore

from app.axes import LogAxis, PlainAxis, overhanging_title
from app.colors import CLEAN_COLOR, FADED_ALPHA, LINE_STYLES, OUTLIER_COLOR, method_color
from core.fan import member_for
from core.fan_model import StackData
from core.methods import BATCH_NORM, EXAMPLE_NORM
from core.scenario import ClipConfig

pg.setConfigOptions(background="w", foreground="k", antialias=False)

# key, title, left axis label, log axis
PLOTS = (
    ("loss", "clean validation loss", "loss", True),
    ("norms", "batch-mean gradient norm", "L2 norm", True),
    ("clipped", "clipped share", "share (0 to 1)", False),
    ("share", "outliers' share of the update", "share (0 to 1)", False),
    ("pass", "outlier pass-through", "on outlier steps (0 to 1)", False),
)
MARKERS = ("o", "t", "s", "d", "+", "x")
SERIES = ("loss", "pre", "post", "clipped", "share", "pass", "level")
Curves = dict[tuple[str, str], pg.PlotDataItem]


def pen(color: str, style: QtCore.Qt.PenStyle, faded: bool = False, width: float = 2) -> object:
    qcolor = pg.mkColor(color)
    if faded:
        qcolor.setAlpha(FADED_ALPHA)
    return pg.mkPen(qcolor, width=width, style=style)


class FanPlots(pg.GraphicsLayoutWidget):  # type: ignore[misc]
    def __init__(self) -> None:
        super().__init__()
        self.setMinimumHeight(760)
        self.legend = pg.LegendItem(colCount=3, labelTextSize="8pt", verSpacing=-6)
        self.plots: dict[str, pg.PlotItem] = {}
        for key, title, unit, log in PLOTS:
            axes = {"left": LogAxis("left") if log else PlainAxis("left")}
            axes["bottom"] = PlainAxis("bottom")
            plot = pg.PlotItem(title=title, axisItems=axes)
            overhanging_title(plot)
            plot.setLabel("bottom", "step")
            plot.setLabel("left", unit)
            plot.setClipToView(True)
            plot.setDownsampling(mode="peak", auto=True)
            if log:
                plot.setLogMode(y=True)
            else:
                plot.setYRange(0.0, 1.0, padding=0.04)
                plot.getAxis("left").setTickSpacing(0.25, 0.25)
            self.plots[key] = plot
        hist = pg.PlotItem(
            title="per-example gradient norms",
            axisItems={"bottom": PlainAxis("bottom"), "left": PlainAxis("left")},
        )
        hist.setLabel("bottom", "log10 of the norm, latest step")
        hist.setLabel("left", "examples")
        self.plots["hist"] = hist
        self.columns = 0
        self.use_columns(2)
        self.hist_clean, self.hist_outlier = (
            hist.plot([0, 1], [0], stepMode="center", fillLevel=0, brush=c + "99", pen=c)
            for c in (CLEAN_COLOR, OUTLIER_COLOR)
        )
        self.hist_lines: dict[str, pg.InfiniteLine] = {}
        self.curves: Curves = {}
        self.faded: Curves = {}  # made on first use (`_add_series`)
        self._looks: dict[str, tuple[int, str, QtCore.Qt.PenStyle]] = {}
        self._hidden: set[str] = set()  # labels whose curves are switched off
        # What each label's curves show now, (stack, member, rows) or None for nothing: a
        # curve whose member has no new rows is not set again (each setData re-bounds and
        # repaints its plot; a fan without earlier results cleared 21 empty faded curves on
        # every live redraw).
        self._shown: dict[tuple[bool, str], tuple[StackData, int, int] | None] = {}

    def use_columns(self, columns: int) -> None:
        """Lay the plots out in `columns` columns (2 in a study, 3 on a wide slide)."""
        if columns == self.columns:
            return
        items = [self.plots[key] for key, *_ in PLOTS] + [self.plots["hist"]]
        if self.columns:
            for item in [self.legend, *items]:
                self.ci.removeItem(item)
        self.ci.addItem(self.legend, row=0, col=0, colspan=columns)
        self.ci.layout.setRowMaximumHeight(0, 70)
        for i, item in enumerate(items):
            self.ci.addItem(item, row=1 + i // columns, col=i % columns)
        for col in range(columns):
            self.ci.layout.setColumnStretchFactor(col, 1)
        self.columns = columns

    def build(self, clips: Sequence[tuple[ClipConfig, int]]) -> None:
        """Curves for each [[clip]] table (with the occurrence of its method, for the style)."""
        for key, *_ in PLOTS:
            self.plots[key].clear()
        for line in self.hist_lines.values():
            self.plots["hist"].removeItem(line)
        self.legend.clear()
        self.curves, self.faded, self.hist_lines = {}, {}, {}
        self._shown, self._looks, self._hidden = {}, {}, set()
        solid, dash = QtCore.Qt.PenStyle.SolidLine, QtCore.Qt.PenStyle.DashLine
        dotted = QtCore.Qt.PenStyle.DotLine
        for index, (clip, occurrence) in enumerate(clips):
            label, color = clip.display_name, method_color(clip.method)
            style = LINE_STYLES[occurrence % len(LINE_STYLES)]
            self._looks[label] = (index, color, style)
            self._add_series(label, faded=False)
            if clip.spec.compares == BATCH_NORM:
                self.curves[(label, "level")] = self.plots["norms"].plot(
                    pen=pen(color, dotted, width=1.5)
                )
            if clip.spec.compares == EXAMPLE_NORM:
                line = pg.InfiniteLine(angle=90, pen=pen(color, dotted))
                self.plots["hist"].addItem(line)
                self.hist_lines[label] = line
            counts = clip.spec.counts if clip.method != "none" else ""
            name = f"{label} (clips {counts})" if counts else label
            self.legend.addItem(pg.PlotDataItem(pen=pen(color, style)), name)
        grey = "#555555"
        for text, style in (
            ("norm before clipping", solid),
            ("after clipping", dash),
            ("threshold applied", dotted),
        ):
            self.legend.addItem(pg.PlotDataItem(pen=pen(grey, style)), text)
        self.legend.addItem(pg.PlotDataItem(pen=pen(grey, solid, faded=True)), "before the edit")
        self.legend.addItem(self.hist_clean, "clean examples")
        self.legend.addItem(self.hist_outlier, "outliers")

    def _add_series(self, label: str, faded: bool) -> None:
        """The curves of one member's series, live or faded. Faded curves are made when a fan
        first has earlier results to show (half the curves, and a tenth of the window's start,
        otherwise made for nothing) and lie beneath the live ones."""
        index, color, style = self._looks[label]
        dash = QtCore.Qt.PenStyle.DashLine
        target = self.faded if faded else self.curves
        made = {
            "loss": self.plots["loss"].plot(pen=pen(color, style, faded)),
            "pre": self.plots["norms"].plot(pen=pen(color, style, faded)),
            "post": self.plots["norms"].plot(pen=pen(color, dash, faded)),
            "clipped": self.plots["clipped"].plot(pen=pen(color, style, faded)),
            "share": self.plots["share"].plot(pen=pen(color, style, faded), connect="finite"),
            "pass": self.plots["pass"].plot(
                pen=None,
                symbol=MARKERS[index % len(MARKERS)],
                symbolSize=6,
                symbolBrush=pg.mkBrush(color + ("46" if faded else "C8")),
                symbolPen=None,
            ),
        }
        for key, curve in made.items():
            if faded:
                curve.setZValue(-1)
                curve.setVisible(label not in self._hidden)
            target[(label, key)] = curve

    def set_visible(self, label: str, visible: bool) -> None:
        if visible:
            self._hidden.discard(label)
        else:
            self._hidden.add(label)
        for curves in (self.curves, self.faded):
            for (name, _), curve in curves.items():
                if name == label:
                    curve.setVisible(visible)
        if label in self.hist_lines:
            self.hist_lines[label].setVisible(visible)

    def draw_member(self, faded: bool, stack: StackData | None, label: str, factor: float) -> None:
        """Point the curves of `label` at its member nearest `factor` in `stack`."""
        curves = self.faded if faded else self.curves
        if stack is None or not any(m.name == label for m in stack.members):
            if (faded, label) in self._shown and self._shown[(faded, label)] is None:
                return
            self._shown[(faded, label)] = None
            for key in SERIES:
                if (label, key) in curves:
                    curves[(label, key)].setData([], [])
            return
        if faded and (label, "loss") not in curves:
            self._add_series(label, faded=True)
        i = member_for(stack.members, label, factor)
        shown = self._shown.get((faded, label))
        if shown is not None and shown[0] is stack and shown[1:] == (i, stack.rows(i)):
            return
        self._shown[(faded, label)] = (stack, i, stack.rows(i))
        rows = slice(0, stack.rows(i))
        x, v = stack.steps[rows], stack.values
        series = {
            "loss": v["val_loss"],
            "pre": v["grad_norm_pre"],
            "post": v["grad_norm_post"],
            "clipped": v["clipped_share"],
            "share": v["outlier_share"],
            "level": v["clip_level"],
        }
        for key, values in series.items():
            if (label, key) in curves:
                y = values[rows, i]
                if key == "level":
                    y = np.where(np.isfinite(y), y, np.nan)
                curves[(label, key)].setData(x, y, connect="finite")
        passed = v["outlier_pass"][rows, i]
        held = np.isfinite(passed)
        curves[(label, "pass")].setData(x[held], passed[held])

    def draw_histogram(
        self,
        stack: StackData | None,
        clips: Sequence[ClipConfig],
        factor: float,
        shown: Callable[[str], bool],
        faded: bool = False,
    ) -> None:
        """The latest per-example norms of the first per-example member (else the first that
        clips), clean and outliers apart, with each example-norm threshold where it was; pale
        when `faded`, for the results from before an edit."""
        clips = [c for c in clips if c.method != "none"]
        empty = stack is None or stack.example_norms is None or stack.outlier is None or not clips
        for item in (self.hist_clean, self.hist_outlier, *self.hist_lines.values()):
            item.setVisible(not empty)
            item.setOpacity(FADED_ALPHA / 255 if faded else 1.0)
        if empty or stack is None or stack.example_norms is None or stack.outlier is None:
            return
        clip = next((c for c in clips if c.spec.compares == EXAMPLE_NORM), clips[0])
        i = member_for(stack.members, clip.display_name, factor)
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
        for label, line in self.hist_lines.items():
            j = member_for(stack.members, label, factor)
            level = stack.values["clip_level"][max(stack.rows(j) - 1, 0), j]
            visible = math.isfinite(level) and level > 0 and shown(label)
            line.setVisible(visible)
            if visible:
                line.setPos(math.log10(level))
        self.plots["hist"].setLabel(
            "bottom", f"log10 of the norm, latest step ({clip.display_name} member)"
        )
