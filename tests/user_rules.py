"""A user's own update rules, as a test module: every way a rule can be plugged in.

Written the way a user would write them (plain numpy, allocating freely), independent of
benchsuite.rules, so that the plug-in path is checked against an independent implementation.
Also a few deliberately broken rules for the boundary checks.
"""

from __future__ import annotations

from typing import Any, NamedTuple

import numpy as np


class NumpyAdam:
    """Adam, Kingma & Ba 2015 Algorithm 1, written plainly (the numpy contract, a class)."""

    def __init__(self, lr: float = 1e-3, beta1: float = 0.9, beta2: float = 0.999, eps: float = 1e-8) -> None:
        self.lr, self.beta1, self.beta2, self.eps = lr, beta1, beta2, eps

    def init(self, x0: np.ndarray) -> dict[str, Any]:
        return {"m": np.zeros_like(x0), "v": np.zeros_like(x0), "t": 0}

    def step(self, x: np.ndarray, g: np.ndarray, state: dict[str, Any]) -> tuple[np.ndarray, dict[str, Any]]:
        t = state["t"] + 1
        m = self.beta1 * state["m"] + (1 - self.beta1) * g
        v = self.beta2 * state["v"] + (1 - self.beta2) * g * g
        m_hat = m / (1 - self.beta1**t)
        v_hat = v / (1 - self.beta2**t)
        return x - self.lr * m_hat / (np.sqrt(v_hat) + self.eps), {"m": m, "v": v, "t": t}

    @classmethod
    def problem_defaults(cls, constants: Any) -> dict[str, Any]:
        """Like the built-ins: derive a default from the problem (here a made-up lr = 0.1/L)."""
        return {"lr": 0.1 / constants.L} if constants is not None and constants.L else {}


class _SignDescent:
    def __init__(self, lr: float) -> None:
        self.lr = lr

    def init(self, x0: np.ndarray) -> None:
        return None

    def step(self, x: np.ndarray, g: np.ndarray, state: None) -> tuple[np.ndarray, None]:
        return x - self.lr * np.sign(g), state


def make_sign_descent(lr: float = 0.01) -> _SignDescent:
    """A factory function (not a class) returning a numpy-contract object."""
    return _SignDescent(lr)


READY = _SignDescent(0.05)  # an already configured object


def plain_gd(x: np.ndarray, g: np.ndarray, state: Any, t: int, lr: float = 0.1) -> tuple[np.ndarray, Any]:
    """A plain step function: gradient descent; counts its calls in the state to check t."""
    seen = [] if state is None else state
    return x - lr * g, seen + [t]


class Transformation(NamedTuple):
    """An optax-style pure transformation: (init, update) with update returning the *updates*."""

    init: Any
    update: Any


def adam_pair(learning_rate: float = 1e-3, b1: float = 0.9, b2: float = 0.999, eps: float = 1e-8) -> Transformation:
    """Adam as a pure (init, update) pair, optax's convention (updates are added to params)."""

    def init(params: np.ndarray) -> tuple[np.ndarray, np.ndarray, int]:
        return (np.zeros_like(params), np.zeros_like(params), 0)

    def update(updates: np.ndarray, state: tuple, params: np.ndarray | None = None) -> tuple[np.ndarray, tuple]:
        m, v, t = state
        t += 1
        m = b1 * m + (1 - b1) * updates
        v = b2 * v + (1 - b2) * updates * updates
        step = -learning_rate * (m / (1 - b1**t)) / (np.sqrt(v / (1 - b2**t)) + eps)
        return step, (m, v, t)

    return Transformation(init, update)


def adam_pair_tuple(learning_rate: float = 1e-3) -> tuple[Any, Any]:
    """The same pair as a plain ``(init, update)`` tuple (no attribute names)."""
    t = adam_pair(learning_rate)
    return (t.init, t.update)


ADAM_PAIR_TUPLE = adam_pair_tuple(0.01)  # a ready plain tuple


# -- broken rules -----------------------------------------------------------------------
NOT_CALLABLE_PAIR = (1, 2)  # a tuple, but not of two functions


class NoStep:
    """Has init but no step."""

    def __init__(self, lr: float = 0.1) -> None:
        self.lr = lr

    def init(self, x0: np.ndarray) -> None:
        return None


class WrongShape(_SignDescent):
    def __init__(self) -> None:
        super().__init__(0.1)

    def step(self, x: np.ndarray, g: np.ndarray, state: None) -> tuple[np.ndarray, None]:
        return x[:-1] - self.lr * g[:-1], state


class WrongDtype(_SignDescent):
    def __init__(self) -> None:
        super().__init__(0.1)

    def step(self, x: np.ndarray, g: np.ndarray, state: None) -> tuple[np.ndarray, None]:
        return (x - self.lr * g).astype(np.float32), state


class NotTuple(_SignDescent):
    def __init__(self) -> None:
        super().__init__(0.1)

    def step(self, x: np.ndarray, g: np.ndarray, state: None) -> np.ndarray:  # type: ignore[override]
        return x - self.lr * g


def junk_step(x: np.ndarray, g: np.ndarray, state: Any, t: int) -> np.ndarray:
    """A plain step function that forgets to return the state."""
    return x - 0.1 * g


NOT_A_RULE = 42
