"""Threshold windows on hand-made map tables: the criterion, contiguity, the floor, the words."""

from __future__ import annotations

import math
from typing import Any

import pytest

from core.analysis import analyse, sentence, threshold_windows, window_line, windows_json

GRID = (0.01, 0.1, 1.0, 10.0, 100.0)


def table(columns: dict[int, list[float]], label: str = "global-norm") -> list[dict[str, Any]]:
    """Map rows of one method and one seed: per batch size, a final loss per grid threshold
    (inf: diverged, nan: missing)."""
    rows = []
    for batch, losses in columns.items():
        for t, loss in zip(GRID, losses, strict=True):
            if math.isnan(loss):
                continue
            rows.append(
                {
                    "method": "global-norm",
                    "label": label,
                    "threshold": t,
                    "batch_size": batch,
                    "seed": 0,
                    "final_val_loss": loss,
                    "diverged": math.isinf(loss),
                    "clean_clipped_share": 0.0,
                }
            )
    return rows


def test_a_window_is_the_run_around_the_best_and_never_spans_a_hole() -> None:
    # Within a factor 2 of the best 0.5 means at most 1.0 (tolerance 1, floor 0, by hand): 0.01
    # and 100 pass too, but a failing (3.0), diverged or missing threshold lies between.
    for hole in (3.0, math.inf, math.nan):  # B = 32 puts the missing 0.1 on the grid
        rows = table({8: [0.9, hole, 0.5, 0.6, 0.8], 32: [1.0] * 5})
        w = threshold_windows(rows, "global-norm").windows[0]
        assert (w.lower, w.upper, w.best) == (1.0, 100.0, 1.0)
        assert w.inside == (1.0, 10.0, 100.0)  # every grid threshold from lower to upper
        assert not w.at_lower_edge and w.at_upper_edge


def test_the_criterion_is_taken_on_the_loss_above_the_floor() -> None:
    # Losses 0.30, 0.26, 0.27, 0.40, 0.60 over a floor of 0.25: excesses 0.05, 0.01, 0.02,
    # 0.15, 0.35; a factor 2 of the best excess admits 0.26 and 0.27 only. Without the floor a
    # factor 2 of 0.26 (0.52) admits all but the last.
    rows = table({8: [0.30, 0.26, 0.27, 0.40, 0.60]})
    assert threshold_windows(rows, "global-norm", 1.0, floor=0.25).windows[0].inside == (0.1, 1.0)
    assert threshold_windows(rows, "global-norm", 1.0).windows[0].inside == GRID[:4]
    # A best loss at the floor (or below it, by the luck of the validation sample) admits only
    # the thresholds not above it.
    flat = table({8: [0.30, 0.24, 0.25, 0.26, 0.60]})
    assert threshold_windows(flat, "global-norm", 1.0, floor=0.25).windows[0].inside == (0.1, 1.0)


def test_may_be_wider_is_said_only_when_the_common_window_reaches_the_end_of_the_grid() -> None:
    # Windows 0.1-100 (open above) and 0.1-10: the common window 0.1 to 10 lies inside the grid.
    inner = analyse(table({8: [9, 1, 1, 1, 1], 32: [9, 1, 1, 1, 9]}))["global-norm"]
    assert inner.common == (0.1, 10.0) and inner.common_inside == (0.1, 1.0, 10.0)
    assert sentence(inner).endswith(": 0.1 to 10.")
    assert "may be wider" not in sentence(inner)
    assert window_line(inner) == "  global-norm windows: B=8 0.1 to >=100, B=32 0.1 to 10"
    # Both open above: the common window is 0.1 to >=100 and may be wider.
    outer = analyse(table({8: [9, 1, 1, 1, 1], 32: [9, 9, 1, 1, 1]}))["global-norm"]
    assert outer.common == (1.0, 100.0) and outer.common_at_upper_edge
    assert ": 1 to >=100 (the window reaches the end of the grid" in sentence(outer)
    below = analyse(table({8: [1, 1, 9, 9, 9], 32: [1, 9, 9, 9, 9]}))["global-norm"]
    assert below.common == (0.01, 0.01) and ": <=0.01 (the window" in sentence(below)


def test_windows_json_names_the_criterion_and_the_floor_and_lists_every_inside_threshold() -> None:
    results = analyse(table({8: [9, 1, 1, 1, 9], 32: [9, 9, 1, 1, 9]}), 1.0, 0.25)
    found = windows_json(results, 1.0, 0.25, "the target-noise variance")
    assert found["floor"] == 0.25 and found["floor_source"] == "the target-noise variance"
    assert "above the floor" in found["criterion"] and "contiguous" in found["criterion"]
    for w in found["methods"]["global-norm"]["windows"]:
        assert w["inside"] == [t for t in GRID if w["lower"] <= t <= w["upper"]]
    common = found["methods"]["global-norm"]["common"]
    assert common == {
        "lower": 1.0,
        "upper": 10.0,
        "inside": [1.0, 10.0],
        "at_lower_edge": False,
        "at_upper_edge": False,
    }


@pytest.mark.parametrize("tolerance", [0.5, 1.0])
def test_a_window_with_no_finite_loss_is_empty(tolerance: float) -> None:
    w = analyse(table({8: [math.inf] * 5, 32: [1, 1, 1, 1, 1]}), tolerance)["global-norm"]
    assert w.windows[0].lower is None and w.common is None
