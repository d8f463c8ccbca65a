"""The generated form shows exactly the fields that apply, under plain names, with the TOML key
and the range in each tooltip, and the threshold names its unit per method."""

from __future__ import annotations

import itertools

import pytest
from pytestqt.qtbot import QtBot

from app.scenario_form import ScenarioForm
from core.fan_model import FanModel
from core.map_model import MapModel
from core.methods import METHODS
from core.scenario import RULE_OPTIONS, RULES, parse_scenario

SHARED_CLIP = {"method", "label"}


def form_for(qtbot: QtBot, scenario_tables: dict, kind: str = "fan") -> ScenarioForm:  # type: ignore[type-arg]
    scenario = parse_scenario(scenario_tables)
    model = (FanModel if kind == "fan" else MapModel)("t", scenario)
    form = ScenarioForm(model)
    qtbot.addWidget(form)
    return form


def clip_keys(form: ScenarioForm) -> set[str]:
    return {k.removeprefix("clip.0.") for k in form.visible_keys() if k.startswith("clip.0.")}


@pytest.mark.parametrize(
    ("method", "rule", "on_spike"),
    [(m, r, s) for m, r, s in itertools.product(METHODS, RULES, ("clip", "skip")) if m != "none"],
)
def test_a_clip_table_shows_its_methods_and_rules_fields_only(
    qtbot: QtBot, method: str, rule: str, on_spike: str
) -> None:
    model = {"kind": "linear", "exclude_head": False}
    tables = {
        "data": {"task": "linear", "dim": 4},
        "model": model,
        "train": {"batch_size": 32},
        "clip": [{"method": method, "rule": rule, "on_spike": on_spike}],
    }
    form = form_for(qtbot, tables)
    expected = SHARED_CLIP | {"rule", "on_spike"} | set(RULE_OPTIONS[rule])
    expected |= set(METHODS[method].options)
    expected |= {"threshold"} if rule == "fixed" else set()
    expected |= {"skip_factor"} if on_spike == "skip" else set()
    assert clip_keys(form) == expected
    if rule == "fixed":
        label = form.labels["clip.0.threshold"].text()
        assert METHODS[method].unit in label


def test_method_none_shows_nothing_but_its_method_and_name(qtbot: QtBot) -> None:
    form = form_for(qtbot, {"clip": [{"method": "none"}]})
    assert clip_keys(form) == SHARED_CLIP


@pytest.mark.parametrize(
    ("tables", "shown", "hidden"),
    [
        ({"data": {"task": "blobs"}}, {"data.classes", "data.dim"}, set()),
        ({"data": {"task": "moons"}}, set(), {"data.classes", "data.dim"}),
        (
            {"data": {"task": "linear"}, "outliers": {"kind": "target-shift"}},
            {"data.dim", "outliers.scale"},
            {"data.classes"},
        ),
        (
            {"outliers": {"kind": "label-flip", "placement": "dataset"}},
            {"outliers.fraction"},
            {"outliers.rate", "outliers.count", "outliers.scale", "outliers.start"},
        ),
        (
            {"outliers": {"kind": "label-flip", "placement": "batch", "when": "burst"}},
            {"outliers.rate", "outliers.count", "outliers.start", "outliers.length"},
            {"outliers.fraction"},
        ),
        (
            {"outliers": {"kind": "none"}},
            {"outliers.kind"},
            {"outliers.placement", "outliers.rate", "outliers.when", "outliers.scale"},
        ),
        ({"model": {"kind": "linear"}}, set(), {"model.hidden", "model.activation"}),
        ({"model": {"kind": "mlp"}}, {"model.hidden", "model.activation"}, set()),
        ({"train": {"lr_scaling": "none"}}, set(), {"train.reference_batch"}),
        ({"train": {"lr_scaling": "sqrt"}}, {"train.reference_batch"}, set()),
        ({"train": {"optimizer": "adam"}}, set(), {"train.momentum", "train.nesterov"}),
        (
            {"clip": [{"method": "unit-agc"}]},
            {"model.exclude_head", "clip.0.eps"},
            {"clip.0.microbatch"},
        ),
        ({"clip": [{"method": "global-norm"}]}, set(), {"model.exclude_head"}),
    ],
)
def test_tables_show_the_fields_their_settings_use(
    qtbot: QtBot,
    tables: dict,
    shown: set[str],
    hidden: set[str],  # type: ignore[type-arg]
) -> None:
    keys = form_for(qtbot, tables).visible_keys()
    assert shown <= keys and not hidden & keys


def test_the_map_grid_shows_in_a_map_entry_and_not_in_a_fan(qtbot: QtBot) -> None:
    assert not any(k.startswith("map.") for k in form_for(qtbot, {}).visible_keys())
    keys = form_for(qtbot, {}, kind="map").visible_keys()
    assert {"map.batch_sizes", "map.seeds", "map.tolerance", "clip.1.map_thresholds"} <= keys


def test_labels_are_plain_words_with_the_key_and_range_in_the_tooltip(qtbot: QtBot) -> None:
    form = form_for(qtbot, {})
    assert form.labels["data.n_train"].text() == "Training examples (examples)"
    assert form.labels["model.exclude_head"].text() == "Leave the output layer unclipped"
    tip = form.widgets["train.lr"].toolTip()
    assert tip.startswith("train.lr\n") and "greater than 0 and at most 10000" in tip


def test_an_edit_that_changes_what_applies_shows_and_hides_rows(qtbot: QtBot) -> None:
    form = form_for(qtbot, {"outliers": {"kind": "label-flip", "placement": "batch"}})
    assert "outliers.rate" in form.visible_keys()
    form.widgets["outliers.placement"].setCurrentText("dataset")  # type: ignore[attr-defined]
    assert "outliers.fraction" in form.visible_keys()
    assert "outliers.rate" not in form.visible_keys()
