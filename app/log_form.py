"""LogForm: the inspector of a log entry: which file, which columns, and the advice options.

Every field shows its plain name, with the `gradfence advise` option it matches in the tooltip;
an edit that does not make sense shows the reader's sentence and changes nothing.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable
from pathlib import Path
from typing import Any

from PySide6 import QtWidgets

from core.errors import GradfenceInputError
from core.log_entry import LogSource
from core.log_model import LogModel
from core.normlog import LogColumns

Commit = Callable[[LogModel, LogSource], None]

# (key, label, option, help); keys of LogColumns, or of LogSource for the last four
FIELDS = (
    ("step_column", "Step column", "--step-column", "the column holding the step"),
    ("norm_column", "Norm column", "--norm-column", "the pre-clip gradient norm"),
    ("batch_column", "Batch-size column", "--batch-column", "the batch size of each row"),
    ("batch_size", "Batch size (constant)", "--batch-size", "instead of a batch-size column"),
    (
        "small_norm_column",
        "Second norm column",
        "--small-norm-column",
        "a norm measured on a smaller batch (one device's, a sub-batch's)",
    ),
    (
        "small_batch_column",
        "Smaller batch's size column",
        "--small-batch-column",
        "the size of the smaller batch of each row",
    ),
    (
        "small_batch_size",
        "Smaller batch's size (constant)",
        "--small-batch-size",
        "instead of a column",
    ),
    ("member", "Member (of a metrics.csv)", "--member", "which member of the tool's metrics.csv"),
    ("threshold", "Threshold to replay and carry", "--threshold", "a fixed threshold C"),
    ("to_batch", "Carry it to batch size", "--to-batch", "the batch size to carry C to"),
    (
        "max_clip_share",
        "Suggestions clip at most",
        "--max-clip-share",
        "the share of steps a suggested threshold may clip",
    ),
)
NUMBERS = ("batch_size", "small_batch_size", "threshold", "max_clip_share")
WHOLE = ("member", "to_batch")
SOURCE_KEYS = ("member", "threshold", "to_batch", "max_clip_share")


class LogForm(QtWidgets.QScrollArea):
    def __init__(
        self, model: LogModel, commit: Commit, parent: QtWidgets.QWidget | None = None
    ) -> None:
        super().__init__(parent)
        self.model, self._commit = model, commit
        self.setWidgetResizable(True)
        body = QtWidgets.QWidget()
        layout = QtWidgets.QVBoxLayout(body)
        self.error_label = QtWidgets.QLabel()
        self.error_label.setWordWrap(True)
        self.error_label.setStyleSheet("color: #A33A1E")
        layout.addWidget(self.error_label)
        box = QtWidgets.QGroupBox("The log")
        form = QtWidgets.QFormLayout(box)
        row = QtWidgets.QHBoxLayout()
        self.path_edit = QtWidgets.QLineEdit()
        self.path_edit.setToolTip("the log file: CSV with a header, or JSON Lines")
        self.path_edit.editingFinished.connect(self._apply)
        browse = QtWidgets.QPushButton("Browse...")
        browse.clicked.connect(self._browse)
        row.addWidget(self.path_edit, 1)
        row.addWidget(browse)
        form.addRow("File", row)
        self.edits: dict[str, QtWidgets.QLineEdit] = {}
        for key, label, option, help_text in FIELDS:
            edit = QtWidgets.QLineEdit()
            edit.setToolTip(f"{option}: {help_text}")
            edit.setPlaceholderText("default" if key not in SOURCE_KEYS else "none")
            edit.editingFinished.connect(self._apply)
            form.addRow(label, edit)
            self.edits[key] = edit
        layout.addWidget(box)
        layout.addStretch(1)
        self.setWidget(body)
        self.show_source(model.source)
        model.subscribe(self._on_model_changed)

    def detach(self) -> None:
        self.model.unsubscribe(self._on_model_changed)

    def _on_model_changed(self, what: str) -> None:
        if what == "scenario":
            self.show_source(self.model.source)

    def show_source(self, source: LogSource) -> None:
        self.path_edit.setText(str(source.path))
        for key, edit in self.edits.items():
            value = getattr(source if key in SOURCE_KEYS else source.columns, key)
            if key == "max_clip_share" or value is not None:
                edit.setText(f"{value:g}" if isinstance(value, float) else str(value))
            else:
                edit.setText("")

    def _browse(self) -> None:
        name, _ = QtWidgets.QFileDialog.getOpenFileName(
            self,
            "A log of gradient norms",
            str(self.model.source.path.parent),
            "Logs (*.csv *.jsonl *.ndjson *.json);;All files (*)",
        )
        if name:
            self.path_edit.setText(name)
            self._apply()

    def source_from_fields(self) -> LogSource:
        values: dict[str, Any] = {}
        for key, edit in self.edits.items():
            text = edit.text().strip()
            if not text:
                values[key] = 0.01 if key == "max_clip_share" else None
                continue
            try:
                values[key] = int(text) if key in WHOLE else float(text) if key in NUMBERS else text
            except ValueError:
                raise GradfenceInputError(f"{key}: {text!r} is not a number.") from None
        column_keys = {f.name for f in dataclasses.fields(LogColumns)}
        defaults = LogColumns()
        columns = LogColumns(
            **{
                k: (values[k] if values[k] is not None else getattr(defaults, k))
                for k in column_keys
            }
        )
        return LogSource(
            path=Path(self.path_edit.text().strip()).expanduser().resolve(),
            columns=columns,
            **{k: values[k] for k in SOURCE_KEYS},
        )

    def _apply(self) -> None:
        try:
            source = self.source_from_fields()
        except GradfenceInputError as exc:
            self.error_label.setText(str(exc))
            return
        self.error_label.setText("")
        if source != self.model.source:
            self._commit(self.model, source)
