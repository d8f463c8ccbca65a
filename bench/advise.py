"""Reading and replaying a million-row log of norms, against the streaming rules, one process.

Generates a seeded synthetic log (core.synthetic_log: drifting signal and noise, rare spikes, a few
non-finite norms, two norms per step, nine significant digits as a float32 loop needs), writes it
to a temporary CSV, then times loading it (core.normlog) and replaying every rule on it
(core.replay: the fixed grid, percentile, ema and zscore, each with on_spike clip and skip) plus
finding the spikes. The baseline is the streaming `level()` of each rule, as the engine calls it,
on a slice of the same norms, scaled to the full length (linearly for ema and zscore; the
percentile rule re-sorts its history every step, so its time grows with the square of the rows).
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from core.normlog import load_log
from core.replay import default_clips, find_spikes, replay_rules
from core.rules import make_rule
from core.scenario import ClipConfig
from core.synthetic_log import SyntheticRun, generate, write_csv

ROWS = 1_000_000
ROUNDS = 3
TARGET = 3.0


def streaming_seconds(clip: ClipConfig, norms: np.ndarray) -> float:
    """Seconds for the engine's step-by-step rule over `norms`."""
    rule = make_rule(clip)
    values = norms.tolist()
    start = time.perf_counter()
    for value in values:
        rule.level(value)
    return time.perf_counter() - start


def main() -> None:
    table = generate(SyntheticRun(rows=ROWS, spikes=ROWS // 2000, nonfinite=6, seed=1))
    base = ClipConfig(method="global-norm")
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "log.csv"
        write_csv(path, table, digits=9)  # what a float32 training loop needs
        size = path.stat().st_size / 1e6
        print(
            f"log: {ROWS} rows, {size:.0f} MB, columns step, grad_norm, batch_size, "
            "small_grad_norm, small_batch_size, loss, lr"
        )

        norms = table["grad_norm"]
        slice_rows, percentile_rows = 100_000, 10_000
        baseline = {}
        for rule in ("ema", "zscore"):
            seconds = streaming_seconds(
                ClipConfig(method="global-norm", rule=rule), norms[:slice_rows]
            )
            baseline[rule] = seconds * ROWS / slice_rows
            print(
                f"baseline: streaming {rule} level(): {seconds:.2f} s for {slice_rows} rows, "
                f"{baseline[rule]:.1f} s for {ROWS} (linear)"
            )
        seconds = streaming_seconds(
            ClipConfig(method="global-norm", rule="percentile"), norms[:percentile_rows]
        )
        baseline["percentile"] = seconds * (ROWS / percentile_rows) ** 2
        print(
            f"baseline: streaming percentile level(): {seconds:.2f} s for {percentile_rows} rows, "
            f"about {baseline['percentile']:.0f} s for {ROWS} (quadratic)"
        )

        timings = []
        parts: list[tuple[float, float, float]] = []
        for _ in range(ROUNDS):
            start = time.perf_counter()
            log = load_log(path)
            loaded = time.perf_counter()
            spikes = find_spikes(log.norm)
            clips = default_clips(log.norm, base=base)
            replays = replay_rules(log.norm, clips, spikes, log.precision)
            done = time.perf_counter()
            timings.append(done - start)
            parts.append((loaded - start, done - loaded, len(replays)))
        best = min(range(ROUNDS), key=lambda i: timings[i])
        load_s, replay_s, count = parts[best]
        print(
            f"load: {load_s:.2f} s; spikes and {int(count)} replays "
            f"({sum(1 for c in clips if c.rule == 'fixed') // 2} fixed thresholds x clip/skip, "
            f"percentile, ema, zscore x clip/skip): {replay_s:.2f} s "
            f"(median of {ROUNDS} rounds {statistics.median(timings):.2f} s)"
        )
        streaming = sum(baseline.values())
        print(
            f"against the streaming rules (about {streaming:.0f} s, nearly all of it the "
            "percentile rule's): "
            f"{streaming / timings[best]:.0f} times faster"
        )
    print(f"advise: {timings[best]:.1f} s for {ROWS} rows with every rule (target < {TARGET:g} s)")


if __name__ == "__main__":
    main()
