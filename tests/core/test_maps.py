"""Maps: the grid, the files, resuming, and the batch-size coupling they are for."""

from __future__ import annotations

import math
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from core.analysis import analyse, stability_map
from core.engine import Engine, Member
from core.map_run import MapProgress, run_map
from core.maps import members_of, plan, read_table, run_chunk
from core.profile import norm_profile
from core.results import collect
from core.scenario import ClipConfig, dumps_scenario, load_scenario, parse_scenario
from core.tasks import loss_floor
from tests.conftest import REPO, SCENARIOS

SMALL = """\
schema = 2
name = "Small map"

[data]
task = "linear"
dim = 4
n_train = 1024
n_val = 256
noise = 0.5

[outliers]
kind = "target-shift"
rate = 0.5
scale = 20.0

[model]
kind = "linear"

[train]
steps = 150
lr = 0.02

[[clip]]
method = "none"

[[clip]]
method = "global-norm"

[[clip]]
method = "example-norm"

[map]
batch_sizes = [8, 16, 32]
seeds = [0, 1]
thresholds = {min = 0.01, max = 10.0, count = 4}
"""


def test_the_table_has_exactly_one_row_per_grid_point(tmp_path: Path) -> None:
    scenario = parse_scenario(__import__("tomllib").loads(SMALL))
    rows = run_map(scenario, tmp_path, jobs=1)
    keys = [(r["label"], r["threshold"], r["batch_size"], r["seed"]) for r in rows]
    # none: 1 point per batch size and seed; the two methods: 4 thresholds each.
    assert len(rows) == 3 * 2 * (1 + 4 + 4)
    assert len({(k[0], "nan" if math.isnan(k[1]) else k[1], k[2], k[3]) for k in keys}) == len(rows)
    on_file = read_table(tmp_path / "map.csv")
    assert [r["label"] for r in on_file] == [r["label"] for r in rows]
    for a, b in zip(on_file, rows, strict=True):
        for column in ("final_val_loss", "clipped_share", "threshold"):
            assert a[column] == b[column] or (math.isnan(a[column]) and math.isnan(b[column]))


def test_results_do_not_depend_on_the_number_of_workers(tmp_path: Path) -> None:
    scenario = parse_scenario(__import__("tomllib").loads(SMALL))
    run_map(scenario, tmp_path / "one", jobs=1)
    run_map(scenario, tmp_path / "two", jobs=2)
    assert (tmp_path / "one" / "map.csv").read_bytes() == (
        tmp_path / "two" / "map.csv"
    ).read_bytes()


def test_a_map_stopped_half_way_resumes_to_the_same_table(tmp_path: Path) -> None:
    preset = tmp_path / "small.toml"
    preset.write_text(SMALL)
    scenario = load_scenario(preset)
    total = len(plan(scenario))
    stopped = tmp_path / "stopped"
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    process = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "app.cli",
            "map",
            str(preset),
            "--out",
            str(stopped),
            "--jobs",
            "1",
        ],
        env=env,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    table = stopped / "map.csv"
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:  # wait for the first stack's rows, then press Ctrl-C
        if table.exists() and len(table.read_text().splitlines()) > 1:
            break
        time.sleep(0.05)
    process.send_signal(signal.SIGINT)
    _, err = process.communicate(timeout=120)
    assert process.returncode != 0 and "--resume" in err and "Traceback" not in err
    done_before = len(read_table(table))
    assert 0 < done_before < 54

    progress: list[MapProgress] = []
    run_map(scenario, stopped, jobs=1, resume=True, on_progress=lambda p: progress.append(p))
    resumed_done = progress[0].done
    assert progress[-1].computed == total - resumed_done  # nothing finished is computed again
    assert resumed_done >= 1
    run_map(scenario, tmp_path / "whole", jobs=1)
    assert table.read_bytes() == (tmp_path / "whole" / "map.csv").read_bytes()


def test_a_map_killed_mid_write_resumes_to_the_same_table(tmp_path: Path) -> None:
    preset = tmp_path / "small.toml"
    preset.write_text(SMALL)
    scenario = load_scenario(preset)
    killed = tmp_path / "killed"
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    process = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "app.cli",
            "map",
            str(preset),
            "--out",
            str(killed),
            "--jobs",
            "1",
        ],
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    table = killed / "map.csv"
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        if table.exists() and len(table.read_text().splitlines()) > 1:
            break
        time.sleep(0.05)
    process.kill()  # SIGKILL: no handler runs, nothing is tidied up
    process.wait(timeout=30)
    with table.open("a") as f:  # as if the kill had landed in the middle of an append
        f.write("global-norm,global-norm,0.1,32,0,0.52")
    progress: list[MapProgress] = []
    run_map(scenario, killed, jobs=1, resume=True, on_progress=progress.append)
    assert progress[-1].computed == progress[-1].total - progress[0].done
    run_map(scenario, tmp_path / "whole", jobs=1)
    assert table.read_bytes() == (tmp_path / "whole" / "map.csv").read_bytes()


def test_resuming_with_a_changed_scenario_is_refused(tmp_path: Path) -> None:
    from core.errors import GradfenceInputError

    scenario = parse_scenario(__import__("tomllib").loads(SMALL))
    run_map(scenario, tmp_path, jobs=1)
    with pytest.raises(GradfenceInputError, match="another scenario"):
        run_map(scenario.with_overrides({"train.lr": 0.03}), tmp_path, jobs=1, resume=True)


def test_a_map_point_means_outlier_share_and_pass_over_every_outlier_step_of_its_run() -> None:
    # The reference is the same members trained with every step logged: the mean of their
    # logged rows over the steps whose batch held an outlier. Logging does not change the
    # trajectory, so the two runs are the same run.
    scenario = parse_scenario(__import__("tomllib").loads(SMALL))
    chunk = next(c for c in plan(scenario) if c.batch_size == 16)
    rows = run_chunk(dumps_scenario(scenario), chunk)
    every = collect(
        Engine(scenario.with_overrides({"train.eval_every": 1}), members_of(scenario, chunk), 16)
    )
    with_outliers = every.metric("batch_outliers") > 0  # (steps, members)
    assert 0.3 < with_outliers[:, 0].mean() < 0.7  # rate 0.5: about half the steps
    for i, row in enumerate(rows):
        for name in ("outlier_pass", "outlier_share"):
            expected = every.metric(name)[with_outliers[:, i], i].astype(np.float64).mean()
            assert row[name] == pytest.approx(expected, rel=1e-5), (row["label"], name)


@pytest.mark.slow
def test_the_coupling_preset_couples_global_norm_to_the_batch_size_as_its_notes_say(
    tmp_path: Path,
) -> None:
    # Mirrors Brock et al. 2021 (section 4.1, appendix D; REFERENCES.md): the best clipping
    # threshold of batch-mean clipping falls as the batch size grows; per-example clipping
    # shows no such trend.
    # The verdict must not hang on the tolerance: it holds at the preset's own and at 0.5, on
    # the loss above the task's floor (the target-noise variance, core.tasks.loss_floor).
    scenario = load_scenario(SCENARIOS / "batch-size-coupling.toml")
    rows = run_map(scenario, tmp_path, jobs=2)
    for tolerance in sorted({scenario.map.tolerance, 0.5}):
        results = analyse(rows, tolerance, loss_floor(scenario))
        global_norm, example_norm = results["global-norm"], results["example-norm"]
        assert global_norm.lower_slope is not None and global_norm.lower_slope < -0.1
        assert global_norm.common is None, tolerance
        assert example_norm.common is not None, tolerance
    # The preset's notes (tolerance 1 on the loss above the floor): both global-norm edges
    # slide down "about as B^-1.3 and B^-0.9" (within 0.25 and 0.3), and example-norm's common
    # window is "3.2 to 10" (the grid's 3.16 to 10).
    results = analyse(rows, scenario.map.tolerance, loss_floor(scenario))
    assert results["global-norm"].lower_slope == pytest.approx(-1.3, abs=0.25)
    assert results["global-norm"].upper_slope == pytest.approx(-0.9, abs=0.3)
    assert results["example-norm"].common == pytest.approx((3.1623, 10.0), rel=1e-4)
    # The seeds agree: every batch size's best global-norm threshold falls as B grows.
    smap = stability_map(rows, "global-norm")
    best = [smap.thresholds[int(np.argmin(row))] for row in smap.loss]
    assert best == sorted(best, reverse=True) and best[0] > best[-1]


@pytest.mark.slow
@pytest.mark.parametrize("data_seed", [1, 2])
def test_the_coupling_verdict_holds_on_other_draws_of_its_data(
    tmp_path: Path, data_seed: int
) -> None:
    # The verdict (global-norm has no common window, example-norm has one) must not be a
    # property of one draw of the data: it holds for data seeds 1 and 2 as for the shipped 0,
    # at tolerance 0.5 and 1 on the loss above the floor. Measured: example-norm's common window
    # 5.62 to 10 (seed 1) and 3.16 to 17.8 (seed 2) at both tolerances.
    shipped = load_scenario(SCENARIOS / "batch-size-coupling.toml")
    scenario = shipped.with_overrides({"data.seed": data_seed})
    rows = run_map(scenario, tmp_path, jobs=2)
    for tolerance in (0.5, 1.0):
        results = analyse(rows, tolerance, loss_floor(scenario))
        assert results["global-norm"].common is None, tolerance
        assert results["example-norm"].common is not None, tolerance


NOISY = {
    # Targets with noise 2 and a fixed learning rate: the batch-mean norm is noise-dominated
    # (tr(Sigma)/B well above |G|^2) over the range, so E|g_B| ~ B^-1/2.
    "data": {"task": "linear", "dim": 8, "noise": 2.0, "n_train": 8192, "n_val": 500},
    "outliers": {
        "kind": "target-shift",
        "placement": "batch",
        "rate": 0.5,
        "count": 1,
        "scale": 30.0,
    },
    "model": {"kind": "linear"},
    "train": {"steps": 300, "lr": 0.02},
    "clip": [{"method": "global-norm"}, {"method": "example-norm"}],
    "map": {
        "batch_sizes": [8, 32, 128, 512],
        "seeds": [0, 1],
        "thresholds": {"min": 0.01, "max": 100.0, "count": 13},
    },
}


@pytest.mark.slow
def test_clip_onset_falls_as_root_b_for_global_norm_and_stays_for_example_norm(
    tmp_path: Path,
) -> None:
    # From E|g_B|^2 = |G|^2 + tr(Sigma)/B (REFERENCES.md, closed form): where the noise term
    # dominates, the median batch-mean norm, hence the onset, goes as B^-1/2 (derived bound:
    # slope between -0.7 and -0.3); a per-example norm does not depend on B.
    rows = run_map(parse_scenario(NOISY), tmp_path, jobs=2)
    results = analyse(rows)
    assert results["global-norm"].onset_slope is not None
    assert -0.7 < results["global-norm"].onset_slope < -0.3
    assert results["example-norm"].onset_slope is not None
    assert abs(results["example-norm"].onset_slope) < 0.1


def test_norm_profile_predicts_the_measured_batch_mean_norms_of_the_linear_task() -> None:
    # E|g_B|^2 = |G|^2 + tr(Sigma)/B (N-B)/(N-1) (REFERENCES.md), checked against batch means
    # measured by the engine at the same (frozen) weights, B = 4 ... 1024.
    scenario = parse_scenario(
        {
            "data": {"task": "linear", "dim": 6, "n_train": 2048, "n_val": 64, "noise": 0.5},
            "model": {"kind": "linear"},
            "train": {"steps": 1500, "lr": 1e-12, "eval_every": 1},
            "clip": [{"method": "none"}],
        }
    )
    profile = norm_profile(scenario, checkpoint=0)
    assert profile.examples == profile.population == 2048
    for batch in (4, 16, 64, 256, 1024):
        engine = Engine(scenario, [Member(ClipConfig(method="none"), 0)], batch)
        measured = collect(engine).metric("grad_norm_pre")[:, 0].astype(np.float64) ** 2
        standard_error = measured.std() / math.sqrt(len(measured))  # independent batches
        assert abs(measured.mean() - profile.predicted_sq(batch)) < 4 * standard_error, batch
