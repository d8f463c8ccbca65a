"""ScenarioForm: a form generated from the scenario model's field declarations.

Each field shows under its plain label, with its TOML key, help and range in the tooltip; only
the fields that apply are shown (core.scenario.applicable_fields: a clip table shows the fields
of its method and rule, `classes` only for classification, and so on). The threshold names its
unit per method. Editing sets the entry's scenario through validated overrides; a rejected value
shows the validator's sentence and changes nothing.
"""

from __future__ import annotations

import dataclasses
import typing
from collections.abc import Callable
from typing import Any

from PySide6 import QtWidgets

from core.entry_model import TrainedEntry
from core.errors import GradfenceInputError
from core.fields import FieldInfo, describe_range, field_info
from core.methods import METHODS
from core.scenario import ClipConfig, Scenario, applicable_fields

TABLES = (
    ("data", "Data"),
    ("outliers", "Outliers"),
    ("model", "Model"),
    ("train", "Training"),
    ("map", "Map grid"),
)
INT_LIMIT = 2**31 - 1


Commit = Callable[[TrainedEntry, Scenario], None]


def set_directly(model: TrainedEntry, scenario: Scenario) -> None:
    model.set_scenario(scenario)


class ScenarioForm(QtWidgets.QScrollArea):
    """`commit(model, scenario)` applies an edit (the window passes one that can be undone)."""

    def __init__(
        self,
        model: TrainedEntry,
        commit: Commit | None = None,
        parent: QtWidgets.QWidget | None = None,
    ) -> None:
        super().__init__(parent)
        self.model = model
        self._commit = commit or set_directly
        self.setWidgetResizable(True)
        self.widgets: dict[str, QtWidgets.QWidget] = {}
        self.labels: dict[str, QtWidgets.QLabel] = {}
        self._rows: dict[str, tuple[QtWidgets.QFormLayout, QtWidgets.QWidget]] = {}
        self.groups: dict[str, QtWidgets.QGroupBox] = {}
        self.error_label = QtWidgets.QLabel()
        self.error_label.setWordWrap(True)
        self.error_label.setStyleSheet("color: #A33A1E")
        self._shape = self._shape_of(model.scenario)
        self._build()
        model.subscribe(self._on_model_changed)

    @staticmethod
    def _shape_of(scenario: Scenario) -> int:
        """What decides which widgets exist: the number of [[clip]] tables."""
        return len(scenario.clip)

    def _build(self) -> None:
        body = QtWidgets.QWidget()
        layout = QtWidgets.QVBoxLayout(body)
        layout.addWidget(self.error_label)
        scenario = self.model.scenario
        self.widgets, self.labels, self._rows, self.groups = {}, {}, {}, {}
        for table, title in TABLES:
            value = getattr(scenario, table)
            layout.addWidget(self._group(table, type(value), value, title))
        for i, clip in enumerate(scenario.clip):
            title = f"Clipping {i + 1}: {clip.display_name}"
            layout.addWidget(self._group(f"clip.{i}", ClipConfig, clip, title))
        layout.addStretch(1)
        self.setWidget(body)
        self.show_scenario(scenario)

    def _group(self, path: str, cls: type, value: Any, title: str) -> QtWidgets.QGroupBox:
        box = QtWidgets.QGroupBox(title)
        box.setToolTip(f"[{path}]" if not path.startswith("clip.") else "[[clip]]")
        form = QtWidgets.QFormLayout(box)
        hints = typing.get_type_hints(cls)
        for f in dataclasses.fields(cls):
            key = f"{path}.{f.name}"
            info = field_info(cls, f.name)
            widget = self._widget(key, hints[f.name], info, getattr(value, f.name))
            label = QtWidgets.QLabel(self._label_text(key, info, value))
            tip = f"{key}\n{info.help}"
            if _base_type(hints[f.name]) is float:
                tip += f"\nAllowed: {describe_range(info, 'number')}."
            if f.name == "method":
                tip += "\n\n" + "\n".join(f"{m.id}: {m.help}" for m in METHODS.values())
            widget.setToolTip(tip)
            label.setToolTip(tip)
            form.addRow(label, widget)
            self.widgets[key], self.labels[key] = widget, label
            self._rows[key] = (form, widget)
        self.groups[path] = box
        return box

    @staticmethod
    def _label_text(key: str, info: FieldInfo, value: Any) -> str:
        text = info.label or key.rsplit(".", 1)[-1]
        if key.endswith(".threshold") and isinstance(value, ClipConfig) and value.spec.unit:
            return f"{text} ({value.spec.unit})"
        return f"{text} ({info.unit})" if info.unit else text

    def _widget(self, key: str, hint: Any, info: FieldInfo, value: Any) -> QtWidgets.QWidget:
        base = _base_type(hint)
        widget: QtWidgets.QWidget
        if base is str and info.choices:
            combo = QtWidgets.QComboBox()
            combo.addItems(list(info.choices))
            combo.setCurrentText(str(value))
            combo.currentTextChanged.connect(lambda text, k=key: self._apply(k, text))
            widget = combo
        elif base is bool:
            check = QtWidgets.QCheckBox()
            check.setChecked(bool(value))
            check.toggled.connect(lambda on, k=key: self._apply(k, on))
            widget = check
        elif base is int:
            spin = QtWidgets.QSpinBox()
            spin.setRange(
                int(info.lo) if info.lo is not None else -INT_LIMIT,
                int(min(info.hi, INT_LIMIT)) if info.hi is not None else INT_LIMIT,
            )
            spin.setValue(int(value))
            spin.setKeyboardTracking(False)
            spin.valueChanged.connect(lambda v, k=key: self._apply(k, v))
            widget = spin
        else:  # floats, optional floats, lists, free text: typed as TOML values
            line = QtWidgets.QLineEdit(_text(value))
            if base is float:
                line.setPlaceholderText("default")
            line.editingFinished.connect(lambda k=key, w=line: self._apply_text(k, w.text()))
            widget = line
        return widget

    def _apply_text(self, key: str, text: str) -> None:
        from core.scenario import parse_override

        if text.strip() == "":
            return
        _, value = parse_override(f"{key}={text}")
        self._apply(key, value)

    def _apply(self, key: str, value: Any) -> None:
        try:
            scenario = self.model.scenario.with_overrides({key: value}, "form")
        except GradfenceInputError as exc:
            self.error_label.setText(str(exc))
            return
        self.error_label.setText("")
        if scenario != self.model.scenario:
            self._commit(self.model, scenario)

    def detach(self) -> None:
        self.model.unsubscribe(self._on_model_changed)

    def _on_model_changed(self, what: str) -> None:
        if what == "scenario":
            scenario = self.model.scenario
            if self._shape_of(scenario) != self._shape:
                self._shape = self._shape_of(scenario)
                self._build()
            else:
                self.show_scenario(scenario)

    def visible_keys(self) -> set[str]:
        """The keys whose rows are shown now."""
        return {k for k, (form, w) in self._rows.items() if form.isRowVisible(w)}

    def show_scenario(self, scenario: Scenario) -> None:
        """Show the model's values, and only the rows that apply to them."""
        raw = scenario.to_dict()
        shown = applicable_fields(scenario, self.model.kind)
        for key, widget in self.widgets.items():
            value = _lookup(raw, key)
            widget.blockSignals(True)
            if isinstance(widget, QtWidgets.QComboBox):
                widget.setCurrentText(str(value))
            elif isinstance(widget, QtWidgets.QCheckBox):
                widget.setChecked(bool(value))
            elif isinstance(widget, QtWidgets.QSpinBox):
                widget.setValue(int(value))
            elif isinstance(widget, QtWidgets.QLineEdit):
                widget.setText(_text(value))
            widget.blockSignals(False)
            form, _ = self._rows[key]
            form.setRowVisible(widget, key in shown)
        self.groups["map"].setVisible(any(k.startswith("map.") for k in shown))
        for i, clip in enumerate(scenario.clip):
            key = f"clip.{i}.threshold"
            if key in self.labels:
                info = field_info(ClipConfig, "threshold")
                self.labels[key].setText(self._label_text(key, info, clip))
            self.groups[f"clip.{i}"].setTitle(f"Clipping {i + 1}: {clip.display_name}")


def _base_type(hint: Any) -> Any:
    args = typing.get_args(hint)
    if args and type(None) in args:
        return next(a for a in args if a is not type(None))
    return typing.get_origin(hint) or hint


def _text(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, tuple | list):
        return "[" + ", ".join(f"{v:g}" if isinstance(v, float) else str(v) for v in value) + "]"
    if isinstance(value, float):
        return f"{value:g}"
    return str(value)


def _lookup(raw: dict[str, Any], key: str) -> Any:
    node: Any = raw
    for part in key.split("."):
        if isinstance(node, list):
            node = node[int(part)]
        elif isinstance(node, dict):
            node = node.get(part)
        else:
            return None
    return node
