"""Colours shared by every view: one per method (from core/methods.py), one per entry kind.

Method hues are the Okabe-Ito set, chosen to stay apart for the common forms of colour
blindness; a second [[clip]] table of the same method gets the same hue with another line style.
"""

from __future__ import annotations

from PySide6 import QtCore

from core.methods import color

CLEAN_COLOR = "#56B4E9"
OUTLIER_COLOR = "#D55E00"
FADED_ALPHA = 70  # of 255: the curves of an earlier scenario, kept while new ones arrive
LINE_STYLES = (
    QtCore.Qt.PenStyle.SolidLine,
    QtCore.Qt.PenStyle.DashDotLine,
    QtCore.Qt.PenStyle.DotLine,
)
# The margin down an entry's left side says what kind of entry it is.
KIND_COLORS = {
    "note": "#B8A98A",
    "fan": "#2F7F8F",
    "map": "#6E4C9A",
    "log": "#9A6B2F",
}
INK = "#1D1D1D"
MUTED = "#5C5C5C"
WARN = "#A33A1E"


def method_color(method: str) -> str:
    return color(method)


def kind_color(kind: str) -> str:
    return KIND_COLORS.get(kind, "#888888")
