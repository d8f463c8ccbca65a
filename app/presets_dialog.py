"""PresetBrowser: the shipped and the user's presets with their notes; add one as an entry."""

from __future__ import annotations

from PySide6 import QtCore, QtWidgets

from core.presets import PresetInfo, list_presets, user_dir


class PresetBrowser(QtWidgets.QDialog):
    """After exec(): `choice` is (preset, "fan" | "map"), or None when closed."""

    def __init__(self, parent: QtWidgets.QWidget | None = None, kind: str = "fan") -> None:
        super().__init__(parent)
        self.setWindowTitle("Presets")
        self.resize(900, 520)
        self.presets: list[PresetInfo] = list_presets()
        self.choice: tuple[PresetInfo, str] | None = None
        layout = QtWidgets.QVBoxLayout(self)
        self.table = QtWidgets.QTreeWidget()
        self.table.setColumnCount(3)
        self.table.setHeaderLabels(["name", "where", "file"])
        self.table.setRootIsDecorated(False)
        self.table.setAlternatingRowColors(True)
        for info in self.presets:
            where = "shipped (read-only)" if info.shipped else "yours"
            item = QtWidgets.QTreeWidgetItem([info.name, where, info.path.name])
            if info.error:
                item.setForeground(0, QtCore.Qt.GlobalColor.red)
                item.setToolTip(0, info.error)
            self.table.addTopLevelItem(item)
        for column in range(3):
            self.table.resizeColumnToContents(column)
        self.notes = QtWidgets.QLabel()
        self.notes.setWordWrap(True)
        self.notes.setMinimumHeight(70)
        self.notes.setAlignment(QtCore.Qt.AlignmentFlag.AlignTop)
        self.notes.setTextInteractionFlags(QtCore.Qt.TextInteractionFlag.TextSelectableByMouse)
        folder = QtWidgets.QLabel(f"Your presets are saved in {user_dir()}")
        folder.setStyleSheet("color: #555555")
        buttons = QtWidgets.QDialogButtonBox()
        self.fan_button = buttons.addButton(
            "Add as fan", QtWidgets.QDialogButtonBox.ButtonRole.AcceptRole
        )
        self.fan_button.setToolTip("Every method at 17 thresholds and 4 batch sizes, trained live")
        self.map_button = buttons.addButton(
            "Add as map", QtWidgets.QDialogButtonBox.ButtonRole.AcceptRole
        )
        self.map_button.setToolTip("The batch size x threshold x seed grid, its maps and windows")
        buttons.addButton(QtWidgets.QDialogButtonBox.StandardButton.Close)
        buttons.rejected.connect(self.reject)
        self.fan_button.clicked.connect(lambda: self._choose("fan"))
        self.map_button.clicked.connect(lambda: self._choose("map"))
        layout.addWidget(self.table, 1)
        layout.addWidget(self.notes)
        layout.addWidget(folder)
        layout.addWidget(buttons)
        (self.map_button if kind == "map" else self.fan_button).setDefault(True)
        self.table.currentItemChanged.connect(lambda *_: self._show_selected())
        self.table.itemDoubleClicked.connect(lambda *_: self._choose("fan"))
        first = self.table.topLevelItem(0)
        if first is not None:
            self.table.setCurrentItem(first)
        self._show_selected()

    def current(self) -> PresetInfo | None:
        row = self.table.indexOfTopLevelItem(self.table.currentItem())
        return self.presets[row] if 0 <= row < len(self.presets) else None

    def select(self, name: str) -> None:
        for row, info in enumerate(self.presets):
            item = self.table.topLevelItem(row)
            if item is not None and (info.name == name or info.path.stem == name):
                self.table.setCurrentItem(item)
                return
        raise KeyError(name)

    def _show_selected(self) -> None:
        info = self.current()
        usable = info is not None and info.scenario is not None
        self.fan_button.setEnabled(usable)
        self.map_button.setEnabled(usable)
        if info is None:
            self.notes.setText("No presets found.")
        elif info.scenario is None:
            self.notes.setText(f"This file does not load: {info.error}")
        else:
            self.notes.setText(info.scenario.notes or "(no notes)")

    def _choose(self, kind: str) -> None:
        info = self.current()
        if info is not None and info.scenario is not None:
            self.choice = (info, kind)
            self.accept()
