"""Scenario presets: strict loading with one-sentence errors, overrides, saving, hashing."""

from __future__ import annotations

import copy
import os
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from app.cli import main
from core.errors import GradfenceInputError
from core.scenario import (
    Scenario,
    dumps_scenario,
    load_scenario,
    loads_scenario,
    parse_override,
    parse_scenario,
    save_scenario,
)

VALID = """\
schema = 2
name = "A test preset"

[data]
task = "blobs"
n_train = 500

[train]
steps = 20
batch_size = 16

[[clip]]
method = "global-norm"
threshold = 0.5
"""


def check_file(tmp_path: Path, text: str, capsys: pytest.CaptureFixture[str]) -> tuple[int, str]:
    path = tmp_path / "preset.toml"
    path.write_text(text)
    code = main(["check", str(path)])
    return code, capsys.readouterr().err


def assert_one_sentence(err: str) -> None:
    assert "Traceback" not in err
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, err
    assert lines[0].rstrip().endswith((".", "?")), err


def test_valid_preset_passes_check(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code, _ = check_file(tmp_path, VALID, capsys)
    assert code == 0


def test_unknown_key_names_the_path_and_suggests_the_right_key(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code, err = check_file(tmp_path, VALID.replace("batch_size = 16", "batchsize = 16"), capsys)
    assert code == 2
    assert "train.batchsize" in err and 'did you mean "train.batch_size"' in err
    assert_one_sentence(err)


def test_wrong_type_names_the_key_and_the_expected_type(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code, err = check_file(tmp_path, VALID.replace("steps = 20", 'steps = "twenty"'), capsys)
    assert code == 2
    assert "train.steps must be a whole number" in err and '"twenty"' in err
    assert_one_sentence(err)


def test_out_of_range_value_states_the_allowed_range(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code, err = check_file(tmp_path, VALID.replace("threshold = 0.5", "threshold = -1.0"), capsys)
    assert code == 2
    assert "clip[0].threshold = -1 is out of range" in err and "at least 1e-09" in err
    assert_one_sentence(err)


def test_unknown_enum_value_lists_the_choices_and_the_nearest(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code, err = check_file(tmp_path, VALID.replace('"global-norm"', '"global_norm"'), capsys)
    assert code == 2
    assert "clip[0].method" in err and "example-norm" in err
    assert 'did you mean "global-norm"' in err
    assert_one_sentence(err)


def test_toml_syntax_error_gives_the_line(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code, err = check_file(tmp_path, VALID.replace("n_train = 500", "n_train = = 500"), capsys)
    assert code == 2
    assert "is not valid TOML" in err and "line 6" in err
    assert_one_sentence(err)


def test_missing_file_is_reported_as_bad_input(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code = main(["check", str(tmp_path / "nowhere.toml")])
    err = capsys.readouterr().err
    assert code == 2
    assert "nowhere.toml: no such file." in err
    assert_one_sentence(err)


def test_unsupported_schema_names_the_supported_one(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code, err = check_file(tmp_path, VALID.replace("schema = 2", "schema = 3"), capsys)
    assert code == 2
    assert "schema = 3 is not supported" in err and "schema = 2" in err
    assert_one_sentence(err)


def test_inconsistent_keys_are_rejected_with_a_way_out(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    text = (
        VALID.replace('task = "blobs"', 'task = "linear"') + '\n[outliers]\nkind = "label-flip"\n'
    )
    code, err = check_file(tmp_path, text, capsys)
    assert code == 2
    assert "outliers.kind" in err and "target-shift" in err
    assert_one_sentence(err)


@pytest.mark.parametrize("rule", ["percentile", "ema", "zscore"])
def test_dp_noise_with_an_adaptive_rule_is_refused_naming_both_keys(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], rule: str
) -> None:
    # DP-SGD noise has std sigma * C (Abadi et al. 2016); an adaptive rule has no level C during
    # its warm-up (it returns inf there), so the noise would be unbounded.
    text = VALID.replace('method = "global-norm"', 'method = "example-norm"') + (
        f'noise_multiplier = 0.5\nrule = "{rule}"\n'
    )
    code, err = check_file(tmp_path, text, capsys)
    assert code == 2
    assert "clip[0].noise_multiplier" in err and "clip[0].rule" in err and rule in err
    assert_one_sentence(err)
    fixed = VALID.replace('method = "global-norm"', 'method = "example-norm"') + (
        "noise_multiplier = 0.5\n"
    )
    assert check_file(tmp_path, fixed, capsys)[0] == 0


def test_bad_command_line_exits_2_without_traceback(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["run"]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and "preset" in err


def test_every_key_has_a_default() -> None:
    scenario = parse_scenario({})
    assert scenario == Scenario(clip=scenario.clip)
    assert [c.method for c in scenario.clip] == ["none", "global-norm", "example-norm"]


def test_method_default_thresholds_are_resolved() -> None:
    scenario = loads_scenario('[[clip]]\nmethod = "unit-agc"\n[[clip]]\nmethod = "example-norm"\n')
    # lambda = 0.01 is the published AGC default (REFERENCES.md, Brock et al. 2021 section 4).
    assert [c.threshold for c in scenario.clip] == [0.01, 1.0]


def test_threshold_grid_table_becomes_a_log_spaced_list() -> None:
    scenario = loads_scenario("[map]\nthresholds = {min = 0.01, max = 1.0, count = 3}\n")
    assert scenario.map.thresholds == pytest.approx((0.01, 0.1, 1.0))


def test_save_and_load_round_trip(tmp_path: Path) -> None:
    scenario = loads_scenario(VALID)
    path = tmp_path / "out.toml"
    save_scenario(scenario, path)
    assert load_scenario(path) == scenario


def test_a_failed_save_keeps_the_previous_file_whole(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = tmp_path / "keep.toml"
    path.write_text(VALID)

    def broken_replace(src: str, dst: str) -> None:
        raise OSError("disk full")

    monkeypatch.setattr(os, "replace", broken_replace)
    with pytest.raises(OSError):
        save_scenario(loads_scenario(VALID).with_overrides({"train.steps": 99}), path)
    assert path.read_text() == VALID
    assert [p.name for p in tmp_path.iterdir()] == ["keep.toml"]


def test_dotted_overrides_reach_tables_and_clip_entries() -> None:
    scenario = loads_scenario(VALID).with_overrides(
        dict(
            parse_override(o)
            for o in ("train.batch_size=64", "clip.0.threshold=2", "clip.0.rule=ema")
        )
    )
    assert scenario.train.batch_size == 64
    assert scenario.clip[0].threshold == 2.0 and scenario.clip[0].rule == "ema"


def test_override_of_an_unknown_key_is_an_input_error() -> None:
    with pytest.raises(GradfenceInputError, match=r'did you mean "train\.batch_size"'):
        loads_scenario(VALID).with_overrides({"train.batch_sise": 3})
    with pytest.raises(GradfenceInputError, match=r"index from 0 to 0"):
        loads_scenario(VALID).with_overrides({"clip.5.threshold": 3})


def test_hash_is_stable_and_ignores_name_and_notes() -> None:
    a = loads_scenario(VALID)
    b = loads_scenario(dumps_scenario(a))
    renamed = a.with_overrides({"name": "Other", "notes": "changed"})
    changed = a.with_overrides({"train.lr": 0.3})
    assert a.hash() == b.hash() == renamed.hash()
    assert changed.hash() != a.hash()


# ---------------------------------------------------------------------------------------------
# The loader never fails with anything but its own error type, whatever the mutation.

BASE: dict[str, Any] = {
    "schema": 2,
    "data": {"task": "moons", "n_train": 300, "noise": 0.1},
    "outliers": {"kind": "label-flip", "placement": "batch", "rate": 0.2, "count": 2},
    "model": {"hidden": [16, 16], "activation": "relu"},
    "train": {"steps": 50, "batch_size": 16, "lr": 0.1, "momentum": 0.5},
    "clip": [{"method": "example-norm", "threshold": 1.0}, {"method": "microbatch-norm"}],
    "map": {"batch_sizes": [8, 16], "thresholds": {"min": 0.1, "max": 10.0, "count": 3}},
}

values = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(min_value=-(2**40), max_value=2**40),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=12),
    st.lists(st.integers(min_value=-5, max_value=600), max_size=4),
    st.dictionaries(st.text(max_size=6), st.integers(), max_size=2),
)


def _paths(node: Any, prefix: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    found = [prefix] if prefix else []
    if isinstance(node, dict):
        for key, child in node.items():
            found += _paths(child, (*prefix, key))
    elif isinstance(node, list):
        for index, child in enumerate(node):
            found += _paths(child, (*prefix, index))
    return found


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.data())
def test_mutated_presets_are_accepted_or_rejected_with_our_error(data: st.DataObject) -> None:
    raw = copy.deepcopy(BASE)
    for _ in range(data.draw(st.integers(min_value=1, max_value=3))):
        path = data.draw(st.sampled_from(_paths(raw)))
        parent: Any = raw
        for key in path[:-1]:
            parent = parent[key]
        action = data.draw(st.sampled_from(["replace", "delete", "add"]))
        value = data.draw(values)
        if action == "delete" and isinstance(parent, dict):
            del parent[path[-1]]
        elif action == "add" and isinstance(parent, dict):
            parent[data.draw(st.text(min_size=1, max_size=8))] = value
        elif value is not None:
            parent[path[-1]] = value
    try:
        scenario = parse_scenario(raw, "mutated.toml")
    except GradfenceInputError as exc:
        assert str(exc).startswith("mutated.toml: ")
    else:
        assert isinstance(scenario, Scenario)
