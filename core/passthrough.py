"""The predicted pass-through of a step with outliers, from per-example gradients at a checkpoint.

A clipped unit (the whole batch for global-norm, a group of m for microbatch-norm, one example
for example-norm) that holds outliers J and b clean examples has the gradient sum
v + xi, with v = b G + sum_J o_j and xi the clean examples' fluctuation about their mean. Its
coefficient is min(1, c / |compared|), the compared norm being |v + xi| over the unit's size
(its mean) or, for the batch under the sum reduction, |v + xi| itself. The outliers' pass-through
is |sum_g cap_g O_g| / |sum_g O_g| over the units g holding outliers O_g: the clip coefficient
for global-norm.

Monte Carlo over that formula: the outliers are drawn from the real outlier examples (exactly,
with their inner products); the clean fluctuation is Gaussian with the clean gradients'
covariance Sigma times b (N - b)/(N - 1) (the finite-population factor of a batch drawn without
replacement from N). Sigma comes from a subset of clean examples through their Gram matrix
(g_i . g_k = sum_l (dz_i . dz_k)(a_i . a_k + 1), no per-example gradient is ever formed), so
only the projections of G and of each o_j on Sigma's eigenvectors and the eigenvalues are kept.
The same normal draws serve every batch size and threshold (common random numbers), so curves
over B are smooth.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

CLEAN_EXAMPLES = 1024  # clean rows behind Sigma's spectrum (an eigh of this size: ~0.2 s)
OUTLIER_EXAMPLES = 512  # outlier rows drawn from: all of a batch-placement pool (256, or 8 count)
DRAWS = 2000  # Monte Carlo draws per batch size: standard error at most 0.5 / sqrt(2000) = 0.011
NOISE_SETS = 4  # independent clean fluctuations: units holding outliers beyond this share them
MAX_OUTLIERS = 64  # outliers followed per draw (dataset placement at large batch sizes)
MAX_UNITS = 16  # units holding outliers followed per draw; beyond, units share a slot


@dataclass(frozen=True)
class GradientStats:
    """What the model needs from the checkpoint, all in per-example units."""

    population: int  # N, the clean rows a batch draws from
    grad_sq: float  # |G|^2, unbiased
    trace: float  # tr(Sigma)
    projections: np.ndarray  # (r, 1 + n_o): G, o_j on Sigma's eigenvectors, times sqrt(mu)
    outlier_dot_mean: np.ndarray  # (n_o,) G . o_j
    outlier_gram: np.ndarray  # (n_o, n_o) o_j . o_k
    eigenvalues: np.ndarray  # (r,) mu_k of Sigma


def gram(
    a: list[np.ndarray], dz: list[np.ndarray], b: list[np.ndarray], dz_b: list[np.ndarray]
) -> np.ndarray:
    """Inner products of per-example gradients (n_a, n_b), from layer inputs and output
    gradients: sum_l (dz_i . dz_k)(a_i . a_k + 1) (weight rows and bias together)."""
    total = np.zeros((a[0].shape[0], b[0].shape[0]))
    for x, d, y, e in zip(a, dz, b, dz_b, strict=True):
        total += (d @ e.T) * (x @ y.T + 1.0)
    return total


def dot_with(a: list[np.ndarray], dz: list[np.ndarray], mean: list[np.ndarray]) -> np.ndarray:
    """g_i . G (n,) for per-example gradients given by layers and G by its parameters
    (weight (out, in), bias (out,) per layer): sum_l dz_i^T W_l a_i + dz_i . b_l."""
    total = np.zeros(a[0].shape[0])
    for layer, (x, d) in enumerate(zip(a, dz, strict=True)):
        weight, bias = mean[2 * layer], mean[2 * layer + 1]
        total += ((d @ weight) * x).sum(axis=1) + d @ bias
    return total


def gradient_stats(
    clean: tuple[list[np.ndarray], list[np.ndarray]],
    outliers: tuple[list[np.ndarray], list[np.ndarray]],
    population: int,
    mean: list[np.ndarray],
    grad_sq: float,
) -> GradientStats:
    """The statistics from per-layer inputs and output gradients of clean and outlier rows.

    `mean` is the clean mean gradient G by parameter and `grad_sq` |G|^2, both from a larger
    sample than the `clean` rows behind Sigma: on a subset the mean's own error would bias the
    pass-through (a few per cent on a 1024-row subset, measured)."""
    a, dz = clean
    n = a[0].shape[0]
    k_cc = gram(a, dz, a, dz)
    k_co = gram(a, dz, *outliers)
    k_oo = gram(*outliers, *outliers)
    h = dot_with(a, dz, mean)  # g_i . G
    go = dot_with(*outliers, mean)  # G . o_j
    g2 = float(sum(float((p * p).sum()) for p in mean))  # |G|^2 of the vector itself
    centred = k_cc - h[:, None] - h[None, :] + g2  # (g_i - G)(g_k - G)
    lam, u = np.linalg.eigh(centred)
    keep = lam > max(float(lam.max()), 0.0) * 1e-12
    lam, u = lam[keep], u[:, keep]
    mu = lam / n
    trace = float(mu.sum())
    # sum_i (g_i - G) (g_i - G) . w for w = G and w = o_j: the rows' projections on Sigma.
    sides = np.column_stack([h - g2, k_co - go[None, :]])  # (n, 1 + n_o)
    # v_k . w = u_k^T X~ w / sqrt(lam_k); times sqrt(mu_k) it is a draw's weight on z_k.
    projections = (u.T @ sides) / np.sqrt(lam)[:, None] * np.sqrt(mu)[:, None]
    return GradientStats(population, grad_sq, trace, projections, go, k_oo, mu)


class PassThroughModel:
    """Predicted pass-through of the scenario's outlier steps for thresholds and batch sizes."""

    def __init__(
        self,
        stats: GradientStats,
        placement: str,
        count: int,
        outliers_total: int,
        rng: np.random.Generator,
    ) -> None:
        self.stats = stats
        self.placement, self.count, self.outliers_total = placement, count, outliers_total
        self.rng = rng
        r = stats.eigenvalues.shape[0]
        # Per noise set s and draw: T = z . projections (1 + n_o), Q = sum_k mu_k z_k^2.
        self.t = np.empty((NOISE_SETS, DRAWS, stats.projections.shape[1]))
        self.q = np.empty((NOISE_SETS, DRAWS))
        for s in range(NOISE_SETS):
            z = rng.standard_normal((DRAWS, r))
            self.t[s] = z @ stats.projections
            self.q[s] = (z * z) @ stats.eigenvalues
        n_o = stats.outlier_gram.shape[0]
        self.order = np.argsort(rng.random((DRAWS, n_o)), axis=1)  # each draw's outlier order

    def _outlier_counts(self, batch: int) -> np.ndarray:
        """(DRAWS,) outliers in a batch that holds some."""
        if self.placement == "batch":
            return np.full(DRAWS, min(self.count, batch))
        n_bad, n_good = self.outliers_total, self.stats.population
        ks = np.arange(1, min(batch, n_bad) + 1)
        log_p = np.array([_log_hypergeometric(int(k), n_good, n_bad, batch) for k in ks])
        p = np.exp(log_p - log_p.max())
        return self.rng.choice(ks, size=DRAWS, p=p / p.sum())

    def _units(self, picks: int, batch: int, unit: int) -> np.ndarray:
        """(DRAWS, picks) which outlier-holding unit (0, 1, ...) each picked outlier is in."""
        if unit >= batch:
            return np.zeros((DRAWS, picks), dtype=np.int64)
        if unit == 1:
            return np.broadcast_to(np.arange(picks), (DRAWS, picks)).copy()
        # Distinct random positions, then units numbered in order of first appearance.
        if batch * DRAWS <= 4_000_000:
            positions = np.argsort(self.rng.random((DRAWS, batch)), axis=1)[:, :picks]
        else:  # a repeated position among few picks in a large batch is rare enough
            positions = self.rng.integers(0, batch, size=(DRAWS, picks))
        owner = positions // unit
        same = owner[:, :, None] == owner[:, None, :]  # (DRAWS, picks, picks)
        first = np.argmax(same, axis=2)  # the first pick in the same unit
        is_first = first == np.arange(picks)
        rank = np.cumsum(is_first, axis=1) - 1
        return np.take_along_axis(rank, first, axis=1)

    def predict(
        self, batch: int, unit: int, thresholds: np.ndarray, batch_sum: bool = False
    ) -> np.ndarray:
        """Mean pass-through (len(thresholds),) at batch size `batch` for clipped units of
        `unit` examples (`unit` >= batch: the whole batch); `batch_sum`: the threshold is on
        the batch sum's norm (sum reduction) instead of the unit's mean."""
        st = self.stats
        n_o = st.outlier_gram.shape[0]
        k = self._outlier_counts(batch)
        picks = min(int(k.max()), MAX_OUTLIERS)
        active = np.arange(picks)[None, :] < k[:, None]  # (DRAWS, picks)
        which = self.order[:, np.arange(picks) % n_o]  # (DRAWS, picks) outlier rows
        units = self._units(picks, batch, unit) % MAX_UNITS
        followed = int(units.max()) + 1
        member = (units[..., None] == np.arange(followed)) & active[..., None]  # (D, picks, G)
        onehot = member.astype(np.float64)
        pair = st.outlier_gram[which[:, :, None], which[:, None, :]]  # (D, picks, picks)
        overlap = onehot.transpose(0, 2, 1) @ pair @ onehot  # (D, G, G): O_g . O_h
        n_out = onehot.sum(axis=1)  # (D, G)
        holds = n_out > 0
        size = float(min(unit, batch))
        b = np.clip(size - n_out, 0.0, None)  # clean examples in each unit
        n = st.population
        fpc = np.where(b > 0, (n - b) / max(n - 1, 1), 0.0)
        go = np.einsum("dpg,dp->dg", onehot, st.outlier_dot_mean[which])
        v_sq = b * b * st.grad_sq + 2 * b * go + np.diagonal(overlap, axis1=1, axis2=2)
        # v . xi and |xi|^2 of each unit's clean fluctuation, one noise set per unit.
        cross = np.empty_like(b)
        noise = np.empty_like(b)
        rows = np.arange(DRAWS)[:, None]
        for g in range(followed):
            t = self.t[g % NOISE_SETS]
            on_outliers = np.einsum("dp,dp->d", onehot[:, :, g], t[rows, 1 + which])
            cross[:, g] = b[:, g] * t[:, 0] + on_outliers
            noise[:, g] = self.q[g % NOISE_SETS]
        scale = b * fpc  # the fluctuation's covariance is b (N - b)/(N - 1) Sigma
        total_sq = np.clip(v_sq + 2 * np.sqrt(scale) * cross + scale * noise, 0.0, None)
        compared = np.sqrt(total_sq) / (1.0 if batch_sum else size)
        whole = overlap.sum(axis=(1, 2))
        out = np.empty(len(thresholds))
        for i, c in enumerate(thresholds):
            cap = np.where(holds, np.minimum(1.0, c / np.maximum(compared, 1e-300)), 0.0)
            kept = np.einsum("dg,dgh,dh->d", cap, overlap, cap)
            out[i] = float(np.mean(np.sqrt(np.clip(kept, 0.0, None) / whole)))
        return out


def _log_hypergeometric(k: int, good: int, bad: int, draws: int) -> float:
    """log P(k bad among `draws` drawn without replacement from good + bad)."""

    def log_choose(a: int, b: int) -> float:
        if b < 0 or b > a:
            return -math.inf
        return math.lgamma(a + 1) - math.lgamma(b + 1) - math.lgamma(a - b + 1)

    return log_choose(bad, k) + log_choose(good, draws - k) - log_choose(good + bad, draws)
