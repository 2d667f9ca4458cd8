"""A net that takes images of any size: the padding plan (:class:`fcnkit.geometry.PadPlan`) applied around a
body whose pooling grid needs aligned input. Every kind of net fcnkit makes is one of these."""

from __future__ import annotations

import torch
from torch import nn
from torch.nn import functional as F

from fcnkit.geometry import PadPlan


def _at_least_zero(v: torch.Tensor | int) -> torch.Tensor | int:
    """max(v, 0) for plain ints and for sizes a tracer records as tensors (so exports keep it for any size)."""
    return v.clamp(min=0) if isinstance(v, torch.Tensor) else max(v, 0)


class PaddedNet(nn.Module):
    """N×bands×H×W in, N×classes×H×W class scores out, for any H and W: pad (edge pixels repeated) by ``plan``,
    run ``body``, crop back. Written without branches on sizes, so a traced export keeps the rule for every
    size."""

    def __init__(self, body: nn.Module, plan: PadPlan, bands: int, classes: int) -> None:
        super().__init__()
        self.body, self.plan, self.bands, self.classes = body, plan, bands, classes

    @property
    def factor(self) -> int:
        return self.plan.factor

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h, w = x.shape[-2], x.shape[-1]
        p, b, c = self.plan, self.plan.before, self.plan.crop
        x = F.pad(x, (b, p.after(w, _at_least_zero), b, p.after(h, _at_least_zero)), mode="replicate")
        return self.body(x)[..., c:c + h, c:c + w]
