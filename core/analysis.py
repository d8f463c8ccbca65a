"""The batch-size coupling analysis, as plain functions of a map table (core.maps rows).

stability_map: final clean validation loss over batch size x threshold per method.
threshold_windows: per batch size, the thresholds within a factor (1 + tolerance) of the best
    (geometric mean over seeds); the slopes of the window edges against B on log axes; and the
    common window, the thresholds inside every batch size's window.
clip_onset: the threshold at which half the clean steps (examples, units, groups) are clipped.
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
    inside: tuple[float, ...] = ()  # the grid thresholds judged inside


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

    def as_json(self) -> dict[str, Any]:
        return {
            "method": self.method,
            "windows": [
                {
                    "batch_size": w.batch_size,
                    "lower": w.lower,
                    "upper": w.upper,
                    "inside": list(w.inside),
                }
                for w in self.windows
            ],
            "common": None
            if self.common is None
            else {"lower": self.common[0], "upper": self.common[1]},
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


def threshold_windows(rows: Sequence[Row], label: str, tolerance: float = 1.0) -> MethodWindows:
    """Windows per batch size, their common part, edge slopes and clip onset for one method."""
    smap = stability_map(rows, label)
    method = next(str(r["method"]) for r in rows if r["label"] == label)
    thresholds = np.array(smap.thresholds)
    windows: list[Window] = []
    inside: list[set[float]] = []
    for bi, b in enumerate(smap.batch_sizes):
        column = smap.loss[bi]
        finite = np.isfinite(column)
        if method == "none" or not finite.any():
            windows.append(Window(b, None, None, False, False, ()))
            inside.append(set())
            continue
        best = column[finite].min()
        good = finite & (column <= best * (1.0 + tolerance))
        chosen = thresholds[good]
        windows.append(
            Window(
                b,
                float(chosen.min()),
                float(chosen.max()),
                bool(good[0]),
                bool(good[-1]),
                tuple(float(t) for t in chosen),
            )
        )
        inside.append({float(t) for t in chosen})
    common_set = set.intersection(*inside) if inside and all(inside) else set()
    common = (min(common_set), max(common_set)) if common_set else None
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


def analyse(rows: Sequence[Row], tolerance: float = 1.0) -> dict[str, MethodWindows]:
    """Windows for every clipping method of the table (method "none" has none)."""
    return {
        label: threshold_windows(rows, label, tolerance)
        for label in labels(rows)
        if next(r["method"] for r in rows if r["label"] == label) != "none"
    }


def windows_json(results: dict[str, MethodWindows], tolerance: float) -> dict[str, Any]:
    """The contents of windows.json."""
    return {"tolerance": tolerance, "methods": {k: v.as_json() for k, v in results.items()}}


def sentence(w: MethodWindows) -> str:
    """One plain sentence a person can paste into a message."""
    sizes = [x.batch_size for x in w.windows]
    span = f"batch sizes {min(sizes)} to {max(sizes)}" if sizes else "no batch size"
    if w.common is not None:
        lo, hi = w.common
        edge = (
            " (the window reaches the end of the grid, so it may be wider)"
            if any(x.at_lower_edge or x.at_upper_edge for x in w.windows)
            else ""
        )
        rng = f"{lo:.3g}" if lo == hi else f"{lo:.3g} to {hi:.3g}"
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
    """The windows of one method, e.g. `global-norm windows: B=8 0.5-2, B=32 0.1-1`."""
    parts = []
    for x in w.windows:
        if x.lower is None or x.upper is None:
            parts.append(f"B={x.batch_size} none")
            continue
        lo = f"<={x.lower:.3g}" if x.at_lower_edge else f"{x.lower:.3g}"
        hi = f">={x.upper:.3g}" if x.at_upper_edge else f"{x.upper:.3g}"
        parts.append(f"B={x.batch_size} {lo} to {hi}")
    return f"  {w.label} windows: " + ", ".join(parts)
