"""The one QApplication of a process, made on first use (the window, `shot`, the handout)."""

from __future__ import annotations

import sys

from PySide6 import QtWidgets


def application() -> QtWidgets.QApplication:
    app = QtWidgets.QApplication.instance()
    if isinstance(app, QtWidgets.QApplication):
        return app
    return QtWidgets.QApplication(sys.argv[:1])
