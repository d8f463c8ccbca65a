"""A synthetic training log with known gradient signal and noise: the shipped example log and the
benchmark's million rows come from here.

Each step draws the batch-mean gradient of a run whose per-example gradients have mean G(t) and
isotropic covariance Sigma(t) in `dim` dimensions: |G|^2 falls as training goes on (and so
B_simple = tr(Sigma)/|G|^2 grows, as McCandlish et al. 2018, arXiv 1812.06162, report), tr(Sigma)
drifts. The small batch is the first `small_batch` examples of the batch, so its mean and the
batch's mean are drawn jointly. On a few steps one example's gradient is far larger (a spike),
and a couple of steps have non-finite norms.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from core.fileio import write_text_atomic

COLUMNS = ("step", "grad_norm", "batch_size", "small_grad_norm", "small_batch_size", "loss", "lr")


@dataclass(frozen=True)
class SyntheticRun:
    """The process behind a synthetic log."""

    rows: int = 3000
    dim: int = 16
    batch_size: int = 32
    batch_size_after: int = 64  # the batch size from `switch_at` (a fraction of the rows) on
    switch_at: float = 0.5
    small_batch: int = 8
    small_every: int = 1  # the small batch is measured on every N-th step
    g_sq_start: float = 4.0
    g_sq_end: float = 0.25
    trace_start: float = 24.0
    trace_end: float = 12.0
    spikes: int = 8
    spike_size: float = 12.0  # a spike's norm over the step's typical norm, about
    nonfinite: int = 2
    seed: int = 0


def generate(run: SyntheticRun) -> dict[str, np.ndarray]:
    """The log's columns (COLUMNS) and the truth behind them (g_sq, trace_sigma per step)."""
    rng = np.random.default_rng(run.seed)
    n, dim = run.rows, run.dim
    progress = np.linspace(0.0, 1.0, n)
    g_sq = run.g_sq_start * (run.g_sq_end / run.g_sq_start) ** progress
    trace = run.trace_start + (run.trace_end - run.trace_start) * progress
    trace = trace * (1.0 + 0.1 * np.sin(6 * math.pi * progress))  # a slow wobble
    batch = np.where(progress < run.switch_at, run.batch_size, run.batch_size_after)
    small = run.small_batch
    sigma = np.sqrt(trace / dim)  # per coordinate, per example
    mean = np.zeros((n, dim))
    mean[:, 0] = np.sqrt(g_sq)
    # The small batch's mean and the mean of the other examples, from one Gaussian each.
    small_mean = mean + rng.standard_normal((n, dim)) * (sigma / math.sqrt(small))[:, None]
    rest = batch - small
    rest_mean = mean + rng.standard_normal((n, dim)) * (sigma / np.sqrt(rest))[:, None]
    big_mean = (small * small_mean + rest[:, None] * rest_mean) / batch[:, None]

    spike_rows = rng.choice(np.arange(n // 20, n), size=min(run.spikes, n // 20), replace=False)
    typical = np.sqrt(g_sq + trace / batch)
    for row in spike_rows:
        direction = rng.standard_normal(dim)
        direction /= np.linalg.norm(direction)
        size = run.spike_size * typical[row] * rng.uniform(0.6, 1.6)
        extra = direction * size * batch[row]  # one example whose gradient is this large
        big_mean[row] += extra / batch[row]
        if rng.random() < small / batch[row]:  # it fell among the small batch's examples
            small_mean[row] += extra / small
    grad_norm = np.linalg.norm(big_mean, axis=1)
    small_norm = np.linalg.norm(small_mean, axis=1)
    measured = (np.arange(n) % run.small_every) == 0
    small_norm = np.where(measured, small_norm, np.nan)
    bad_rows = rng.choice(np.arange(n // 10, n), size=min(run.nonfinite, n // 10), replace=False)
    for i, row in enumerate(bad_rows):
        grad_norm[row] = math.inf if i % 2 == 0 else math.nan
        small_norm[row] = grad_norm[row] if measured[row] else math.nan

    loss = 0.15 + 2.0 * np.exp(-4.0 * progress) + 0.05 * rng.standard_normal(n) * np.exp(-progress)
    warm = max(1, n // 50)
    lr = (
        3e-4
        * np.minimum(1.0, (np.arange(n) + 1) / warm)
        * (0.55 + 0.45 * np.cos(math.pi * progress))
    )
    return {
        "step": np.arange(1, n + 1),
        "grad_norm": grad_norm,
        "batch_size": batch,
        "small_grad_norm": small_norm,
        "small_batch_size": np.where(measured, small, 0),
        "loss": loss,
        "lr": lr,
        "g_sq": g_sq,
        "trace_sigma": trace,
    }


def write_csv(path: Path, table: dict[str, np.ndarray], digits: int | None = None) -> None:
    """Write the log's columns as CSV (atomically); floats with `digits` significant digits, or
    exactly (repr) when None. An unmeasured small norm leaves both small-batch cells empty."""
    steps = table["step"].tolist()
    batches = table["batch_size"].tolist()
    small_sizes = table["small_batch_size"].tolist()
    floats = {k: table[k].tolist() for k in ("grad_norm", "small_grad_norm", "loss", "lr")}

    def text(value: float) -> str:
        if not math.isfinite(value):
            return str(value)
        return repr(value) if digits is None else f"{value:.{digits}g}"

    lines = [",".join(COLUMNS)]
    for i, step in enumerate(steps):
        small = floats["small_grad_norm"][i]
        measured = small_sizes[i] > 0
        lines.append(
            f"{step},{text(floats['grad_norm'][i])},{batches[i]},"
            f"{text(small) if measured else ''},{small_sizes[i] if measured else ''},"
            f"{text(floats['loss'][i])},{text(floats['lr'][i])}"
        )
    write_text_atomic(path, "\n".join(lines) + "\n")
