"""Desktop responsiveness while a run entry trains, offscreen.

1. launch to window shown: a fresh process that imports the app, opens the demo study and
   reports when the window is on screen (interpreter start-up included).
2. event-loop latency: a 10 ms timer probe runs while the demo's first entry trains in the
   workers; lateness = actual interval - 10 ms; p99 and max.
3. plot redraw rate: refreshes of a training entry's plots per second while records arrive
   (the demo's linear-regression entry, run for 5000 steps so that the measurement sees
   steady training), beside the rate at which
   record batches arrive: the window redraws at most once per drain tick, never per record.
"""

from __future__ import annotations

import os
import statistics
import subprocess
import sys
import time
from pathlib import Path

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

CHILD = """
import time
from PySide6 import QtWidgets
from app.desktop import demo_path
from app.main_window import MainWindow
from core.study import Study
app = QtWidgets.QApplication([])
window = MainWindow(Study.open(demo_path()))
window.show()
app.processEvents()
print("shown", flush=True)
window.close()
"""


def launch_time() -> float:
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    start = time.perf_counter()
    process = subprocess.Popen(
        [sys.executable, "-c", CHILD], stdout=subprocess.PIPE, text=True, env=env
    )
    assert process.stdout is not None
    for line in process.stdout:
        if line.strip() == "shown":
            elapsed = time.perf_counter() - start
            break
    else:
        raise RuntimeError("the window never showed")
    process.wait(timeout=30)
    return elapsed


def responsiveness(seconds: float = 8.0) -> tuple[list[float], float, float]:
    from PySide6 import QtCore, QtWidgets

    from app.desktop import demo_path
    from app.main_window import MainWindow
    from core.entry_model import TRAINING
    from core.study import Study

    app = QtWidgets.QApplication.instance() or QtWidgets.QApplication([])
    window = MainWindow(Study.open(demo_path()))
    window.show()
    window.pool.start()
    while window.pool.ready < window.pool.size:  # workers import torch first
        app.processEvents()
        time.sleep(0.01)
    window.auto_train = False
    view = window.fan_views[1]
    # Long enough that the whole measurement sees training, not the stacks' set-up.
    view.model.set_scenario(view.model.scenario.with_overrides({"train.steps": 5000}))
    arrivals = [0]
    view.model.subscribe(lambda what: arrivals.__setitem__(0, arrivals[0] + (what == "data")))
    window.runner.train(view.model)
    lateness: list[float] = []
    last = [time.perf_counter()]

    def probe() -> None:
        now = time.perf_counter()
        lateness.append((now - last[0]) * 1e3 - 10.0)
        last[0] = now

    timer = QtCore.QTimer()
    timer.setTimerType(QtCore.Qt.TimerType.PreciseTimer)
    timer.timeout.connect(probe)
    start_redraws = view.redraws
    start = time.perf_counter()
    last[0] = start
    timer.start(10)
    while time.perf_counter() - start < seconds and view.model.status == TRAINING:
        app.processEvents(QtCore.QEventLoop.ProcessEventsFlag.AllEvents, 5)
        time.sleep(0.001)
    elapsed = time.perf_counter() - start
    timer.stop()
    rate = (view.redraws - start_redraws) / elapsed
    window.close()
    return lateness, rate, arrivals[0] / elapsed


def main() -> None:
    launches = [launch_time() for _ in range(3)]
    lateness, rate, arrivals = responsiveness()
    ordered = sorted(lateness)
    p99 = ordered[int(0.99 * (len(ordered) - 1))]
    print(
        f"launch to window shown: {statistics.median(launches):.2f} s (median of 3, target < 3 s)"
    )
    print(
        f"event-loop lateness of a 10 ms probe: p99 {p99:.1f} ms, max {max(lateness):.1f} ms "
        f"over {len(lateness)} ticks (targets < 25 ms and < 100 ms)"
    )
    print(
        f"plot redraw rate while training: {rate:.1f} Hz (target >= 20); "
        f"record batches arrived at {arrivals:.1f} Hz"
    )
    print(f"ui_probe_p99_lateness: {p99:.1f} ms (target < 25)")


if __name__ == "__main__":
    main()
