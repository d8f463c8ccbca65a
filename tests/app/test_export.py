"""Export: plots to PNG and SVG, entry data to CSV; every file parses back."""

from __future__ import annotations

import csv
import xml.etree.ElementTree as ElementTree
from pathlib import Path

import numpy as np
from PySide6 import QtGui
from pytestqt.qtbot import QtBot

from app.export import export_csv, export_image
from app.main_window import MainWindow
from core.entry_model import TRAINED
from tests.app.conftest import trained


def test_plots_export_to_png_and_svg_files_that_parse(
    qtbot: QtBot, window: MainWindow, tmp_path: Path
) -> None:
    view = trained(qtbot, window)
    png, svg = tmp_path / "plots.png", tmp_path / "plots.svg"
    export_image(view.canvas, png)
    export_image(view.canvas, svg)
    image = QtGui.QImage(str(png))
    assert not image.isNull() and image.width() >= 800 and image.height() > 200
    root = ElementTree.parse(svg).getroot()
    assert root.tag.endswith("svg")
    assert len(list(root.iter())) > 50  # axes, curves and text, not an empty page


def test_a_fan_exports_its_members_as_csv(qtbot: QtBot, window: MainWindow, tmp_path: Path) -> None:
    view = trained(qtbot, window)
    assert view.model.status == TRAINED
    path = tmp_path / "fan.csv"
    export_csv(view.model, path)
    with path.open() as f:
        rows = list(csv.DictReader(f))
    stacks = view.model.stacks
    expected = sum(int(s.filled.sum()) for s in stacks.values())
    assert len(rows) == expected
    batch = view.batch_size
    member = view.member_index("global-norm")
    assert member is not None
    mine = [r for r in rows if int(r["batch_size"]) == batch and int(r["member"]) == member]
    # Written at float32's precision, the engine's: each value reads back to the same float32.
    np.testing.assert_array_equal(
        np.array([r["val_loss"] for r in mine], dtype=np.float32),
        stacks[batch].values["val_loss"][:, member].astype(np.float32),
    )


def test_a_fan_with_infinite_norms_exports_them_as_inf(tmp_path: Path) -> None:
    # The previous version's writer crashed (OverflowError) on an infinite value; records with
    # infinite inputs (outlier kind "nonfinite") give infinite example norms.
    import tomllib

    from core.fan_model import FanModel
    from core.runner import Runner
    from core.scenario import parse_scenario
    from core.study import Study
    from core.work import InlinePool
    from tests.tiny_presets import TINY_FAN

    text = TINY_FAN.replace('kind = "target-shift"', 'kind = "nonfinite"\ncount = 1')
    fan = FanModel("Corrupt records", parse_scenario(tomllib.loads(text)))
    study = Study(entries=[fan])
    pool = InlinePool()
    Runner(study, pool).train(fan)
    while not pool.idle:
        pool.poll()
    assert fan.status == TRAINED
    path = tmp_path / "fan.csv"
    export_csv(fan, path)
    with path.open(newline="") as f:
        rows = list(csv.DictReader(f))
    text_columns = {"method", "label", "threshold"}
    values = [float(v) for r in rows for k, v in r.items() if k not in text_columns]
    assert np.isinf(values).any()  # read back by float() as the infinities they are
