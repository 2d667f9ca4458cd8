"""A wall-time budget for a training run (``train.seconds``): when to stop, and how far along the run is.

The budget covers the whole ``train`` call, set-up included, plus the training and validation time of earlier
sessions of a resumed run. Training stops after the last step that still leaves time for the closing: the
last validation and save (measured at each epoch's end, estimated before the first) and the temperature fit
after training (``calibration``, estimated by the trainer), so the run ends within the budget with its best
model kept and calibrated. With a budget, the budget alone sets the run's length (``epochs`` does not
end it: on a fast machine a run of the config's epochs left up to 40 % of a 40 s budget unused, measured) and
the learning-rate schedule runs on time: ``schedule_step`` maps the share of the budget used onto the run's
planned steps (``epochs`` of them, warm-up included), so a cosine reaches zero as the budget runs out.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

# Before the first validation has been timed, its cost is guessed from the last training step's forward
# pass: a validation pixel counted 1.5 times as dear as a pixel of that pass (whole images rather than
# patches; the margin errs on the side of ending in time).
VALIDATION_PIXEL_COST = 1.5
SAVE_SECONDS = 0.1  # writing the model file, the resume point and the metrics table of a small net


@dataclass
class TimeBudget:
    """``seconds`` of wall time (0: no budget), of which ``used_before`` went to earlier sessions."""

    seconds: float
    used_before: float = 0.0
    start: float = field(default_factory=lambda: time.perf_counter())  # read when made (and patchable)
    closing: float | None = None  # measured seconds of the last epoch's end (validation, saving)
    calibration: float = 0.0  # estimated seconds of the calibration after training
    _steps: list[tuple[float, float]] = field(default_factory=list)  # the last two (seconds, forward s/pixel)

    @property
    def active(self) -> bool:
        return self.seconds > 0

    def used(self) -> float:
        return self.used_before + time.perf_counter() - self.start

    def note_step(self, seconds: float, forward_seconds_per_pixel: float) -> None:
        """Record a training step's duration and its forward pass's cost per pixel. Estimates use the smaller
        of the last two of each, so one slow step (the first, or a busy moment) does not end a run early."""
        self._steps = [*self._steps[-1:], (seconds, forward_seconds_per_pixel)]

    def closing_estimate(self, val_pixels: int) -> float:
        """Seconds the closing will take: the epoch's end as measured last time (else estimated from the training
        forward pass's cost per pixel), plus the calibration."""
        if self.closing is not None:
            return self.closing + self.calibration
        forward = min((f for _, f in self._steps), default=0.0)
        return VALIDATION_PIXEL_COST * val_pixels * forward + SAVE_SECONDS + self.calibration

    def must_stop(self, val_pixels: int) -> bool:
        """True when one more step and the closing would overrun the budget."""
        step = min((s for s, _ in self._steps), default=0.0)
        return self.active and self.used() + step + self.closing_estimate(val_pixels) > self.seconds

    def schedule_step(self, step: int, total_steps: int, val_pixels: int) -> float:
        """The (fractional) step the learning-rate schedule should take: ``step`` without a budget; with one, the
        share of the training time used, used / (budget − closing), of the ``total_steps`` plan."""
        if not self.active:
            return float(step)
        share = self.used() / max(self.seconds - self.closing_estimate(val_pixels), 1e-9)
        return min(share, 1.0) * total_steps
