"""Non-finite numbers in every file the tool writes: `inf` and `nan` in CSV, null and "inf" in
JSON. The readers are Python's csv module, float() and a JSON parser held to the standard
(which has no NaN or Infinity), not the project's own."""

from __future__ import annotations

import csv
import json
import math
from pathlib import Path
from typing import Any

import pytest

from app.cli import main
from tests.conftest import SCENARIOS
from tests.tiny_presets import tiny_map_text


def strict_json(path: Path) -> Any:
    """The file as standard JSON: the NaN and Infinity tokens Python writes by default fail."""

    def refuse(token: str) -> None:
        raise ValueError(f"{path.name}: {token} is not JSON")

    return json.loads(path.read_text(), parse_constant=refuse)


MEASURED = ("final_val_loss", "clipped_share", "clean_clipped_share", "outlier_share")


def test_train_writes_the_infinite_norms_of_corrupt_records(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The previous version crashed with OverflowError in format_value on this shipped preset:
    # its records with infinite inputs give infinite example norms.
    out = tmp_path / "out"
    assert main(["train", str(SCENARIOS / "teacher-corrupt-records.toml"), "--out", str(out)]) == 0
    with (out / "metrics.csv").open(newline="") as f:
        rows = list(csv.DictReader(f))
    skip = {"method"}
    values = [float(v) for row in rows for k, v in row.items() if k not in skip and v != ""]
    assert any(math.isinf(v) for v in values)
    members = strict_json(out / "members.json")["members"]
    for member in members:  # a diverged member's loss is NaN: null in JSON
        assert (member["final_val_loss"] is None) == member["diverged"]
    assert "Traceback" not in capsys.readouterr().err


def test_a_map_writes_nan_and_inf_as_words_and_its_json_is_standard(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # With a learning rate of 100 the unclipped members diverge: their losses are NaN.
    preset = tmp_path / "wild.toml"
    preset.write_text(tiny_map_text(steps=20).replace("lr = 0.02", "lr = 100.0"))
    out = tmp_path / "out"
    assert main(["map", str(preset), "--out", str(out), "--jobs", "1"]) == 0
    table = out / "map.csv"
    with table.open(newline="") as f:
        rows = list(csv.DictReader(f))
    diverged = [r for r in rows if r["diverged"] == "1"]
    assert diverged and all(r["final_val_loss"] == "nan" for r in diverged)
    # An empty cell means "no threshold" (method none), and only that.
    assert {r["method"] for r in rows if r["threshold"] == ""} == {"none"}
    for row in rows:
        for column in (*MEASURED, "outlier_pass"):
            float(row[column])  # every measured cell is a number, nan and inf included
        assert all(row[c] != "" for c in MEASURED)
    strict_json(out / "windows.json")
    strict_json(out / "profile.json")


@pytest.mark.parametrize("value", [math.inf, -math.inf, math.nan, 1e39, -3.5e38, 0.1, 1e-45])
def test_a_float32_result_reads_back_as_written(value: float) -> None:
    # Beyond float32's range a value was not a float32 result: it keeps every digit rather
    # than overflow (the previous version raised OverflowError on inf, warned on 1e39).
    import numpy as np

    from core.formats import format_value

    text = format_value(value, single=True)
    back = float(text)
    if math.isnan(value):
        assert text == "nan" and math.isnan(back)
    elif abs(value) > float(np.finfo(np.float32).max):
        assert back == value
    else:  # the same float32, read back by numpy
        assert np.float32(back) == np.float32(value)
