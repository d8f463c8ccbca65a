"""The batch-size coupling analysis, as plain functions of a map table (core.maps rows).

stability_map: final clean validation loss over batch size x threshold per method.
threshold_windows: per batch size, the contiguous run of grid thresholds around the best whose
    final loss above the task's floor (geometric mean over seeds) is within a factor
    (1 + tolerance) of the best one's; the slopes of the window edges against B on log axes;
    and the common window, the thresholds inside every batch size's window.
clip_onset: the threshold at which half the clean steps (examples, units, groups) are clipped.

The floor matters because the criterion is relative: on a regression task whose validation
loss cannot go below the target noise, "within a factor 2 of the best loss" would admit nearly
everything near the floor. core.tasks.loss_floor gives it (0 for classification).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

Row = dict[str, Any]


@dataclass(frozen=True)
class StabilityMap:
    label: str
    batch_sizes: tuple[int, ...]
    thresholds: tuple[float, ...]
    loss: np.ndarray  # (batch sizes, thresholds): geometric mean over seeds; inf where diverged
    spread: np.ndarray  # std of log loss over seeds (0 with one seed)
    diverged: np.ndarray  # bool: any seed diverged


def labels(rows: Sequence[Row]) -> list[str]:
    """Method labels in table order."""
    seen: dict[str, None] = {}
    for r in rows:
        seen.setdefault(str(r["label"]), None)
    return list(seen)


def stability_map(rows: Sequence[Row], label: str) -> StabilityMap:
    mine = [r for r in rows if r["label"] == label]
    batches = tuple(sorted({int(r["batch_size"]) for r in mine}))
    values = {float(r["threshold"]) for r in mine}
    finite = sorted(t for t in values if not math.isnan(t))
    thresholds = tuple(finite) if finite else ((math.nan,) if values else ())
    loss = np.full((len(batches), len(thresholds)), np.nan)
    spread = np.zeros_like(loss)
    diverged = np.zeros(loss.shape, dtype=bool)
    for bi, b in enumerate(batches):
        for ti, t in enumerate(thresholds):
            cell = [
                r for r in mine if int(r["batch_size"]) == b and _same(float(r["threshold"]), t)
            ]
            if not cell:
                continue
            losses = np.array([float(r["final_val_loss"]) for r in cell])
            if any(bool(r["diverged"]) for r in cell) or not np.isfinite(losses).all():
                diverged[bi, ti] = True
                loss[bi, ti] = np.inf
                continue
            logs = np.log(np.maximum(losses, 1e-300))
            loss[bi, ti] = float(np.exp(logs.mean()))
            spread[bi, ti] = float(logs.std())
    return StabilityMap(label, batches, thresholds, loss, spread, diverged)


def _same(a: float, b: float) -> bool:
    return (math.isnan(a) and math.isnan(b)) or a == b


@dataclass(frozen=True)
class Window:
    batch_size: int
    lower: float | None
    upper: float | None
    at_lower_edge: bool  # the window reaches the smallest threshold tried: it may go further
    at_upper_edge: bool
    inside: tuple[float, ...] = ()  # the grid thresholds from lower to upper, all judged inside
    best: float | None = None  # the grid threshold with the lowest loss


@dataclass(frozen=True)
class MethodWindows:
    label: str
    method: str
    windows: tuple[Window, ...]
    common: tuple[float, float] | None
    lower_slope: float | None
    upper_slope: float | None
    onset: tuple[tuple[int, float | None], ...]
    onset_slope: float | None
    common_inside: tuple[float, ...] = ()  # the grid thresholds of the common window
    common_at_lower_edge: bool = False  # the common window reaches the end of the grid
    common_at_upper_edge: bool = False
    tolerance: float = 1.0
    floor: float = 0.0

    def as_json(self) -> dict[str, Any]:
        return {
            "method": self.method,
            "windows": [
                {
                    "batch_size": w.batch_size,
                    "lower": w.lower,
                    "upper": w.upper,
                    "inside": list(w.inside),
                    "at_lower_edge": w.at_lower_edge,
                    "at_upper_edge": w.at_upper_edge,
                    "best": w.best,
                }
                for w in self.windows
            ],
            "common": None
            if self.common is None
            else {
                "lower": self.common[0],
                "upper": self.common[1],
                "inside": list(self.common_inside),
                "at_lower_edge": self.common_at_lower_edge,
                "at_upper_edge": self.common_at_upper_edge,
            },
            "lower_slope": self.lower_slope,
            "upper_slope": self.upper_slope,
            "onset": [{"batch_size": b, "threshold": t} for b, t in self.onset],
            "onset_slope": self.onset_slope,
        }


def slope(xs: Sequence[float], ys: Sequence[float | None]) -> float | None:
    """Least-squares slope of log(y) against log(x) over the points where y is known."""
    pairs = [
        (math.log(x), math.log(y)) for x, y in zip(xs, ys, strict=True) if y is not None and y > 0
    ]
    if len(pairs) < 2:
        return None
    x, y = np.array(pairs).T
    if np.ptp(x) == 0:
        return None
    return float(np.polyfit(x, y, 1)[0])


def contiguous_run(passes: np.ndarray, start: int) -> tuple[int, int]:
    """The indices [lo, hi] of the run of True values of `passes` around `start` (True)."""
    lo = hi = start
    while lo > 0 and passes[lo - 1]:
        lo -= 1
    while hi < len(passes) - 1 and passes[hi + 1]:
        hi += 1
    return lo, hi


def threshold_windows(
    rows: Sequence[Row], label: str, tolerance: float = 1.0, floor: float = 0.0
) -> MethodWindows:
    """Windows per batch size, their common part, edge slopes and clip onset for one method.

    A threshold passes when its loss above `floor` is at most (1 + tolerance) times the best
    one's (when the best is not above the floor, only thresholds not above it pass). The window
    is the run of passing grid thresholds around the best: a failing, diverged or missing grid
    point ends it, so a window never spans a hole.
    """
    smap = stability_map(rows, label)
    method = next(str(r["method"]) for r in rows if r["label"] == label)
    thresholds = np.array(smap.thresholds)
    windows: list[Window] = []
    for bi, b in enumerate(smap.batch_sizes):
        column = smap.loss[bi]
        finite = np.isfinite(column)
        if method == "none" or not finite.any():
            windows.append(Window(b, None, None, False, False, ()))
            continue
        excess = np.where(finite, column - floor, np.inf)
        best = int(np.argmin(excess))
        limit = (1.0 + tolerance) * max(float(excess[best]), 0.0)
        lo, hi = contiguous_run(finite & (excess <= limit), best)
        windows.append(
            Window(
                b,
                float(thresholds[lo]),
                float(thresholds[hi]),
                lo == 0,
                hi == len(thresholds) - 1,
                tuple(float(t) for t in thresholds[lo : hi + 1]),
                float(thresholds[best]),
            )
        )
    common = None
    common_inside: tuple[float, ...] = ()
    if windows and all(w.lower is not None and w.upper is not None for w in windows):
        lower = max(float(w.lower) for w in windows if w.lower is not None)
        upper = min(float(w.upper) for w in windows if w.upper is not None)
        common_inside = tuple(float(t) for t in thresholds if lower <= t <= upper)
        if common_inside:
            common = (common_inside[0], common_inside[-1])
    batches = [float(w.batch_size) for w in windows]
    onset = clip_onset(rows, label)
    return MethodWindows(
        label=label,
        method=method,
        windows=tuple(windows),
        common=common,
        # An edge that reaches the end of the grid is only a bound: it stays out of the slope.
        lower_slope=slope(batches, [None if w.at_lower_edge else w.lower for w in windows]),
        upper_slope=slope(batches, [None if w.at_upper_edge else w.upper for w in windows]),
        onset=onset,
        onset_slope=slope([float(b) for b, _ in onset], [t for _, t in onset]),
        common_inside=common_inside,
        common_at_lower_edge=common is not None and common[0] == float(thresholds[0]),
        common_at_upper_edge=common is not None and common[1] == float(thresholds[-1]),
        tolerance=tolerance,
        floor=floor,
    )


def clip_onset(
    rows: Sequence[Row], label: str, level: float = 0.5
) -> tuple[tuple[int, float | None], ...]:
    """Per batch size, the threshold where the clean clipped share crosses `level`.

    The share falls as the threshold grows; the crossing is interpolated linearly in log
    threshold between the two grid points around it, averaging seeds first.
    """
    mine = [r for r in rows if r["label"] == label and not math.isnan(float(r["threshold"]))]
    out = []
    for b in sorted({int(r["batch_size"]) for r in mine}):
        by_t: dict[float, list[float]] = {}
        for r in mine:
            share = float(r["clean_clipped_share"])
            if int(r["batch_size"]) == b and not r["diverged"] and math.isfinite(share):
                by_t.setdefault(float(r["threshold"]), []).append(share)
        ts = sorted(by_t)
        shares = [float(np.mean(by_t[t])) for t in ts]
        crossing = None
        for (t0, s0), (t1, s1) in zip(
            zip(ts, shares, strict=True), zip(ts[1:], shares[1:], strict=True), strict=False
        ):
            if s0 >= level > s1:
                frac = (s0 - level) / (s0 - s1)
                crossing = float(math.exp(math.log(t0) + frac * (math.log(t1) - math.log(t0))))
                break
        out.append((b, crossing))
    return tuple(out)


def analyse(
    rows: Sequence[Row], tolerance: float = 1.0, floor: float = 0.0
) -> dict[str, MethodWindows]:
    """Windows for every clipping method of the table (method "none" has none); `floor` is the
    task's loss floor (core.tasks.loss_floor), below which no model's loss can go."""
    return {
        label: threshold_windows(rows, label, tolerance, floor)
        for label in labels(rows)
        if next(r["method"] for r in rows if r["label"] == label) != "none"
    }


CRITERION = (
    "a grid threshold is inside a batch size's window when its final validation loss above the "
    "floor (geometric mean over seeds, minus floor) is at most (1 + tolerance) times the best "
    "one's; the window is the contiguous run of such thresholds around the best, ended by any "
    "grid threshold that fails, diverged or is missing"
)


def windows_json(
    results: dict[str, MethodWindows],
    tolerance: float,
    floor: float = 0.0,
    floor_source: str = "",
) -> dict[str, Any]:
    """The contents of windows.json: the criterion, the floor it used and why, the methods."""
    return {
        "tolerance": tolerance,
        "criterion": CRITERION,
        "floor": floor,
        "floor_source": floor_source,
        "methods": {k: v.as_json() for k, v in results.items()},
    }


def _range(lo: float, hi: float, open_lo: bool, open_hi: bool) -> str:
    """`0.1 to 2`, with <= and >= on an edge that is the end of the grid."""
    low = f"<={lo:.3g}" if open_lo else f"{lo:.3g}"
    high = f">={hi:.3g}" if open_hi else f"{hi:.3g}"
    if lo == hi:  # one grid threshold: open at most on one side, or on both for a 1-point grid
        return low if not open_hi else high if not open_lo else f"any ({lo:.3g})"
    return f"{low} to {high}"


def sentence(w: MethodWindows) -> str:
    """One plain sentence a person can paste into a message."""
    sizes = [x.batch_size for x in w.windows]
    span = f"batch sizes {min(sizes)} to {max(sizes)}" if sizes else "no batch size"
    if w.common is not None:
        lo, hi = w.common
        open_lo, open_hi = w.common_at_lower_edge, w.common_at_upper_edge
        edge = (
            " (the window reaches the end of the grid, so it may be wider)"
            if open_lo or open_hi
            else ""
        )
        rng = _range(lo, hi, open_lo, open_hi)
        return f"{w.label}: one threshold works for every batch size tried ({span}): {rng}{edge}."
    moves = []
    for name, value in (("lower edge", w.lower_slope), ("upper edge", w.upper_slope)):
        if value is not None:
            direction = "falls" if value < -0.1 else "rises" if value > 0.1 else "stays put"
            moves.append(f"its {name} {direction} (about B^{value:+.2f})")
    how = "; ".join(moves) if moves else "too few windows to say how it moves"
    return (
        f"{w.label}: no single threshold works for every batch size tried ({span}); "
        f"as the batch size grows, {how}."
    )


def window_line(w: MethodWindows) -> str:
    """The windows of one method, e.g. `global-norm windows: B=8 0.5 to 2, B=32 <=0.1 to 1`."""
    parts = []
    for x in w.windows:
        if x.lower is None or x.upper is None:
            parts.append(f"B={x.batch_size} none")
            continue
        rng = _range(x.lower, x.upper, x.at_lower_edge, x.at_upper_edge)
        parts.append(f"B={x.batch_size} {rng}")
    return f"  {w.label} windows: " + ", ".join(parts)
