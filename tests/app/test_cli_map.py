"""`gradfence map`: the files of DESIGN section 7 and sentences a person can paste."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import pytest

from app.cli import main
from tests.core.test_maps import SMALL


def test_map_writes_its_files_and_says_what_it_found(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    preset = tmp_path / "small.toml"
    preset.write_text(SMALL)
    out = tmp_path / "out"
    assert main(["map", str(preset), "--out", str(out), "--jobs", "1"]) == 0
    printed = capsys.readouterr().out
    assert "global-norm:" in printed and "example-norm:" in printed and "norm profile:" in printed
    with (out / "map.csv").open() as f:
        rows = list(csv.DictReader(f))
    assert len(rows) == 54 and {
        "final_val_loss",
        "diverged",
        "clipped_share",
        "outlier_share",
    } <= set(rows[0])
    windows = json.loads((out / "windows.json").read_text())
    assert windows["tolerance"] == 1.0
    for method in ("global-norm", "example-norm"):
        entry = windows["methods"][method]
        assert {"windows", "common", "lower_slope", "upper_slope", "onset", "onset_slope"} <= set(
            entry
        )
        assert [w["batch_size"] for w in entry["windows"]] == [8, 16, 32]
        assert {"batch_size", "lower", "upper", "inside"} <= set(entry["windows"][0])
    profile = json.loads((out / "profile.json").read_text())
    assert profile["trace"] > 0 and len(profile["predicted_norm"]) == len(profile["batch_sizes"])
    assert {s["method"] for s in profile["suggestions"]} == {"global-norm", "example-norm"}
    # pass_through is keyed by the threshold as map.csv writes it (1 and 10, not 1.0 and 10.0)
    for method in ("global-norm", "example-norm"):
        written = [r["threshold"] for r in rows if r["label"] == method]
        assert list(profile["pass_through"][method]) == list(dict.fromkeys(written))
        assert "1" in written and "10" in written
        assert set(profile["pass_through"][method]["1"]) == {"8", "16", "32"}


def test_map_rejects_a_bad_job_count(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    preset = tmp_path / "small.toml"
    preset.write_text(SMALL)
    assert main(["map", str(preset), "--jobs", "0", "--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err
    assert "--jobs = 0 must be at least 1." in err and "Traceback" not in err
