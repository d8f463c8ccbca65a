"""Exporting an entry: its plots as PNG or SVG, its numbers as CSV."""

from __future__ import annotations

import csv
import io
import math
from pathlib import Path
from typing import Any

import pyqtgraph as pg
import pyqtgraph.exporters as exporters
from PySide6 import QtWidgets

from core.fan_model import FanModel
from core.fileio import write_text_atomic
from core.formats import format_value
from core.map_model import MapModel
from core.maps import table_csv


def export_image(canvas: pg.GraphicsLayoutWidget, path: Path) -> None:
    """All of an entry's plots as one picture; the suffix chooses PNG or SVG."""
    scene_root = canvas.ci  # the layout holding every plot of the entry
    if path.suffix.lower() == ".svg":
        exporters.SVGExporter(scene_root).export(str(path))
        return
    exporter = exporters.ImageExporter(scene_root)
    exporter.parameters()["width"] = max(int(canvas.width() * 2), 800)  # twice the screen size
    exporter.export(str(path))


def fan_csv(model: FanModel) -> str:
    """Every member of every batch size of a fan, one row per logged step received."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    header_done = False
    for batch, stack in sorted(model.stacks.items()):
        if not header_done:
            writer.writerow(
                [
                    "member",
                    "method",
                    "label",
                    "threshold",
                    "batch_size",
                    "seed",
                    "step",
                    *stack.names,
                ]
            )
            header_done = True
        for i, member in enumerate(stack.members):
            threshold = "" if math.isnan(member.threshold) else repr(member.threshold)
            for row in range(stack.rows(i)):
                values = [
                    format_value(float(stack.values[n][row, i]), single=True) for n in stack.names
                ]
                step = int(stack.steps[row])
                writer.writerow(
                    [i, member.method, member.name, threshold, batch, member.seed, step, *values]
                )
    return buffer.getvalue()


def export_csv(model: FanModel | MapModel, path: Path) -> None:
    """A fan's metrics, or a map's table (the columns of map.csv)."""
    if isinstance(model, MapModel):
        write_text_atomic(path, table_csv(model.rows, header=True))
    else:
        write_text_atomic(path, fan_csv(model))


def export_menu(
    parent: QtWidgets.QWidget, canvas: pg.GraphicsLayoutWidget, model: Any
) -> QtWidgets.QMenu:
    """The Export menu of an entry's header."""
    menu = QtWidgets.QMenu(parent)

    def ask(title: str, pattern: str) -> Path | None:
        name, _ = QtWidgets.QFileDialog.getSaveFileName(parent, title, "", pattern)
        return Path(name) if name else None

    def to_image(suffix: str) -> None:
        path = ask(f"Export plots as {suffix.upper()}", f"*.{suffix}")
        if path is not None:
            export_image(canvas, path.with_suffix(f".{suffix}"))

    def to_csv() -> None:
        path = ask("Export data as CSV", "*.csv")
        if path is not None:
            export_csv(model, path.with_suffix(".csv"))

    menu.addAction("Plots as PNG...", lambda: to_image("png"))
    menu.addAction("Plots as SVG...", lambda: to_image("svg"))
    menu.addAction("Data as CSV...", to_csv)
    return menu


__all__ = ["export_csv", "export_image", "export_menu", "fan_csv"]
