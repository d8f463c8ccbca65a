"""How fast the desktop app answers, offscreen, each figure measured in the same run.

1. Launch to window shown: a fresh process opens the demo study the way `gradfence` does and
   says when the window is on screen (interpreter start-up included). Median of 3.
2. In one fresh process, as a person would: the window opens, its workers start in the
   background; then Train on the demo's first fan, and the time to its first record (the
   workers' readiness after launch is printed beside it), and to the whole fan trained.
3. Event-loop lateness of a 10 ms timer probe while that fan trains: p99 and max.
Baseline for the fan: the same fan trained the way the window trained it before: one worker at
full priority (one core left to the window), started when Train is pressed (it imports torch
then, as the window's workers did before they were started with it), one stack of every member
per batch size, largest first. Now: the workers already started with the window, each at low
priority, stacks of one method each, the members under the slider first. The ratio is printed,
and beside it the baseline's own time from its first record, without the worker's start.
"""

from __future__ import annotations

import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
REPO = Path(__file__).resolve().parent.parent

LAUNCH = """
import sys
from pathlib import Path
from app.desktop import open_window
from app.qt_app import application
from core.study import Study
study = Study.open(Path(sys.argv[1]))
app = application()
window = open_window(study)
app.processEvents()
print("shown", flush=True)
window.pool.start()
window.close()
"""

SESSION = """
import json, sys, time
start = time.perf_counter()
from PySide6 import QtCore
from pathlib import Path
from app.qt_app import application
from core.pool import WorkerPool
from core.study import Study
workers, nice = int(sys.argv[1]), int(sys.argv[2])
study = Study.open(Path(sys.argv[3]))
if sys.argv[4] == "before":  # the plan before: one stack of every member per batch size
    import core.runner
    def plan_before(model, focus=None):
        everyone = tuple(range(len(core.runner.fan_members(model.scenario))))
        return [core.runner.FanJob(b, everyone, False) for b in sorted(model.batch_sizes)[::-1]]
    core.runner.fan_jobs = plan_before
for entry in study.trained_entries:
    entry.reset()  # measure training, not the cache
app = application()
from app.main_window import MainWindow
window = MainWindow(study, WorkerPool(workers, nice=nice))
window.auto_train = False
window.show()
app.processEvents()
shown = time.perf_counter() - start
cold = sys.argv[4] == "before"  # the window before started its workers at Train
if not cold:
    window.pool.start()
    while window.pool.ready < window.pool.size:
        app.processEvents()
        time.sleep(0.005)
ready = time.perf_counter() - start
fan = window.fan_views[0]
lateness, last, first = [], [time.perf_counter()], [None]
loop = QtCore.QEventLoop()  # the window's own event loop, as app.exec() runs it
def probe():
    now = time.perf_counter()
    lateness.append((now - last[0]) * 1e3 - 10.0)
    last[0] = now
    if first[0] is None and any(s.any_filled for s in fan.model.stacks.values()):
        first[0] = now - clicked
    if fan.model.status != "training":
        loop.quit()
timer = QtCore.QTimer()
timer.setTimerType(QtCore.Qt.TimerType.PreciseTimer)
timer.timeout.connect(probe)
clicked = time.perf_counter()
if cold:
    window.pool.start()
window.runner.train(fan.model, focus=fan.factor)
last[0] = time.perf_counter()
timer.start(10)
loop.exec()
complete = time.perf_counter() - clicked
first = first[0]
timer.stop()
window.shut_down()
print(json.dumps({"shown": shown, "ready": ready, "first": first, "complete": complete,
                  "lateness": lateness, "status": fan.model.status}), flush=True)
"""


def launch_time(study: Path) -> float:
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    start = time.perf_counter()
    process = subprocess.Popen(
        [sys.executable, "-c", LAUNCH, str(study)],
        stdout=subprocess.PIPE,
        text=True,
        env=env,
        cwd=REPO,
    )
    assert process.stdout is not None
    for line in process.stdout:
        if line.strip() == "shown":
            elapsed = time.perf_counter() - start
            break
    else:
        raise RuntimeError("the window never showed")
    process.wait(timeout=60)
    return elapsed


def session(workers: int, nice: int, study: Path, plan: str) -> dict[str, object]:
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    out = subprocess.run(
        [sys.executable, "-c", SESSION, str(workers), str(nice), str(study), plan],
        capture_output=True,
        text=True,
        env=env,
        cwd=REPO,
        timeout=600,
        check=True,
    )
    result: dict[str, object] = json.loads(out.stdout.strip().splitlines()[-1])
    return result


def main() -> None:
    from app.desktop import demo_path
    from core.pool import DESKTOP_NICE, desktop_workers

    with tempfile.TemporaryDirectory(prefix="gradfence-ui-bench-") as scratch:
        # a copy of the shipped scenarios, so that training writes no results beside them
        shutil.copytree(demo_path().parent, scratch, dirs_exist_ok=True)
        study = Path(scratch) / demo_path().name
        launches = [launch_time(study) for _ in range(3)]
        now = session(desktop_workers(), DESKTOP_NICE, study, "now")
        before = session(1, 0, study, "before")
    lateness = sorted(now["lateness"])  # type: ignore[arg-type]
    p99 = lateness[int(0.99 * (len(lateness) - 1))]
    first, complete = float(now["first"]), float(now["complete"])  # type: ignore[arg-type]
    baseline = float(before["complete"])  # type: ignore[arg-type]
    baseline_start = float(before["first"])  # type: ignore[arg-type]
    print(
        f"launch to window shown: {statistics.median(launches):.2f} s (median of 3, target < 1.5 s)"
    )
    print(
        f"workers ready {float(now['ready']):.2f} s after launch "  # type: ignore[arg-type]
        f"({desktop_workers()} workers, nice {DESKTOP_NICE})"
    )
    print(f"Train to the first record: {first:.2f} s (target < 1 s)")
    print(
        f"the demo's first fan complete: {complete:.1f} s; as before (one worker started at "
        f"Train, one mixed stack per batch size): {baseline:.1f} s, {baseline_start:.1f} s of it "
        f"to its first record, {baseline - baseline_start:.1f} s after it (target: half)"
    )
    print(
        f"event-loop lateness of a 10 ms probe while it trains: p99 {p99:.1f} ms, max "
        f"{max(lateness):.1f} ms over {len(lateness)} ticks (targets < 25 ms and < 100 ms)"
    )
    print(f"ui_demo_fan_speedup: {baseline / complete:.2f} x faster (target >= 2)")


if __name__ == "__main__":
    main()
