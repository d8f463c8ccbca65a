"""What the window's units (file actions, autosave) may ask of the window that holds them."""

from __future__ import annotations

from typing import Protocol

from PySide6 import QtWidgets

from core.runner import Runner
from core.study import Study


class Host(Protocol):
    study: Study
    runner: Runner

    def set_study(self, study: Study) -> None: ...

    def show_message(self, text: str, ms: int = 8000) -> None: ...

    def study_saved(self) -> None: ...

    def offer_recovery(self) -> bool: ...

    def widget(self) -> QtWidgets.QWidget: ...
