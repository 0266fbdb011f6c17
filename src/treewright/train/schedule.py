"""Learning-rate schedules as pure functions of the step, so a resumed run needs no schedule
state and the rate at any step can be checked by hand."""

from __future__ import annotations

import math


def learning_rate(step: int, total_steps: int, lr: float, warmup_steps: int = 0,
                  schedule: str = "constant", min_lr_ratio: float = 0.1) -> float:
    """The rate for update `step` (0-based) of `total_steps`.

    Linear warm-up from lr / warmup_steps to lr over the first `warmup_steps` updates, then
    "constant" (lr), "linear" (down to min_lr_ratio * lr at the last update) or "cosine" (half a
    cosine down to min_lr_ratio * lr at the last update; common practice).
    """
    if step < warmup_steps:
        return lr * (step + 1) / warmup_steps
    if schedule == "constant":
        return lr
    span = max(total_steps - 1 - warmup_steps, 1)
    progress = min((step - warmup_steps) / span, 1.0)
    floor = lr * min_lr_ratio
    if schedule == "linear":
        return lr - (lr - floor) * progress
    if schedule == "cosine":
        return floor + (lr - floor) * 0.5 * (1 + math.cos(math.pi * progress))
    raise ValueError(f"unknown schedule {schedule!r}")
