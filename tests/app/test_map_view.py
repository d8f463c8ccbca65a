"""Map entries in the window: train to the end, maps equal the analysis, stop."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from pytestqt.qtbot import QtBot

from app.main_window import MainWindow
from core.analysis import analyse, stability_map
from core.entry_model import STOPPED, TRAINED
from core.profile import norm_profile
from core.study import Study
from core.tasks import loss_floor
from tests.core.test_maps import SMALL


@pytest.fixture
def window(qtbot: QtBot, tmp_path: Path) -> Iterator[MainWindow]:
    (tmp_path / "small.toml").write_text(SMALL)
    path = tmp_path / "map.study.toml"
    path.write_text(
        'title = "S"\n[[entry]]\nkind = "map"\ntitle = "Small map"\npreset = "small.toml"\n'
    )
    win = MainWindow(Study.open(path))
    win.auto_train = False
    qtbot.addWidget(win)
    win.show()
    yield win
    win.close()


def test_a_map_entry_trains_to_the_end_and_its_maps_are_the_analysis_table(
    qtbot: QtBot, window: MainWindow
) -> None:
    view = window.map_views[0]
    window.runner.train(view.model)
    qtbot.waitUntil(lambda: view.model.status == TRAINED, timeout=120_000)
    rows = view.model.rows
    assert len(rows) == 54
    scenario = view.model.scenario
    results = analyse(rows, scenario.map.tolerance, loss_floor(scenario))
    assert set(view.heatmaps) == set(results) == {"global-norm", "example-norm"}
    for label, shown in view.heatmaps.items():
        smap = stability_map(rows, label)
        np.testing.assert_array_equal(shown, np.log10(np.where(smap.diverged, np.nan, smap.loss)))
    for label, result in results.items():
        assert view.model.results[label].windows == result.windows
    text = view.sentences.text()
    assert "global-norm:" in text and "example-norm:" in text
    assert view.state_label.text() == "trained"
    # The norm profile came from a worker; it matches one computed here (float64 sums on
    # one thread there, maybe two here: equal to 1e-9).
    profile = view.model.profile
    assert profile is not None and "norm profile: at step" in text
    here = norm_profile(view.model.scenario)
    for name in ("grad_sq", "trace", "outlier_norm"):
        assert getattr(profile, name) == pytest.approx(getattr(here, name), rel=1e-9)
    # A window that reaches the end of the grid is drawn open: an arrow at that end, pointing
    # on (up past the largest threshold, down past the smallest), and a legend line saying so.
    arrows: dict[str, set[float]] = {"t1": set(), "t": set()}
    for item in view.canvas.ci.items:
        for curve in getattr(item, "listDataItems", lambda: [])():
            symbol = curve.opts.get("symbol")
            if symbol in arrows and curve.opts.get("pen") is None and curve.yData is not None:
                arrows[symbol] |= {round(float(y), 9) for y in curve.yData}
    open_up = {round(w.upper, 9) for r in results.values() for w in r.windows if w.at_upper_edge}
    open_down = {round(w.lower, 9) for r in results.values() for w in r.windows if w.at_lower_edge}
    assert open_up | open_down, "the small map should have a window that reaches the grid's end"
    assert arrows == {"t1": open_up, "t": open_down}
    titles = [item.titleLabel.text for item in view.canvas.ci.items if hasattr(item, "titleLabel")]
    assert sum("norm profile" in t for t in titles) == 2  # the norms and the pass-through
    # Issue 14: nothing cut off. A long title or legend must not widen the canvas past the
    # entry: every plot ends inside the canvas, in a window of a laptop's screen.
    window.resize(1440, 900)
    qtbot.wait(50)
    width = view.canvas.viewport().width()
    for item in view.canvas.ci.items:
        assert item.sceneBoundingRect().right() <= width + 1, (type(item).__name__, width)


def test_stopping_a_map_entry_stops_it(qtbot: QtBot, window: MainWindow) -> None:
    view = window.map_views[0]
    view.model.scenario = view.model.scenario.with_overrides({"train.steps": 3000})
    window.runner.train(view.model)
    qtbot.waitUntil(lambda: view.model.members_done >= 1, timeout=120_000)
    window.runner.stop(view.model)
    window._on_redraw_tick()
    assert view.model.status == STOPPED and view.state_label.text() == "stopped"
    done = view.model.members_done
    qtbot.waitUntil(lambda: not window.pool.busy, timeout=60_000)
    qtbot.wait(300)
    window.pool.poll()
    assert view.model.members_done == done < view.model.members_total
