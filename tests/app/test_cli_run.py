"""`gradfence run`: the output files, byte-identical reruns, replay outside the tool, divergence."""

from __future__ import annotations

import csv
import json
import math
from pathlib import Path

import numpy as np
import pytest

from app.cli import main
from core.engine import EXPLODE_FACTOR

LINEAR_PRESET = """\
schema = 1
name = "Replayable linear run"

[data]
task = "linear"
dim = 5
n_train = 512
n_val = 128
noise = 0.2

[outliers]
kind = "target-shift"
placement = "batch"
rate = 0.3
count = 2
scale = 20.0

[model]
kind = "linear"

[train]
steps = 60
batch_size = 16
lr = {lr}
eval_every = 1

[[clip]]
method = "none"

[[clip]]
method = "global-norm"
threshold = {threshold}

[[clip]]
method = "example-norm"
threshold = {threshold}
"""


def run_cli(tmp_path: Path, lr: float = 0.05, threshold: float = 1.0, name: str = "out") -> Path:
    preset = tmp_path / "linear.toml"
    preset.write_text(LINEAR_PRESET.format(lr=lr, threshold=threshold))
    out = tmp_path / name
    assert main(["run", str(preset), "--out", str(out), "--trace"]) == 0
    return out


def read_metrics(out: Path) -> list[dict[str, str]]:
    with (out / "metrics.csv").open() as f:
        return list(csv.DictReader(f))


def replay(
    out: Path, member: int, method: str, threshold: float, lr: float
) -> dict[str, list[float]]:
    """Plain SGD on the linear model in numpy, from data.npz and trace.npz alone."""
    data, trace = np.load(out / "data.npz"), np.load(out / "trace.npz")
    x, y, flags = data["x_train"], data["y_train"], data["outlier_train"]
    w = trace[f"m{member}_init_weight"][0].copy()  # (1, dim) in PyTorch (out, in) layout
    b = float(trace[f"m{member}_init_bias"][0])
    x_val, y_val = data["x_val"], data["y_val"]
    start_val = float(np.mean((x_val @ w + b - y_val) ** 2))
    log: dict[str, list[float]] = {"pre": [], "post": [], "val": [], "clean_loss": [], "norms": []}
    for rows in trace[f"m{member}_batch"]:
        xb, yb = x[rows], y[rows]
        residual = xb @ w + b - yb
        log["clean_loss"].append(float(np.mean(residual[~flags[rows]] ** 2)))
        g = 2.0 * residual[:, None] * np.column_stack([xb, np.ones(len(rows))])  # (B, dim + 1)
        norms = np.linalg.norm(g, axis=1)
        mean = g.mean(axis=0)
        if method == "global-norm":
            update = mean * min(1.0, threshold / np.linalg.norm(mean))
        elif method == "example-norm":
            update = (g * np.minimum(1.0, threshold / norms)[:, None]).mean(axis=0)
        else:
            update = mean
        w = w - lr * update[:-1]
        b = b - lr * update[-1]
        log["pre"].append(float(np.linalg.norm(mean)))
        log["post"].append(float(np.linalg.norm(update)))
        log["val"].append(float(np.mean((x_val @ w + b - y_val) ** 2)))
        log["norms"].append(norms)
    log["start_val"] = [start_val]
    return log


def test_run_writes_the_documented_files(tmp_path: Path) -> None:
    out = run_cli(tmp_path)
    assert {p.name for p in out.iterdir()} == {
        "scenario.toml",
        "metrics.csv",
        "summary.json",
        "trace.npz",
        "data.npz",
    }
    rows = read_metrics(out)
    assert list(rows[0])[:6] == ["member", "method", "threshold", "batch_size", "seed", "step"]
    assert "val_r2" in rows[0] and "outlier_pass" in rows[0] and "diverged" in rows[0]
    assert len(rows) == 3 * 60  # one row per member and logged step
    summary = json.loads((out / "summary.json").read_text())
    assert [m["method"] for m in summary["members"]] == ["none", "global-norm", "example-norm"]
    assert len(summary["scenario_hash"]) == 16
    assert main(["check", str(out / "scenario.toml")]) == 0


def test_the_same_preset_twice_writes_byte_identical_metrics(tmp_path: Path) -> None:
    first = run_cli(tmp_path, name="first")
    second = run_cli(tmp_path, name="second")
    assert (first / "metrics.csv").read_bytes() == (second / "metrics.csv").read_bytes()


@pytest.mark.parametrize(
    ("member", "method"), [(0, "none"), (1, "global-norm"), (2, "example-norm")]
)
def test_a_traced_run_replays_in_plain_numpy(tmp_path: Path, member: int, method: str) -> None:
    lr, threshold = 0.05, 1.0
    out = run_cli(tmp_path, lr, threshold)
    rows = [r for r in read_metrics(out) if int(r["member"]) == member]
    log = replay(out, member, method, threshold, lr)
    # The engine runs in float32; 60 steps of SGD stay within 1e-4 relative of float64 numpy.
    for key, column in (("pre", "grad_norm_pre"), ("post", "grad_norm_post"), ("val", "val_loss")):
        np.testing.assert_allclose([float(r[column]) for r in rows], log[key], rtol=1e-4)
    traced = np.load(out / "trace.npz")[f"m{member}_example_norms"]
    # A residual near zero is a float32 difference of two O(1) numbers: its error is absolute,
    # about 1e-7 of the norms' typical size, hence the atol.
    expected = np.stack(log["norms"])
    np.testing.assert_allclose(traced, expected, rtol=1e-4, atol=1e-5 * np.median(expected))


def test_a_huge_learning_rate_marks_diverged_members_at_the_right_step(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    lr, threshold = 100.0, 1e-3
    out = run_cli(tmp_path, lr, threshold)
    summary = json.loads((out / "summary.json").read_text())["members"]
    assert summary[0]["diverged"] and not summary[1]["diverged"] and not summary[2]["diverged"]
    step = summary[0]["diverged_at"]
    # The right step, found independently: the first whose clean batch loss exceeds the
    # engine's bound (1e4 times the starting validation loss, at least 1e4) or is not finite.
    log = replay(out, 0, "none", threshold, lr)
    bound = EXPLODE_FACTOR * max(log["start_val"][0], 1.0)
    with np.errstate(over="ignore", invalid="ignore"):
        bad = [not (loss <= bound) for loss in log["clean_loss"]]
    assert step == bad.index(True) + 1
    rows = [r for r in read_metrics(out) if r["member"] == "0"]
    for r in rows:
        # outlier_pass is undefined (NaN) on a batch without outliers, by definition; so is the
        # clip_level of a member that does not clip (method none).
        skip = {"method", "threshold", "clip_level"}
        skip |= {"outlier_pass"} if r["batch_outliers"] == "0" else set()
        values = [float(v) for k, v in r.items() if k not in skip]
        if int(r["step"]) < step:
            assert all(math.isfinite(v) for v in values) and r["diverged"] == "0"
        else:
            assert r["diverged"] == "1" and math.isnan(float(r["val_loss"]))
    # The survivors trained exactly as they would have without the diverging member.
    clipped_only = tmp_path / "clipped.toml"
    clipped_only.write_text(
        LINEAR_PRESET.format(lr=lr, threshold=threshold).replace(
            '[[clip]]\nmethod = "none"\n\n', ""
        )
    )
    assert main(["run", str(clipped_only), "--out", str(tmp_path / "alone")]) == 0
    alone = read_metrics(tmp_path / "alone")
    together = [r for r in read_metrics(out) if r["member"] != "0"]
    assert [r["val_loss"] for r in alone] == [r["val_loss"] for r in together]
    assert "diverged" not in capsys.readouterr().err
