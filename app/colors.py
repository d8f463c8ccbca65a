"""One colour per clipping method, the same in every view.

The hues are the Okabe-Ito set, chosen to stay apart for the common forms of colour blindness;
a second [[clip]] table of the same method gets the same hue with a dashed line.
"""

from __future__ import annotations

from PySide6 import QtCore

METHOD_COLORS = {
    "none": "#000000",
    "global-norm": "#0072B2",
    "example-norm": "#D55E00",
    "unit-agc": "#009E73",
    "example-agc": "#CC79A7",
    "microbatch-norm": "#E69F00",
    "tensor-norm": "#56B4E9",
    "value": "#7F7F7F",
}
CLEAN_COLOR = "#56B4E9"
OUTLIER_COLOR = "#D55E00"
LINE_STYLES = (
    QtCore.Qt.PenStyle.SolidLine,
    QtCore.Qt.PenStyle.DashLine,
    QtCore.Qt.PenStyle.DotLine,
)


def method_color(method: str) -> str:
    return METHOD_COLORS.get(method, "#000000")
