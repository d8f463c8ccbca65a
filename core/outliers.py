"""Outlier kinds: each turns ordinary examples into corrupted copies."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

Array = np.ndarray
Corruptor = Callable[[Array, Array, float, Array, int, np.random.Generator], tuple[Array, Array]]


def corrupt(
    kind: str,
    x: np.ndarray,
    y: np.ndarray,
    scale: float,
    direction: np.ndarray,
    classes: int,
    rng: np.random.Generator,
) -> tuple[np.ndarray, np.ndarray]:
    """Corrupted copies of (x, y); `direction` is the fixed unit vector of feature-shift."""
    return KINDS[kind](x.copy(), y.copy(), scale, direction, classes, rng)


def _label_flip(
    x: Array, y: Array, scale: float, direction: Array, classes: int, rng: np.random.Generator
) -> tuple[Array, Array]:
    # Move each label to a different class, uniformly among the others.
    y = (y + rng.integers(1, classes, size=len(y))) % classes
    return x, y


def _feature_scale(
    x: Array, y: Array, scale: float, direction: Array, classes: int, rng: np.random.Generator
) -> tuple[Array, Array]:
    return x * scale, y


def _feature_shift(
    x: Array, y: Array, scale: float, direction: Array, classes: int, rng: np.random.Generator
) -> tuple[Array, Array]:
    # Every outlier moves the same way: a biased outlier that does not average out.
    return x + scale * direction, y


def _target_shift(
    x: Array, y: Array, scale: float, direction: Array, classes: int, rng: np.random.Generator
) -> tuple[Array, Array]:
    return x, y + scale * rng.choice([-1.0, 1.0], size=len(y))


def _nonfinite(
    x: Array, y: Array, scale: float, direction: Array, classes: int, rng: np.random.Generator
) -> tuple[Array, Array]:
    # An infinite input makes the example's loss and gradient inf/NaN, like a corrupt record.
    x[:, 0] = np.inf
    return x, y


KINDS: dict[str, Corruptor] = {
    "label-flip": _label_flip,
    "feature-scale": _feature_scale,
    "feature-shift": _feature_shift,
    "target-shift": _target_shift,
    "nonfinite": _nonfinite,
}
