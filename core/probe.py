"""A probe for your own PyTorch training loop: it writes the log `gradfence advise` reads.

After `loss.backward()` (and before clipping or `optimizer.step()`), `probe.record(step)` writes
one CSV row: the step, the pre-clip global norm of the parameters' gradients (the value
torch.nn.utils.clip_grad_norm_ returns) and, when given, the batch size, loss and learning rate.
Every `every` steps, given a closure that computes a sub-batch's mean loss, it also writes the
norm of that sub-batch's gradient from one extra forward and backward pass, which lets
`gradfence advise` separate gradient signal from noise (core.noise). The real gradients are
left exactly as they were.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path
from types import TracebackType
from typing import TextIO

import torch

LOG_HEADER = (
    "step",
    "grad_norm",
    "batch_size",
    "small_grad_norm",
    "small_batch_size",
    "loss",
    "lr",
)

SubBatch = Callable[[], tuple[torch.Tensor, int]]  # -> (the sub-batch's mean loss, its size)


def total_norm(parameters: Iterable[torch.Tensor], norm_type: float = 2.0) -> float:
    """The norm of all the parameters' gradients together, as clip_grad_norm_ computes it."""
    grads = [p.grad for p in parameters if p.grad is not None]
    if not grads:
        return 0.0
    get_total_norm = getattr(torch.nn.utils, "get_total_norm", None)
    with torch.no_grad():
        if get_total_norm is not None:  # torch >= 2.6: the very function clip_grad_norm_ uses
            return float(get_total_norm(grads, norm_type))
        norms = [torch.linalg.vector_norm(g, norm_type) for g in grads]
        return float(torch.linalg.vector_norm(torch.stack(norms), norm_type))


@dataclass(frozen=True)
class Reading:
    """What one `record` measured."""

    step: int
    grad_norm: float
    small_grad_norm: float | None
    small_batch_size: int | None


class NormProbe:
    """Appends one row per step to a CSV log; flushed after every row.

    Cost: the norm is one read of every gradient (and, on a GPU, one synchronisation for the
    number). The sub-batch norm costs one extra forward and backward pass of the sub-batch every
    `every` steps: about (sub-batch size / batch size) / every of a training step, e.g. a
    quarter of the batch every 10 steps adds about 2.5%. The extra pass also updates BatchNorm
    running statistics and draws dropout masks, as any forward in training mode does; the closure
    may switch what it needs. Both losses must be means over their batch (not sums), so that both
    norms are of mean gradients.
    """

    def __init__(
        self,
        path: str | Path,
        parameters: Iterable[torch.Tensor],
        batch_size: int | None = None,
        every: int = 1,
        norm_type: float = 2.0,
    ) -> None:
        if every < 1:
            raise ValueError(f"every = {every}: the sub-batch is measured every N >= 1 steps")
        self.path = Path(path)
        self.parameters = [p for p in parameters if p.requires_grad]
        self.batch_size = batch_size
        self.every = every
        self.norm_type = norm_type
        self._file: TextIO = self._open()

    def _open(self) -> TextIO:
        header = ",".join(LOG_HEADER)
        if self.path.exists() and self.path.stat().st_size > 0:
            with self.path.open(encoding="utf-8") as f:
                first = f.readline().strip()
            if first != header:
                raise ValueError(
                    f"{self.path} already holds a log with other columns ({first}); "
                    "write to a new file"
                )
            return self.path.open("a", encoding="utf-8", newline="")
        f = self.path.open("w", encoding="utf-8", newline="")
        f.write(header + "\n")
        f.flush()
        return f

    def record(
        self,
        step: int,
        loss: float | torch.Tensor | None = None,
        lr: float | None = None,
        batch_size: int | None = None,
        sub_batch: SubBatch | None = None,
    ) -> Reading:
        """Write this step's row; call it after backward() and before clipping the gradients.

        `sub_batch` is called only on steps that are multiples of `every`.
        """
        norm = total_norm(self.parameters, self.norm_type)
        small: float | None = None
        small_size: int | None = None
        if sub_batch is not None and step % self.every == 0:
            small, small_size = self.sub_batch_norm(sub_batch)
        size = batch_size if batch_size is not None else self.batch_size
        if isinstance(loss, torch.Tensor):
            loss = float(loss.detach())
        cells = (step, norm, size, small, small_size, loss, lr)
        self._file.write(",".join(_cell(c) for c in cells) + "\n")
        self._file.flush()
        return Reading(step, norm, small, small_size)

    def sub_batch_norm(self, sub_batch: SubBatch) -> tuple[float, int]:
        """The gradient norm of a sub-batch's loss, leaving the real gradients as they were."""
        saved = [p.grad for p in self.parameters]
        try:
            for p in self.parameters:
                p.grad = None  # the extra backward writes fresh tensors; the saved ones stay put
            with torch.enable_grad():
                loss, size = sub_batch()
                torch.autograd.backward(loss)
            return total_norm(self.parameters, self.norm_type), int(size)
        finally:
            for p, grad in zip(self.parameters, saved, strict=True):
                p.grad = grad

    def close(self) -> None:
        self._file.close()

    def __enter__(self) -> NormProbe:
        return self

    def __exit__(
        self,
        kind: type[BaseException] | None,
        value: BaseException | None,
        traceback: TracebackType | None,
    ) -> None:
        self.close()


def _cell(value: float | int | None) -> str:
    if value is None:
        return ""
    if isinstance(value, int):
        return str(value)
    return repr(float(value)) if math.isfinite(value) else str(float(value))
