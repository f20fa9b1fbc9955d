"""Quorvane Analytics' optimizer module (a made-up team, for the benchsuite example).

The team trains its demand-forecasting models with its own Adam variant,
written against benchsuite's numpy rule contract so that the merge gate and
the speed-up comparison can run it directly:

    init(x0) -> state
    step(x, g, state) -> (x, state)

``QuorvaneAdam`` is Adam (Kingma & Ba 2015, Algorithm 1) with the bias
corrections folded into the step size,
``x <- x - lr_t * m / (sqrt(v) + eps_t)`` with
``lr_t = lr * sqrt(1 - beta2^t) / (1 - beta1^t)`` and
``eps_t = eps * sqrt(1 - beta2^t)`` (the same iterates as the textbook form up
to round-off), and an optional decoupled weight decay (``weight_decay``,
default 0, as in AdamW). All updates are in place: no allocation per step.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np


class QuorvaneAdam:
    def __init__(self, lr: float = 1e-3, beta1: float = 0.9, beta2: float = 0.999, eps: float = 1e-8,
                 weight_decay: float = 0.0) -> None:
        self.lr, self.beta1, self.beta2, self.eps, self.weight_decay = lr, beta1, beta2, eps, weight_decay

    def init(self, x0: np.ndarray) -> dict[str, Any]:
        return {"m": np.zeros_like(x0), "v": np.zeros_like(x0), "buf": np.empty_like(x0), "t": 0}

    def step(self, x: np.ndarray, g: np.ndarray, state: dict[str, Any]) -> tuple[np.ndarray, dict[str, Any]]:
        m, v, buf = state["m"], state["v"], state["buf"]
        t = state["t"] = state["t"] + 1
        m *= self.beta1
        m += (1.0 - self.beta1) * g
        np.multiply(g, g, out=buf)
        v *= self.beta2
        buf *= 1.0 - self.beta2
        v += buf
        sc2 = math.sqrt(1.0 - self.beta2**t)
        lr_t = self.lr * sc2 / (1.0 - self.beta1**t)
        np.sqrt(v, out=buf)
        buf += self.eps * sc2
        np.divide(m, buf, out=buf)
        if self.weight_decay:
            x *= 1.0 - self.lr * self.weight_decay
        buf *= lr_t
        x -= buf
        return x, state
