"""Deliberately misbehaving update rules for the runner's status tests (importable by path).

Each is a gradient-descent step that goes wrong at a chosen iteration: it
raises, produces NaN, never returns, returns the wrong shape, or is slow.
"""

from __future__ import annotations

import time

import numpy as np


class _Base:
    def __init__(self, lr: float = 0.5, at: int = 3) -> None:
        self.lr = lr
        self.at = at

    def init(self, x0: np.ndarray) -> dict:
        return {"k": 0}

    def _gd(self, x: np.ndarray, g: np.ndarray, state: dict) -> tuple[np.ndarray, dict]:
        state["k"] += 1
        return x - self.lr * g, state


class Raiser(_Base):
    """Raises ZeroDivisionError at step ``at``."""

    def step(self, x, g, state):
        if state["k"] + 1 == self.at:
            raise ZeroDivisionError("planted failure in step")
        return self._gd(x, g, state)


class NaNer(_Base):
    """Returns an all-NaN iterate at step ``at``."""

    def step(self, x, g, state):
        x, state = self._gd(x, g, state)
        if state["k"] == self.at:
            x = np.full_like(x, np.nan)
        return x, state


class Hanger(_Base):
    """Never returns from step ``at`` (sleeps far beyond any test timeout)."""

    def step(self, x, g, state):
        if state["k"] + 1 == self.at:
            time.sleep(3600)
        return self._gd(x, g, state)


class WrongShape(_Base):
    """Returns x with one coordinate dropped (a contract violation)."""

    def step(self, x, g, state):
        x, state = self._gd(x, g, state)
        return x[:-1], state


class SlowGD(_Base):
    """Correct gradient descent that sleeps ``delay`` seconds per step (for interrupt tests)."""

    def __init__(self, lr: float = 0.5, delay: float = 0.002) -> None:
        super().__init__(lr)
        self.delay = delay

    def step(self, x, g, state):
        time.sleep(self.delay)
        return self._gd(x, g, state)


class PlainGD(_Base):
    """Gradient descent x <- x - lr g, for the exactness tests."""

    def step(self, x, g, state):
        return self._gd(x, g, state)


class LateBlowUp(_Base):
    """Gradient descent that, from step ``at`` on, multiplies its step by ``grow`` each step.

    Reaches tight targets first, then leaves them: the late blow-up near the
    optimum the stay-converged horizon exists to catch.
    """

    def __init__(self, lr: float = 0.5, at: int = 60, grow: float = 1.2) -> None:
        super().__init__(lr, at)
        self.grow = grow

    def step(self, x, g, state):
        k = state["k"] + 1
        lr = self.lr * (self.grow ** (k - self.at) if k >= self.at else 1.0)
        state["k"] = k
        return x - lr * g, state


class Kicker(_Base):
    """Gradient descent that, at step ``at``, jumps back towards the start by ``kick`` x the way done.

    The measure leaves the tightest target once, then contracts again: with a
    horizon long enough the pass ends converged (``left_at`` set, status
    reached); with one too short it ends above (status unstable).
    """

    def __init__(self, lr: float = 0.5, at: int = 60, kick: float = 0.5) -> None:
        super().__init__(lr, at)
        self.kick = kick

    def init(self, x0: np.ndarray) -> dict:
        return {"k": 0, "x0": x0.copy()}

    def step(self, x, g, state):
        x, state = self._gd(x, g, state)
        if state["k"] == self.at:
            x = x + self.kick * (state["x0"] - x)
        return x, state
