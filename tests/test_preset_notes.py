"""Every number a shipped preset's notes (and the demo study's notes) quote, measured.

A setting the notes name is read from the preset; a measured value is taken from the preset's own
run (outlier pass-through and share: means over every step whose batch held an outlier, as a
map reports them). Where a note says "about", the tolerance is written beside the check. The
coupling preset's map-based claims (window slopes and the common window) are checked by the map
test in tests/core/test_maps.py, which trains that map once; the guided study's numbers by
tests/test_guided_study.py.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pytest

from core import api
from core.engine import Engine, Member
from core.fan import FAN_SIZE, FAN_SPAN, batch_ladder
from core.maps import plan
from core.profile import norm_profile
from core.scenario import Scenario, load_scenario
from core.study_file import load_study
from core.tasks import loss_floor
from tests.conftest import SCENARIOS


def preset(name: str) -> Scenario:
    return load_scenario(SCENARIOS / f"{name}.toml")


@dataclass
class Measured:
    """One stack's logged rows, and its means over every outlier step."""

    values: dict[str, np.ndarray]  # (steps, members)
    outlier_means: dict[str, np.ndarray]  # (members,)
    clean_norms: list[np.ndarray]  # per member, the clean examples' norms on logged steps
    outlier_norms: list[np.ndarray]
    names: list[str]

    def of(self, name: str, label: str) -> np.ndarray:
        return self.values[name][:, self.names.index(label)]

    def mean(self, name: str, label: str) -> float:
        return float(self.outlier_means[name][self.names.index(label)])


def measure(scenario: Scenario, batch: int | None = None) -> Measured:
    s = scenario
    members = [Member(c, s.train.seed) for c in s.clip]
    engine = Engine(s, members, batch, keep_norms=True, outlier_steps=True)
    records = list(engine.records())
    values = {k: np.array([r.values[k] for r in records]) for k in records[0].values}
    clean, out = [], []
    for i in range(len(members)):
        pairs = [(r.example_norms[i], r.outlier[i]) for r in records]  # type: ignore[index]
        clean.append(np.concatenate([n[~o] for n, o in pairs]))
        out.append(np.concatenate([n[o] for n, o in pairs]))
    return Measured(values, engine.outlier_step_means(), clean, out, [m.name for m in members])


def clip_of(scenario: Scenario, label: str) -> float:
    threshold = next(c.threshold for c in scenario.clip if c.display_name == label)
    assert threshold is not None
    return threshold


def test_the_coupling_presets_notes() -> None:
    s = preset("batch-size-coupling")
    o = s.outliers
    assert (o.kind, o.scale, o.rate, o.count) == ("target-shift", 45.0, 0.5, 1)  # "by 45", "half"
    assert s.train.lr_scaling == "linear" and s.train.reference_batch == 32  # "lr * B/32"
    assert (min(s.map.batch_sizes), max(s.map.batch_sizes)) == (8, 512)
    assert loss_floor(s) == 0.25  # "the target noise 0.25"
    assert sum(len(c.points) for c in plan(s)) == 860  # "860 members"
    for batch in (8, 512):
        run = measure(s, batch)
        label = "example-norm"
        # "outliers near 250": the median within 10%; "ordinary examples about 2, nine in ten
        # below 6": the median of the clean examples' norms over the run within 15% of 2, and
        # their 90th percentile within [4.5, 6) (measured: medians 2.00 and 1.95, p90 5.0 to 5.6).
        clean = run.clean_norms[run.names.index(label)]
        assert 225 < np.median(run.outlier_norms[run.names.index(label)]) < 275
        assert 1.7 < np.median(clean) < 2.3
        assert 4.5 <= np.percentile(clean, 90) < 6.0


def test_the_outlier_presets_notes_at_its_own_and_a_large_batch_size() -> None:
    s = preset("outliers-meet-batch-size")
    assert (s.outliers.kind, s.outliers.rate, s.outliers.count) == ("label-flip", 0.2, 1)
    assert clip_of(s, "global-norm") == 1.0 == clip_of(s, "example-norm")
    run = measure(s)
    # "about 10 against ... a median of about 0.07": medians over the logged steps of the
    # unclipped member within [8, 12] and [0.05, 0.09].
    assert 8 < np.median(run.outlier_norms[0]) < 12
    assert 0.05 < np.median(run.clean_norms[0]) < 0.09
    assert run.mean("outlier_pass", "global-norm") == pytest.approx(0.99, abs=0.005)
    assert run.mean("outlier_pass", "example-norm") == pytest.approx(0.09, abs=0.005)
    final = {name: float(run.of("val_loss", name)[-1]) for name in run.names}
    assert final["example-norm"] == pytest.approx(0.033, abs=0.0005)
    assert final["none"] == pytest.approx(0.038, abs=0.0005)
    assert min(final, key=lambda k: final[k]) == "example-norm"  # "the lowest"
    assert run.mean("outlier_share", "global-norm") == pytest.approx(0.56, abs=0.005)
    large = measure(s, 256)
    assert large.mean("outlier_pass", "global-norm") == pytest.approx(1.0, abs=0.005)
    assert large.mean("outlier_share", "global-norm") == pytest.approx(0.31, abs=0.005)
    # "still keeps about a tenth": 0.07 to 0.13.
    assert 0.07 < large.mean("outlier_pass", "example-norm") < 0.13


def test_the_linear_presets_notes() -> None:
    s = preset("linear-target-shift")
    o = s.outliers
    assert (s.data.noise, o.rate, o.count, o.scale) == (0.1, 0.1, 2, 30.0)
    assert next(c.microbatch for c in s.clip if c.method == "microbatch-norm") == 4
    run = measure(s)
    # "sits between example and global clipping", in the outliers' pass-through.
    passes = {m: run.mean("outlier_pass", m) for m in ("example-norm", "microbatch-norm")}
    assert (
        passes["example-norm"] < passes["microbatch-norm"] < run.mean("outlier_pass", "global-norm")
    )


def test_the_moons_presets_notes() -> None:
    s = preset("moons-scaled-inputs")
    assert (s.outliers.fraction, s.outliers.scale) == (0.02, 20.0)  # "Two percent", "by 20"
    result = api.run(s)
    final = dict(zip(result.member_names, result.final("val_loss"), strict=True))
    assert final["unit-agc"] == pytest.approx(0.049, abs=0.0005)
    assert final["global-norm"] == pytest.approx(0.079, abs=0.0005)
    assert min(final, key=lambda k: final[k]) == "unit-agc"  # "ends best here"
    assert final["example-agc"] == pytest.approx(0.26, abs=0.005)
    shares = result.metric("clipped_share")[:, result.member_names.index("example-agc")]
    assert float(np.mean(shares)) == pytest.approx(0.38, abs=0.005)  # "38% of example units"


def test_the_spirals_presets_notes() -> None:
    s = preset("spirals-shift-burst")
    o = s.outliers
    assert (o.length, o.rate, o.count, o.when) == (60, 0.5, 4, "burst")
    assert clip_of(s, "global-norm") == 0.5
    result = api.run(s)
    final = dict(zip(result.member_names, result.final("val_loss"), strict=True))
    clipped = {
        name: float(np.mean(result.metric("clipped_share")[:, i]))
        for i, name in enumerate(result.member_names)
    }
    assert clipped["global-norm zscore"] == pytest.approx(0.18, abs=0.005)  # of logged steps
    assert clipped["global-norm"] == pytest.approx(0.30, abs=0.005)
    assert final["global-norm zscore"] == pytest.approx(0.28, abs=0.005)
    assert final["global-norm"] == pytest.approx(0.33, abs=0.005)
    assert final["none"] == pytest.approx(0.51, abs=0.005)


def test_the_corrupt_records_presets_notes() -> None:
    s = preset("teacher-corrupt-records")
    assert (s.outliers.kind, s.outliers.rate) == ("nonfinite", 0.02)  # "One step in fifty"
    result = api.run(s)
    diverged = dict(zip(result.member_names, result.diverged_at, strict=True))
    assert diverged["global-norm"] is not None  # "the member diverges"
    assert diverged["global-norm skip"] is None and diverged["example-norm"] is None


def test_the_private_training_presets_notes() -> None:
    s = preset("xor-private-training")
    assert (s.outliers.kind, s.outliers.fraction) == ("label-flip", 0.05)  # "Five percent"
    assert next(c for c in s.clip if c.method == "example-norm").noise_multiplier > 0


def test_the_worker_clipping_presets_notes_and_its_predicted_pass_through() -> None:
    s = preset("teacher-worker-clipping")
    o = s.outliers
    assert (o.rate, o.count, o.scale) == (0.3, 2, 12.0)  # "three steps in ten", "two", "by 12"
    assert clip_of(s, "global-norm") == 1.0 == clip_of(s, "microbatch-norm")
    assert next(c.microbatch for c in s.clip if c.method == "microbatch-norm") == 8
    profile = norm_profile(s)
    quoted = {8: 0.08, 32: 0.31, 128: 0.95, 512: 1.0}  # "about": within 0.02
    for batch in s.map.batch_sizes:
        run = measure(s, batch)
        at = profile.grid.index(batch)
        global_norm = run.mean("outlier_pass", "global-norm")
        worker = run.mean("outlier_pass", "microbatch-norm")
        assert global_norm == pytest.approx(quoted[batch], abs=0.02)
        assert 0.07 < worker < 0.13  # "about 0.1 at every batch size"
        # "within 0.03 of what the runs measure" (issue 11 asks for 0.1)
        assert profile.methods["global-norm"].pass_through[at] == pytest.approx(
            global_norm, abs=0.03
        )
        assert profile.methods["microbatch-norm"].pass_through[at] == pytest.approx(
            worker, abs=0.03
        )


def test_the_demo_studys_notes() -> None:
    study = load_study(SCENARIOS / "demo.study.toml")
    fans = [e for e in study.entries if e.kind == "fan" and e.scenario is not None]
    assert FAN_SIZE == 17 and FAN_SPAN == 30.0  # "17 thresholds, from 1/30 to 30 times"
    assert all(len(batch_ladder(e.scenario)) == 4 for e in fans)  # "four batch sizes"
    assert fans[0].scenario.name == "Outliers meet batch size"  # its notes: the test above
    (mapped,) = [e.scenario for e in study.entries if e.kind == "map"]
    assert mapped is not None
    assert (min(mapped.map.batch_sizes), max(mapped.map.batch_sizes)) == (8, 512)
    assert len(mapped.thresholds_for(mapped.clip[1])) == 21 and len(mapped.map.seeds) == 5
    assert mapped.train.lr_scaling == "linear"
    assert loss_floor(mapped) == 0.25 and mapped.map.tolerance == 1.0  # "0.25", "a factor 2"
