"""A user's own torch.optim.Optimizer subclass, for the torch adapter tests (imports torch)."""

from __future__ import annotations

import torch


class SignSGD(torch.optim.Optimizer):
    """x <- x - lr * sign(g): a minimal custom torch optimizer."""

    def __init__(self, params, lr: float = 0.01) -> None:  # type: ignore[no-untyped-def]
        if lr <= 0:
            raise ValueError(f"Invalid learning rate: {lr}")
        super().__init__(params, {"lr": lr})

    @torch.no_grad()
    def step(self, closure=None):  # type: ignore[no-untyped-def]
        for group in self.param_groups:
            for p in group["params"]:
                if p.grad is not None:
                    p.add_(torch.sign(p.grad), alpha=-group["lr"])
        return None
