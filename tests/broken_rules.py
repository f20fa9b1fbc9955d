"""Deliberately broken variants of common update rules, for the gate's self-test.

Each class takes the same hyperparameters as the built-in rule it breaks
(``benchsuite.rules``), so the gate can rerun a baseline recorded with the
built-in rule, passing the recorded hyperparameters, with the broken copy.
Each docstring says what is wrong. ``TextbookAdam`` and ``TextbookHeavyBall``
are *correct* independent re-implementations (plain numpy, no shared code):
the gate must pass them.

Written in the numpy rule contract: ``init(x0) -> state``,
``step(x, g, state) -> (x, state)``.
"""

from __future__ import annotations

from typing import Any

import numpy as np


class TextbookAdam:
    """Correct Adam (Kingma & Ba 2015, Algorithm 1), eps outside the root of v_hat."""

    def __init__(self, lr: float = 1e-3, beta1: float = 0.9, beta2: float = 0.999, eps: float = 1e-8) -> None:
        self.lr, self.beta1, self.beta2, self.eps = lr, beta1, beta2, eps

    def init(self, x0: np.ndarray) -> dict[str, Any]:
        return {"m": np.zeros_like(x0), "v": np.zeros_like(x0), "t": 0}

    def _update(self, g: np.ndarray, s: dict[str, Any]) -> None:
        s["t"] += 1
        s["m"] = self.beta1 * s["m"] + (1 - self.beta1) * g
        s["v"] = self.beta2 * s["v"] + (1 - self.beta2) * g * g

    def step(self, x: np.ndarray, g: np.ndarray, s: dict[str, Any]) -> tuple[np.ndarray, dict[str, Any]]:
        self._update(g, s)
        t = s["t"]
        m_hat = s["m"] / (1 - self.beta1**t)
        v_hat = s["v"] / (1 - self.beta2**t)
        return x - self.lr * m_hat / (np.sqrt(v_hat) + self.eps), s


class AdamNoBiasCorrection(TextbookAdam):
    """BROKEN: the bias corrections 1/(1 - beta^t) are missing."""

    def step(self, x, g, s):
        self._update(g, s)
        return x - self.lr * s["m"] / (np.sqrt(s["v"]) + self.eps), s


class AdamEpsInsideSqrt(TextbookAdam):
    """BROKEN: eps inside the square root, sqrt(v_hat + eps), instead of sqrt(v_hat) + eps.

    With eps = 1e-8 the denominator has a floor of 1e-4 instead of 1e-8: it only
    shows once the gradients are small, near tight targets.
    """

    def step(self, x, g, s):
        self._update(g, s)
        t = s["t"]
        m_hat = s["m"] / (1 - self.beta1**t)
        v_hat = s["v"] / (1 - self.beta2**t)
        return x - self.lr * m_hat / np.sqrt(v_hat + self.eps), s


class AdamBeta2AsBeta1(TextbookAdam):
    """BROKEN: wrong decay constant: the first moment decays with beta2 (typo beta2 for beta1)."""

    def step(self, x, g, s):
        s["t"] += 1
        t = s["t"]
        s["m"] = self.beta2 * s["m"] + (1 - self.beta2) * g
        s["v"] = self.beta2 * s["v"] + (1 - self.beta2) * g * g
        m_hat = s["m"] / (1 - self.beta2**t)
        v_hat = s["v"] / (1 - self.beta2**t)
        return x - self.lr * m_hat / (np.sqrt(v_hat) + self.eps), s


class AdamStepOffByOne(TextbookAdam):
    """BROKEN: step counter off by one: bias corrections use t + 1 instead of t."""

    def step(self, x, g, s):
        self._update(g, s)
        t = s["t"] + 1
        m_hat = s["m"] / (1 - self.beta1**t)
        v_hat = s["v"] / (1 - self.beta2**t)
        return x - self.lr * m_hat / (np.sqrt(v_hat) + self.eps), s


class AdamLrSquared(TextbookAdam):
    """BROKEN: the learning rate applied twice: the step is scaled by lr * lr."""

    def step(self, x, g, s):
        self._update(g, s)
        t = s["t"]
        m_hat = s["m"] / (1 - self.beta1**t)
        v_hat = s["v"] / (1 - self.beta2**t)
        return x - self.lr * self.lr * m_hat / (np.sqrt(v_hat) + self.eps), s


class TextbookHeavyBall:
    """Correct heavy ball (Polyak 1964): x+ = x - lr g + momentum (x - x_prev)."""

    def __init__(self, lr: float = 1e-3, momentum: float = 0.9, dampening: float = 0.0) -> None:
        self.lr, self.momentum, self.dampening = lr, momentum, dampening

    def init(self, x0: np.ndarray) -> dict[str, Any]:
        return {"prev": x0.copy()}

    def step(self, x, g, s):
        new = x - self.lr * g + self.momentum * (x - s["prev"])
        s["prev"] = x.copy()
        return new, s


class HeavyBallSignError(TextbookHeavyBall):
    """BROKEN: sign error in the momentum term: - momentum (x - x_prev)."""

    def step(self, x, g, s):
        new = x - self.lr * g - self.momentum * (x - s["prev"])
        s["prev"] = x.copy()
        return new, s


class HeavyBallStaleBuffer(TextbookHeavyBall):
    """BROKEN: the momentum buffer is never updated (x_prev stays x0)."""

    def step(self, x, g, s):
        return x - self.lr * g + self.momentum * (x - s["prev"]), s


class RMSPropEpsInsideSqrt:
    """BROKEN: RMSProp with eps inside the root whatever ``eps_inside_sqrt`` says."""

    def __init__(self, lr: float = 1e-3, decay: float = 0.9, eps: float = 1e-8, eps_inside_sqrt: bool = False,
                 initial_mean_square: float = 0.0) -> None:
        self.lr, self.decay, self.eps, self.v0 = lr, decay, eps, initial_mean_square

    def init(self, x0):
        return {"v": np.full_like(x0, self.v0)}

    def _mean_square(self, g, s, decay):
        s["v"] = decay * s["v"] + (1 - decay) * g * g
        return s["v"]

    def step(self, x, g, s):
        v = self._mean_square(g, s, self.decay)
        return x - self.lr * g / np.sqrt(v + self.eps), s


class RMSPropWrongDecay(RMSPropEpsInsideSqrt):
    """BROKEN: wrong decay constant: 0.95 hard-coded instead of the ``decay`` given."""

    def step(self, x, g, s):
        v = self._mean_square(g, s, 0.95)
        return x - self.lr * g / (np.sqrt(v) + self.eps), s


class TextbookRMSProp(RMSPropEpsInsideSqrt):
    """Correct RMSProp, eps outside the root."""

    def step(self, x, g, s):
        v = self._mean_square(g, s, self.decay)
        return x - self.lr * g / (np.sqrt(v) + self.eps), s


class GDStepTwice:
    """BROKEN: gradient descent applying the step twice per iteration (effective 2 lr)."""

    def __init__(self, lr: float = 1e-3) -> None:
        self.lr = lr

    def init(self, x0):
        return None

    def step(self, x, g, s):
        x = x - self.lr * g
        return x - self.lr * g, s


class TextbookAdamExtraWork(TextbookAdam):
    """SLOWED, not broken: the same iterates as ``TextbookAdam`` plus wasted work each step.

    Recomputes the bias-corrected second moment and its root and discards
    them: a planted slowdown for the speed-up comparison's self-test.
    """

    def step(self, x, g, s):
        x, s = super().step(x, g, s)
        for _ in range(2):
            np.sqrt(s["v"] / (1 - self.beta2 ** s["t"]))
        return x, s


# ------------------------------------------------------------------------------
# Planted bugs of the kinds seen in real optimizer code (issues 8 and 13): each
# changes the iterates by far more than round-off somewhere, some only late.
class GDStepCut8(GDStepTwice):
    """BROKEN: the step is cut by 8 % (``0.92 lr``): slower on every seed, every problem."""

    def step(self, x, g, s):
        return x - 0.92 * self.lr * g, s


class GDSlowAfter128:
    """BROKEN: a schedule that goes wrong late: the step is multiplied by 0.8 after iteration 128."""

    def __init__(self, lr: float = 1e-3) -> None:
        self.lr = lr

    def init(self, x0):
        return {"t": 0}

    def step(self, x, g, s):
        s["t"] += 1
        lr = self.lr * (0.8 if s["t"] > 128 else 1.0)
        return x - lr * g, s


class GDSkipEveryHundred(GDSlowAfter128):
    """BROKEN: one step in a hundred is skipped (the iterate is returned unchanged): about 1 % slower."""

    def step(self, x, g, s):
        s["t"] += 1
        if s["t"] % 100 == 0:
            return x.copy(), s
        return x - self.lr * g, s


class AdamStateReset(TextbookAdam):
    """BROKEN: m, v and t are reset every ``RESET_EVERY`` steps (a re-initialised optimizer)."""

    RESET_EVERY = 100

    def step(self, x, g, s):
        s["k"] = s.get("k", 0) + 1
        if s["k"] % self.RESET_EVERY == 0:
            s["m"], s["v"], s["t"] = np.zeros_like(x), np.zeros_like(x), 0
        return super().step(x, g, s)


class AdamLateBlowUp(TextbookAdam):
    """BROKEN: a "safeguard" that normalises tiny steps: once ``||m_hat / sqrt(v_hat)||`` is
    small the step is divided by its own norm, so near the optimum (where gradients become
    tiny) the rule keeps jumping by ``lr``: it reaches the tightest target, then leaves it."""

    def step(self, x, g, s):
        self._update(g, s)
        t = s["t"]
        d = (s["m"] / (1 - self.beta1**t)) / (np.sqrt(s["v"] / (1 - self.beta2**t)) + self.eps)
        n = float(np.linalg.norm(d))
        if 0 < n < 1e-3 and float(np.linalg.norm(g)) < 1e-6:
            d = d / n
        return x - self.lr * d, s


# ------------------------------------------------------------------------------
# CLEAN rewrites: the same mathematics in another operation order, so only the
# round-off differs. The gate (and --exact) must pass them.
class RMSPropReordered(RMSPropEpsInsideSqrt):
    """CLEAN: RMSProp on the unscaled mean square ``v`` (the built-in keeps ``v / (1 - decay)``),
    the step as ``(lr * g) / (sqrt(v) + eps)`` and the square as ``g**2``."""

    def step(self, x, g, s):
        s["v"] = self.decay * s["v"] + (1.0 - self.decay) * g**2
        return x - (self.lr * g) / (np.sqrt(s["v"]) + self.eps), s


def reordered_gradient():
    """CLEAN: a context manager under which the linear models (least squares, ridge, Huber)
    sum ``A^T c`` row by row with numpy's pairwise sum instead of the BLAS product:
    another summation order of the same gradient, as another BLAS would do.

    Patches the family class in this process; worker processes forked inside the
    ``with`` block inherit it.
    """
    import contextlib

    from benchsuite.families.least_squares import LinearModel

    original = LinearModel._finish

    def _finish(self, x, c, A, out):
        if out is None:
            out = np.empty(self.dim, dtype=self.dtype)
        out[:] = (A * c[:, None]).sum(axis=0)
        out *= 1.0 / A.shape[0]
        if self.lam:
            out += np.multiply(x, self.lam, out=self._t)
        return out

    @contextlib.contextmanager
    def patched():
        LinearModel._finish = _finish
        try:
            yield
        finally:
            LinearModel._finish = original

    return patched()


# =====================================================================================
# precision bugs
# (owned by the theory helper; tests/test_default_set.py shows the default set sees them)
#
# Each broken class differs from its clean parent in one line. The clean parents compute
# in exactly the same order as their broken children, so a difference in the counts is
# the bug, never a different round-off path.
# =====================================================================================
class PrecisionAdam:
    """Correct Adam (Kingma & Ba 2015, Algorithm 1), moments in the iterate's dtype, eps outside the root."""

    def __init__(self, lr: float = 1e-3, beta1: float = 0.9, beta2: float = 0.999, eps: float = 1e-8) -> None:
        self.lr, self.beta1, self.beta2, self.eps = lr, beta1, beta2, eps

    def init(self, x0: np.ndarray) -> dict[str, Any]:
        return {"m": np.zeros_like(x0), "v": np.zeros_like(x0), "t": 0}

    def _moments(self, g: np.ndarray, s: dict[str, Any]) -> tuple[np.ndarray, np.ndarray]:
        s["t"] += 1
        s["m"] = self.beta1 * s["m"] + (1 - self.beta1) * g
        s["v"] = self.beta2 * s["v"] + (1 - self.beta2) * g * g
        return s["m"], s["v"]

    def _denominator(self, v_hat: np.ndarray) -> np.ndarray:
        return np.sqrt(v_hat) + self.eps

    def step(self, x: np.ndarray, g: np.ndarray, s: dict[str, Any]) -> tuple[np.ndarray, dict[str, Any]]:
        m, v = self._moments(g, s)
        t = s["t"]
        m_hat = m / (1 - self.beta1**t)
        v_hat = v / (1 - self.beta2**t)
        return (x - self.lr * m_hat / self._denominator(v_hat)).astype(x.dtype, copy=False), s


class AdamEpsUnderRoot(PrecisionAdam):
    """BROKEN: sqrt(v_hat + eps) instead of sqrt(v_hat) + eps: a floor of 1e-4 on the denominator."""

    def _denominator(self, v_hat):
        return np.sqrt(v_hat + self.eps)


class AdamFloat32Moments(PrecisionAdam):
    """BROKEN: m and v stored in float32 (the update is computed in float64, then rounded)."""

    def init(self, x0):
        return {"m": np.zeros(x0.shape, np.float32), "v": np.zeros(x0.shape, np.float32), "t": 0}

    def _moments(self, g, s):
        s["t"] += 1
        s["m"] = (self.beta1 * s["m"] + (1 - self.beta1) * g).astype(np.float32)
        s["v"] = (self.beta2 * s["v"] + (1 - self.beta2) * g * g).astype(np.float32)
        return s["m"].astype(g.dtype), s["v"].astype(g.dtype)


class AdamClampedV(PrecisionAdam):
    """BROKEN: v clamped from below at 1e-10 "for stability": sqrt(v) >= 1e-5 on small gradients."""

    def _moments(self, g, s):
        m, v = super()._moments(g, s)
        s["v"] = np.maximum(v, 1e-10)
        return m, s["v"]


class PrecisionAdaGrad:
    """Correct diagonal AdaGrad (Duchi, Hazan & Singer 2011), eps outside the root (as torch)."""

    def __init__(self, lr: float = 1e-2, eps: float = 1e-10, initial_accumulator: float = 0.0,
                 lr_decay: float = 0.0) -> None:
        self.lr, self.eps, self.s0, self.lr_decay = lr, eps, initial_accumulator, lr_decay

    def init(self, x0):
        return {"s": np.full_like(x0, self.s0), "t": 0}

    def _denominator(self, s):
        return np.sqrt(s) + self.eps

    def step(self, x, g, st):
        st["t"] += 1
        st["s"] = st["s"] + g * g
        lr = self.lr / (1 + (st["t"] - 1) * self.lr_decay)
        return x - lr * g / self._denominator(st["s"]), st


class AdaGradEpsUnderRoot(PrecisionAdaGrad):
    """BROKEN: sqrt(s + eps) instead of sqrt(s) + eps: a floor of 1e-5 on the denominator."""

    def _denominator(self, s):
        return np.sqrt(s + self.eps)
