"""Learning-rate schedules evaluated per optimiser step: linear warm-up, then poly, cosine or constant.

A pure function of the step number, so a resumed run needs only the step count to continue exactly.
"""

from __future__ import annotations

import math

POLY_POWER = 0.9  # the "poly" policy's exponent (Chen et al. 2017, DeepLab; common practice)


def lr_factor(step: float, total: int, warmup: int, schedule: str) -> float:
    """Multiplier of the base learning rate at optimiser step ``step`` (0-based) of ``total`` steps; ``step``
    may be fractional (a time budget maps the share of time used onto the steps, fcnkit.budget).

    Warm-up rises linearly from 1/warmup to 1 over the first ``warmup`` steps; after it, ``poly`` decays as
    (1 − t)^0.9, ``cosine`` as (1 + cos πt)/2 and ``constant`` stays at 1, with t running from 0 to 1 over the
    remaining steps.
    """
    if step < warmup:
        return (step + 1) / warmup
    span = max(total - warmup, 1)
    t = min(max(step - warmup, 0) / span, 1.0)
    if schedule == "poly":
        return (1 - t) ** POLY_POWER
    if schedule == "cosine":
        return 0.5 * (1 + math.cos(math.pi * t))
    if schedule == "constant":
        return 1.0
    raise ValueError(f"train.schedule: {schedule!r} is not one of: poly, cosine, constant")
