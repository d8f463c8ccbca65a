"""ScenarioForm: a form generated from the scenario model's field declarations.

Choices become drop-downs, numbers get their ranges and units, every widget's tooltip is the
field's help (and, for the method, the formula). Editing sets the model's scenario through
validated overrides; a rejected value shows the validator's sentence and changes nothing.
"""

from __future__ import annotations

import dataclasses
import typing
from collections.abc import Callable
from typing import Any

from PySide6 import QtWidgets

from core.errors import GradfenceInputError
from core.fields import FieldInfo, describe_range, field_info
from core.run_model import ScenarioHolder
from core.scenario import METHOD_HELP, ClipConfig, Scenario

TABLES = ("data", "outliers", "model", "train", "sweep")
INT_LIMIT = 2**31 - 1


Commit = Callable[[ScenarioHolder, Scenario], None]


def set_directly(model: ScenarioHolder, scenario: Scenario) -> None:
    model.set_scenario(scenario)


class ScenarioForm(QtWidgets.QScrollArea):
    """`commit(model, scenario)` applies an edit (the window passes one that can be undone)."""

    def __init__(
        self,
        model: ScenarioHolder,
        commit: Commit | None = None,
        parent: QtWidgets.QWidget | None = None,
    ) -> None:
        super().__init__(parent)
        self.model = model
        self._commit = commit or set_directly
        self.setWidgetResizable(True)
        self.widgets: dict[str, QtWidgets.QWidget] = {}
        self.error_label = QtWidgets.QLabel()
        self.error_label.setWordWrap(True)
        self.error_label.setStyleSheet("color: #B00000")
        self._build()
        model.subscribe(self._on_model_changed)

    def _build(self) -> None:
        body = QtWidgets.QWidget()
        layout = QtWidgets.QVBoxLayout(body)
        layout.addWidget(self.error_label)
        scenario = self.model.scenario
        for table in TABLES:
            layout.addWidget(
                self._group(table, type(getattr(scenario, table)), getattr(scenario, table))
            )
        for i, clip in enumerate(scenario.clip):
            layout.addWidget(
                self._group(
                    f"clip.{i}", ClipConfig, clip, title=f"[[clip]] {i}: {clip.display_name}"
                )
            )
        layout.addStretch(1)
        self.setWidget(body)

    def _group(
        self, path: str, cls: type, value: Any, title: str | None = None
    ) -> QtWidgets.QGroupBox:
        box = QtWidgets.QGroupBox(title or f"[{path}]")
        form = QtWidgets.QFormLayout(box)
        hints = typing.get_type_hints(cls)
        for f in dataclasses.fields(cls):
            key = f"{path}.{f.name}"
            info = field_info(cls, f.name)
            widget = self._widget(key, hints[f.name], info, getattr(value, f.name))
            tip = info.help
            if f.name == "method":
                tip += "\n\n" + "\n".join(f"{m}: {h}" for m, h in METHOD_HELP.items())
            widget.setToolTip(tip)
            label = f.name + (f" ({info.unit})" if info.unit else "")
            form.addRow(label, widget)
            self.widgets[key] = widget
        return box

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
                line.setToolTip(describe_range(info, "number"))
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
        self._commit(self.model, scenario)

    def detach(self) -> None:
        self.model.unsubscribe(self._on_model_changed)

    def _on_model_changed(self, what: str) -> None:
        if what == "scenario":
            self.show_scenario(self.model.scenario)

    def show_scenario(self, scenario: Scenario) -> None:
        """Show the model's values; rebuild when the [[clip]] tables changed in number."""
        if (
            any(k.startswith(f"clip.{len(scenario.clip)}.") for k in self.widgets)
            or f"clip.{len(scenario.clip) - 1}.method" not in self.widgets
        ):
            self.widgets = {}
            self._build()
            return
        raw = scenario.to_dict()
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
