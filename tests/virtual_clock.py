"""A deterministic clock for compare's plumbing tests: no wall-clock speed enters a test.

Each step of :class:`CostedAdam` advances a virtual time by a planted cost,
scaled per replay by ``exp(jitter * z)`` with z drawn from a seeded generator
(so the replays of one side differ as real ones do, but identically on every
run). :func:`clock` reads that virtual time; installing it as the timing
replay's ``"cpu"`` clock (compare's default) makes a replay's measured seconds the sum
of the planted costs. Self-contained (numpy only) so that a copy can serve as
a user's module at a git revision.
"""

from __future__ import annotations

from typing import Any

import numpy as np

_now = [0.0]
_rng = np.random.default_rng(20261203)


def clock() -> float:
    return _now[0]


def install() -> None:
    """Make the virtual time the runner's "cpu" clock in this process."""
    from benchsuite import timing

    timing.CLOCKS["cpu"] = clock


class CostedAdam:
    """Adam (Kingma & Ba 2015, Algorithm 1) whose every step costs ``cost`` virtual seconds."""

    def __init__(self, lr: float = 1e-3, cost: float = 1e-4, jitter: float = 0.0, beta1: float = 0.9,
                 beta2: float = 0.999, eps: float = 1e-8) -> None:
        self.lr, self.cost, self.jitter = lr, cost, jitter
        self.beta1, self.beta2, self.eps = beta1, beta2, eps

    def init(self, x0: np.ndarray) -> dict[str, Any]:
        factor = float(np.exp(self.jitter * _rng.standard_normal())) if self.jitter else 1.0
        return {"m": np.zeros_like(x0), "v": np.zeros_like(x0), "t": 0, "step_cost": self.cost * factor}

    def step(self, x: np.ndarray, g: np.ndarray, s: dict[str, Any]) -> tuple[np.ndarray, dict[str, Any]]:
        _now[0] += s["step_cost"]
        s["t"] += 1
        s["m"] = self.beta1 * s["m"] + (1 - self.beta1) * g
        s["v"] = self.beta2 * s["v"] + (1 - self.beta2) * g * g
        m_hat = s["m"] / (1 - self.beta1 ** s["t"])
        v_hat = s["v"] / (1 - self.beta2 ** s["t"])
        return x - self.lr * m_hat / (np.sqrt(v_hat) + self.eps), s
