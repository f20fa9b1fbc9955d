"""Built-in first-order update rules (numpy), the suite's reference behaviour.

Every rule follows the rule contract (see ``DEVELOPERS.md``): the class is the
factory, called with keyword hyperparameters; the object has

    init(x0) -> state
    step(x, g, state) -> (x, state)

``step`` updates ``x`` **in place** and returns it. All buffers are allocated
in ``init`` (same dtype and shape as ``x0``); a step makes no array
temporaries: only numpy ufuncs with ``out=`` (no per-coordinate Python loops).

The class defaults are the published ones (each docstring says where they come
from and which values are recalled from memory). ``problem_defaults(constants)``
gives the problem-aware defaults (e.g. ``lr = 1/L`` for gradient descent) used
by :func:`benchsuite.rulespec.build_rule` when L / mu are known.

Where torch.optim follows a different convention from the paper (epsilon
placement, initial accumulator, AdaDelta's learning-rate scaling, AdamW's
``lr * weight_decay``, AMSGrad's bias correction), the convention is an
explicit hyperparameter; :func:`torch_equivalent` gives the exact
torch-matching configuration and the torch keyword arguments, and
:data:`TORCH_MAPPING` summarises it. The tests check trajectory equality with
torch.optim under that mapping and a real difference without it.
"""

from __future__ import annotations

import inspect
import math
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np

from benchsuite.problem import Constants

__all__ = [
    "Rule",
    "GD",
    "HeavyBall",
    "Nesterov",
    "NesterovSC",
    "AdaGrad",
    "RMSProp",
    "AdaDelta",
    "Adam",
    "AdamW",
    "AMSGrad",
    "Adamax",
    "NAdam",
    "BUILTIN_RULES",
    "TorchEquivalent",
    "torch_equivalent",
    "TORCH_MAPPING",
]

#: step size used when L is unknown for rules whose natural step is 1/L
#: (common practice, no source)
FALLBACK_LR = 1e-3


# -- in-place kernels ----------------------------------------------------------
class _Kernels:
    """``y += a*x`` and ``y *= a`` in place through one preallocated scratch buffer.

    Plain numpy ufuncs (single-threaded, no BLAS): the timing of a step does
    not depend on BLAS thread settings, and ``y += a*x`` rounds exactly as the
    expression ``y + a*x`` does.
    """

    __slots__ = ("_scratch",)

    def __init__(self, x0: np.ndarray) -> None:
        self._scratch = np.empty_like(x0)

    def axpy(self, a: float, x: np.ndarray, y: np.ndarray) -> None:
        np.multiply(x, a, out=self._scratch)
        np.add(y, self._scratch, out=y)

    def scal(self, a: float, y: np.ndarray) -> None:
        np.multiply(y, a, out=y)


# -- hyperparameter checks (ValueError; build_rule names the rule) -------------
def _float(name: str, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise ValueError(f"{name} must be a number, got {value!r}")
    v = float(value)
    if math.isnan(v):
        raise ValueError(f"{name} must not be NaN")
    return v


def _positive(name: str, value: Any) -> float:
    v = _float(name, value)
    if not (0.0 < v < math.inf):
        raise ValueError(f"{name} must be positive and finite, got {value!r}")
    return v


def _nonneg(name: str, value: Any) -> float:
    v = _float(name, value)
    if not (0.0 <= v < math.inf):
        raise ValueError(f"{name} must be >= 0 and finite, got {value!r}")
    return v


def _eps(value: Any, *, allow_zero: bool = False) -> float:
    """An ``eps`` that is added to a denominator: > 0, since ``eps = 0`` turns a gradient
    coordinate that is exactly 0 into 0/0 = NaN (``allow_zero``: the rule keeps the
    denominator positive by other means)."""
    v = _float("eps", value)
    if allow_zero:
        if not (0.0 <= v < math.inf):
            raise ValueError(f"eps must be >= 0 and finite, got {value!r}")
        return v
    if not (0.0 < v < math.inf):
        raise ValueError(
            f"eps must be > 0 and finite (it is added to a denominator: eps = 0 gives 0/0 = NaN "
            f"where a gradient coordinate is exactly 0), got {value!r}"
        )
    return v


def _unit(name: str, value: Any) -> float:
    v = _float(name, value)
    if not (0.0 <= v < 1.0):
        raise ValueError(f"{name} must be in [0, 1), got {value!r}")
    return v


def _flag(name: str, value: Any) -> bool:
    if not isinstance(value, (bool, np.bool_)):
        raise ValueError(f"{name} must be true or false, got {value!r}")
    return bool(value)


def _choice(name: str, value: Any, options: tuple[str, ...]) -> str:
    if value not in options:
        raise ValueError(f"{name} must be one of {', '.join(options)}; got {value!r}")
    return str(value)


# -- base ----------------------------------------------------------------------
class Rule:
    """Base of the built-in rules: introspection of hyperparameters and papers.

    Subclasses set ``name``, ``paper``, ``problem_aware`` (one line: what
    ``problem_defaults`` derives) and the torch mapping: ``torch_class``,
    ``torch_convention`` (our hyperparameter values that torch's algorithm
    hard-codes), ``torch_preset`` (our values reproducing torch's own
    defaults; includes the convention) and ``_torch_kwargs``.
    """

    name: ClassVar[str] = ""
    paper: ClassVar[str] = ""
    problem_aware: ClassVar[str] = "none (published defaults)"
    torch_class: ClassVar[str | None] = None
    torch_convention: ClassVar[dict[str, Any]] = {}
    torch_preset: ClassVar[dict[str, Any]] = {}
    #: with its defaults, the rule's fixed points are the minimisers of f (so it
    #: can reach a certified optimum); False e.g. for decoupled weight decay
    seeks_minimiser: ClassVar[bool] = True

    @classmethod
    def param_names(cls) -> tuple[str, ...]:
        sig = inspect.signature(cls.__init__)
        return tuple(p for p in sig.parameters if p != "self")

    @classmethod
    def defaults(cls) -> dict[str, Any]:
        """The published defaults: the keyword defaults of the constructor."""
        sig = inspect.signature(cls.__init__)
        return {k: p.default for k, p in sig.parameters.items() if k != "self"}

    @classmethod
    def problem_defaults(cls, constants: Constants | None) -> dict[str, Any]:
        """Defaults derived from L and mu (empty: keep the published ones)."""
        return {}

    @property
    def hyperparams(self) -> dict[str, Any]:
        return {k: getattr(self, k) for k in self.param_names()}

    @classmethod
    def torch_kwargs(cls, hp: dict[str, Any]) -> dict[str, Any]:
        """torch.optim keyword arguments equal to our hyperparameters ``hp``.

        Raises ValueError when ``hp`` departs from torch's convention (then
        no torch configuration reproduces the rule).
        """
        if cls.torch_class is None:
            raise ValueError(f"{cls.name} has no torch.optim counterpart")
        for k, v in cls.torch_convention.items():
            if hp.get(k, v) != v:
                raise ValueError(f"{cls.name}: torch.optim.{cls.torch_class} requires {k}={v!r}, got {hp[k]!r}")
        return cls._torch_kwargs(hp)

    @classmethod
    def _torch_kwargs(cls, hp: dict[str, Any]) -> dict[str, Any]:
        raise NotImplementedError

    def __repr__(self) -> str:
        args = ", ".join(f"{k}={v!r}" for k, v in self.hyperparams.items())
        return f"{type(self).__name__}({args})"


def _inv_L(constants: Constants | None) -> dict[str, Any]:
    if constants is not None and constants.L:
        return {"lr": 1.0 / constants.L}
    return {}


# -- gradient methods ----------------------------------------------------------
class GD(Rule):
    """Gradient descent with a fixed step: ``x <- x - lr * g``.

    Fed minibatch gradients by the runner this is SGD. Default ``lr = 1/L``
    when L is known (the classical step for an L-smooth objective, e.g.
    Nesterov 2004, section 2.1.5, from memory), else ``lr = 1e-3`` (common
    practice, no source). torch: ``SGD(lr)``.
    """

    name = "gd"
    paper = "Cauchy (1847), gradient descent"
    problem_aware = "lr = 1/L"
    torch_class = "SGD"

    def __init__(self, lr: float = FALLBACK_LR) -> None:
        self.lr = _positive("lr", lr)

    @classmethod
    def problem_defaults(cls, constants: Constants | None) -> dict[str, Any]:
        return _inv_L(constants)

    @classmethod
    def _torch_kwargs(cls, hp: dict[str, Any]) -> dict[str, Any]:
        return {"lr": hp["lr"]}

    def init(self, x0: np.ndarray) -> _Kernels:
        return _Kernels(x0)

    def step(self, x: np.ndarray, g: np.ndarray, state: _Kernels) -> tuple[np.ndarray, _Kernels]:
        state.axpy(-self.lr, g, x)
        return x, state


class HeavyBall(Rule):
    """Heavy-ball momentum (Polyak 1964).

    Polyak's form ``x_{k+1} = x_k - lr g_k + beta (x_k - x_{k-1})`` is
    computed as ``v_k = beta v_{k-1} + (1 - dampening) g_k``, ``x_{k+1} = x_k - lr v_k``
    with ``v_0 = g_0`` (identical for ``dampening = 0``; the first-step rule
    ``v_0 = g_0`` is torch's convention when ``dampening > 0``). The state
    keeps ``w = -lr v``, the displacement, which saves a memory pass.

    Defaults: ``lr = 1e-3``, ``momentum = 0.9``, ``dampening = 0`` (common
    practice, no source). With L and mu known, the textbook parameters for an
    L-smooth mu-strongly convex quadratic: ``lr = 4 / (sqrt(L) + sqrt(mu))**2``,
    ``momentum = ((sqrt(kappa) - 1) / (sqrt(kappa) + 1))**2`` (Polyak 1964;
    Polyak 1987, "Introduction to Optimization", section 3.2, from memory);
    with only L known, ``lr = 1/L`` (common practice, no source).
    torch: ``SGD(lr, momentum, dampening)``.
    """

    name = "heavy_ball"
    paper = "Polyak (1964), Some methods of speeding up the convergence of iteration methods"
    problem_aware = "lr = 4/(sqrt(L)+sqrt(mu))^2, momentum = ((sqrt(kappa)-1)/(sqrt(kappa)+1))^2; lr = 1/L if mu unknown"
    torch_class = "SGD"

    def __init__(self, lr: float = FALLBACK_LR, momentum: float = 0.9, dampening: float = 0.0) -> None:
        self.lr = _positive("lr", lr)
        self.momentum = _unit("momentum", momentum)
        self.dampening = _unit("dampening", dampening)

    @classmethod
    def problem_defaults(cls, constants: Constants | None) -> dict[str, Any]:
        if constants is not None and constants.L and constants.mu:
            sL, smu = math.sqrt(constants.L), math.sqrt(constants.mu)
            return {"lr": 4.0 / (sL + smu) ** 2, "momentum": ((sL - smu) / (sL + smu)) ** 2}
        return _inv_L(constants)

    @classmethod
    def _torch_kwargs(cls, hp: dict[str, Any]) -> dict[str, Any]:
        return {"lr": hp["lr"], "momentum": hp["momentum"], "dampening": hp["dampening"]}

    def init(self, x0: np.ndarray) -> dict[str, Any]:
        return {"w": np.zeros_like(x0), "k": 0, "ops": _Kernels(x0)}

    def step(self, x: np.ndarray, g: np.ndarray, state: dict[str, Any]) -> tuple[np.ndarray, dict[str, Any]]:
        w, ops = state["w"], state["ops"]  # w = -lr v: the displacement x_{k+1} - x_k
        if state["k"] == 0:
            np.multiply(g, -self.lr, out=w)
        else:
            ops.scal(self.momentum, w)
            ops.axpy(-self.lr * (1.0 - self.dampening), g, w)
        state["k"] += 1
        np.add(x, w, out=x)
        return x, state


class _XYNesterov:
    """Nesterov's two-sequence scheme in the coordinates the runner sees.

    ``x_{k+1} = y_k - lr grad f(y_k)``, ``y_{k+1} = x_{k+1} + beta_k (x_{k+1} - x_k)``,
    ``x_0 = y_0``. The gradient is taken at ``y``, so ``step`` receives and
    returns ``y`` (the runner measures f at ``y_k``; the classical rate bounds
    hold for ``f(x_k)``). Buffers ``x_k`` and ``x_{k+1}`` are swapped, not copied.
    """

    @staticmethod
    def init_xy(x0: np.ndarray) -> dict[str, Any]:
        return {"x": x0.copy(), "xn": np.empty_like(x0), "k": 0, "t": 1.0}

    @staticmethod
    def step_xy(lr: float, beta: float, y: np.ndarray, g: np.ndarray, state: dict[str, Any]) -> np.ndarray:
        xp, xn = state["x"], state["xn"]
        np.multiply(g, -lr, out=xn)
        np.add(xn, y, out=xn)  # x_{k+1} = y_k - lr g
        np.subtract(xn, xp, out=y)
        np.multiply(y, beta, out=y)
        np.add(y, xn, out=y)  # y_{k+1} = x_{k+1} + beta (x_{k+1} - x_k)
        state["x"], state["xn"] = xn, xp
        return y


class Nesterov(Rule):
    """Nesterov accelerated gradient, in its convex form and in the ML form.

    ``schedule = "t"`` (default): **Nesterov (1983)** for L-smooth convex f,
    ``x_{k+1} = y_k - lr grad f(y_k)``, ``y_{k+1} = x_{k+1} + ((t_k - 1)/t_{k+1}) (x_{k+1} - x_k)``,
    ``t_1 = 1``, ``t_{k+1} = (1 + sqrt(1 + 4 t_k^2)) / 2``, ``lr = 1/L``;
    ``f(x_k) - f* <= 2 L ||x_0 - x*||^2 / (k+1)^2`` (as written by Beck &
    Teboulle 2009 for FISTA, from memory). ``schedule = "k"``: the same scheme
    with momentum ``(k-1)/(k+2)`` at step k (Su, Boyd & Candes 2016 form,
    from memory). Both return the gradient point ``y``.

    ``schedule = "constant"``: the form commonly used in ML (Sutskever,
    Martens, Dahl & Hinton 2013, in the reparametrisation used by
    torch.optim.SGD with ``nesterov=True``): ``b_k = momentum b_{k-1} + g_k``
    (``b_0 = g_0``), ``x <- x - lr (g_k + momentum b_k)``; ``momentum`` is read
    only by this schedule (default 0.9, common practice, no source).

    Defaults: ``lr = 1/L`` when L is known, else ``1e-3`` (common practice).
    torch: ``SGD(lr, momentum, nesterov=True)`` for ``schedule = "constant"``.
    """

    name = "nesterov"
    paper = "Nesterov (1983); ML form: Sutskever, Martens, Dahl & Hinton (2013)"
    problem_aware = "lr = 1/L"
    torch_class = "SGD"
    torch_convention = {"schedule": "constant"}
    torch_preset = {"schedule": "constant"}
    SCHEDULES: ClassVar[tuple[str, ...]] = ("t", "k", "constant")

    def __init__(self, lr: float = FALLBACK_LR, schedule: str = "t", momentum: float = 0.9) -> None:
        self.lr = _positive("lr", lr)
        self.schedule = _choice("schedule", schedule, self.SCHEDULES)
        self.momentum = _unit("momentum", momentum)

    @classmethod
    def problem_defaults(cls, constants: Constants | None) -> dict[str, Any]:
        return _inv_L(constants)

    @classmethod
    def _torch_kwargs(cls, hp: dict[str, Any]) -> dict[str, Any]:
        return {"lr": hp["lr"], "momentum": hp["momentum"], "nesterov": True}

    def init(self, x0: np.ndarray) -> dict[str, Any]:
        if self.schedule == "constant":
            return {"b": np.zeros_like(x0), "k": 0, "ops": _Kernels(x0)}
        return _XYNesterov.init_xy(x0)

    def step(self, x: np.ndarray, g: np.ndarray, state: dict[str, Any]) -> tuple[np.ndarray, dict[str, Any]]:
        k = state["k"] = state["k"] + 1
        if self.schedule == "constant":
            b, ops = state["b"], state["ops"]
            if k == 1:
                np.copyto(b, g)
            else:
                ops.scal(self.momentum, b)
                np.add(b, g, out=b)
            ops.axpy(-self.lr, g, x)
            ops.axpy(-self.lr * self.momentum, b, x)
            return x, state
        if self.schedule == "t":
            t = state["t"]
            t_next = 0.5 * (1.0 + math.sqrt(1.0 + 4.0 * t * t))
            beta = (t - 1.0) / t_next
            state["t"] = t_next
        else:
            beta = (k - 1.0) / (k + 2.0)
        return _XYNesterov.step_xy(self.lr, beta, x, g, state), state


class NesterovSC(Rule):
    """Nesterov's constant-momentum scheme for mu-strongly convex, L-smooth f.

    ``x_{k+1} = y_k - lr grad f(y_k)``, ``y_{k+1} = x_{k+1} + momentum (x_{k+1} - x_k)``,
    with ``lr = 1/L`` and ``momentum = (sqrt(kappa) - 1)/(sqrt(kappa) + 1)``
    when L and mu are known (Nesterov 2004, "Introductory Lectures on Convex
    Optimization", constant step scheme III, (2.2.19), from memory);
    ``f(x_k) - f* <= (1 - 1/sqrt(kappa))^k (f(x_0) - f* + mu/2 ||x_0 - x*||^2)``.
    Returns the gradient point ``y``. Defaults without constants:
    ``lr = 1e-3``, ``momentum = 0.9`` (common practice, no source). Algebraically identical to
    torch ``SGD(lr, momentum, nesterov=True)`` (checked in the tests).
    """

    name = "nesterov_sc"
    paper = "Nesterov (2004), Introductory Lectures on Convex Optimization, scheme (2.2.19)"
    problem_aware = "lr = 1/L, momentum = (sqrt(kappa)-1)/(sqrt(kappa)+1)"
    torch_class = "SGD"

    def __init__(self, lr: float = FALLBACK_LR, momentum: float = 0.9) -> None:
        self.lr = _positive("lr", lr)
        self.momentum = _unit("momentum", momentum)

    @classmethod
    def problem_defaults(cls, constants: Constants | None) -> dict[str, Any]:
        out = _inv_L(constants)
        if constants is not None and constants.L and constants.mu:
            sk = math.sqrt(constants.L / constants.mu)
            out["momentum"] = (sk - 1.0) / (sk + 1.0)
        return out

    @classmethod
    def _torch_kwargs(cls, hp: dict[str, Any]) -> dict[str, Any]:
        return {"lr": hp["lr"], "momentum": hp["momentum"], "nesterov": True}

    def init(self, x0: np.ndarray) -> dict[str, Any]:
        return _XYNesterov.init_xy(x0)

    def step(self, x: np.ndarray, g: np.ndarray, state: dict[str, Any]) -> tuple[np.ndarray, dict[str, Any]]:
        state["k"] += 1
        return _XYNesterov.step_xy(self.lr, self.momentum, x, g, state), state


# -- adaptive methods ----------------------------------------------------------
class AdaGrad(Rule):
    """AdaGrad, diagonal version (Duchi, Hazan & Singer 2011).

    ``s_t = s_{t-1} + g_t^2`` (``s_0 = initial_accumulator``),
    ``x <- x - lr_t g_t / (sqrt(s_t) + eps)``, ``lr_t = lr / (1 + (t-1) lr_decay)``.
    The paper's delta sits outside the square root, as here and in torch.
    Defaults: the paper prescribes no numeric eta or delta; ``lr = 1e-2``,
    ``eps = 1e-10``, ``initial_accumulator = 0``, ``lr_decay = 0`` are torch's
    defaults (common practice). torch: ``Adagrad(lr, lr_decay, eps,
    initial_accumulator_value)``.
    """

    name = "adagrad"
    paper = "Duchi, Hazan & Singer (2011), JMLR 12"
    torch_class = "Adagrad"

    def __init__(
        self, lr: float = 1e-2, eps: float = 1e-10, initial_accumulator: float = 0.0, lr_decay: float = 0.0
    ) -> None:
        self.lr = _positive("lr", lr)
        self.initial_accumulator = _nonneg("initial_accumulator", initial_accumulator)
        # s_t >= initial_accumulator never decreases: eps = 0 is safe only with a positive start
        self.eps = _eps(eps, allow_zero=self.initial_accumulator > 0)
        self.lr_decay = _nonneg("lr_decay", lr_decay)

    @classmethod
    def _torch_kwargs(cls, hp: dict[str, Any]) -> dict[str, Any]:
        return {
            "lr": hp["lr"],
            "eps": hp["eps"],
            "initial_accumulator_value": hp["initial_accumulator"],
            "lr_decay": hp["lr_decay"],
        }

    def init(self, x0: np.ndarray) -> dict[str, Any]:
        return {"s": np.full_like(x0, self.initial_accumulator), "buf": np.empty_like(x0), "t": 0}

    def step(self, x: np.ndarray, g: np.ndarray, state: dict[str, Any]) -> tuple[np.ndarray, dict[str, Any]]:
        s, buf = state["s"], state["buf"]
        t = state["t"] = state["t"] + 1
        np.multiply(g, g, out=buf)
        np.add(s, buf, out=s)
        np.sqrt(s, out=buf)
        np.add(buf, self.eps, out=buf)
        np.divide(g, buf, out=buf)
        np.multiply(buf, -self.lr / (1.0 + (t - 1) * self.lr_decay), out=buf)
        np.add(x, buf, out=x)
        return x, state


class RMSProp(Rule):
    """RMSProp (Tieleman & Hinton 2012, Coursera Neural Networks slides 6.5).

    ``v_t = decay v_{t-1} + (1 - decay) g_t^2`` (``v_0 = initial_mean_square``),
    ``x <- x - lr g_t / (sqrt(v_t) + eps)``, or ``/ sqrt(v_t + eps)`` with
    ``eps_inside_sqrt = true`` (the TensorFlow 1 convention, from memory).
    The state keeps ``V = v / (1 - decay)`` (``V = decay V + g^2``: one
    memory pass fewer); the factor is folded back into the update.

    Defaults: ``decay = 0.9`` (the slides, from memory); the slides give no lr
    and no eps: ``lr = 1e-3``, ``eps = 1e-8`` outside the root (common
    practice, no source). torch: ``RMSprop(lr, alpha=decay, eps)`` with eps
    outside the root and ``v_0 = 0``; torch's own defaults are ``lr = 1e-2``,
    ``alpha = 0.99``.
    """

    name = "rmsprop"
    paper = "Tieleman & Hinton (2012), Neural Networks for Machine Learning, slides 6.5"
    torch_class = "RMSprop"
    torch_convention = {"eps_inside_sqrt": False, "initial_mean_square": 0.0}
    torch_preset = {"lr": 1e-2, "decay": 0.99, "eps": 1e-8, "eps_inside_sqrt": False, "initial_mean_square": 0.0}

    def __init__(
        self,
        lr: float = 1e-3,
        decay: float = 0.9,
        eps: float = 1e-8,
        eps_inside_sqrt: bool = False,
        initial_mean_square: float = 0.0,
    ) -> None:
        self.lr = _positive("lr", lr)
        self.decay = _unit("decay", decay)
        self.eps = _eps(eps)  # v decays: even a positive initial_mean_square underflows to 0
        self.eps_inside_sqrt = _flag("eps_inside_sqrt", eps_inside_sqrt)
        self.initial_mean_square = _nonneg("initial_mean_square", initial_mean_square)

    @classmethod
    def _torch_kwargs(cls, hp: dict[str, Any]) -> dict[str, Any]:
        return {"lr": hp["lr"], "alpha": hp["decay"], "eps": hp["eps"]}

    def init(self, x0: np.ndarray) -> dict[str, Any]:
        V = np.full_like(x0, self.initial_mean_square / (1.0 - self.decay))
        return {"V": V, "buf": np.empty_like(x0)}

    def step(self, x: np.ndarray, g: np.ndarray, state: dict[str, Any]) -> tuple[np.ndarray, dict[str, Any]]:
        V, buf = state["V"], state["buf"]  # V = v / (1 - decay)
        np.multiply(g, g, out=buf)
        np.multiply(V, self.decay, out=V)
        np.add(V, buf, out=V)
        c = 1.0 - self.decay  # sqrt(v) = sqrt(c) sqrt(V)
        if self.eps_inside_sqrt:  # sqrt(v + eps) = sqrt(c) sqrt(V + eps/c)
            np.add(V, self.eps / c, out=buf)
            np.sqrt(buf, out=buf)
        else:  # sqrt(v) + eps = sqrt(c) (sqrt(V) + eps/sqrt(c))
            np.sqrt(V, out=buf)
            np.add(buf, self.eps / math.sqrt(c), out=buf)
        np.divide(g, buf, out=buf)
        np.multiply(buf, -self.lr / math.sqrt(c), out=buf)
        np.add(x, buf, out=x)
        return x, state


class AdaDelta(Rule):
    """AdaDelta (Zeiler 2012, Algorithm 1).

    ``E[g^2]_t = rho E[g^2]_{t-1} + (1 - rho) g_t^2``,
    ``d_t = sqrt(E[dx^2]_{t-1} + eps) / sqrt(E[g^2]_t + eps) * g_t``,
    ``E[dx^2]_t = rho E[dx^2]_{t-1} + (1 - rho) u_t^2``, ``x <- x - lr d_t``,
    where ``u_t = d_t`` (torch's convention: the accumulator sees the
    unscaled step) or ``u_t = lr d_t`` with ``accumulate_scaled_delta = true``
    (the step actually taken). The paper has no learning rate (``lr = 1``;
    then both coincide).

    Defaults: ``rho = 0.95``, ``eps = 1e-6`` (the paper's experiments, from
    memory). torch: ``Adadelta(lr, rho, eps)``, torch's own default ``rho = 0.9``.
    """

    name = "adadelta"
    paper = "Zeiler (2012), ADADELTA: an adaptive learning rate method, arXiv:1212.5701"
    torch_class = "Adadelta"
    torch_convention = {"accumulate_scaled_delta": False}
    torch_preset = {"lr": 1.0, "rho": 0.9, "eps": 1e-6, "accumulate_scaled_delta": False}

    def __init__(
        self, lr: float = 1.0, rho: float = 0.95, eps: float = 1e-6, accumulate_scaled_delta: bool = False
    ) -> None:
        self.lr = _positive("lr", lr)
        self.rho = _unit("rho", rho)
        self.eps = _positive("eps", eps)
        self.accumulate_scaled_delta = _flag("accumulate_scaled_delta", accumulate_scaled_delta)

    @classmethod
    def _torch_kwargs(cls, hp: dict[str, Any]) -> dict[str, Any]:
        return {"lr": hp["lr"], "rho": hp["rho"], "eps": hp["eps"]}

    def init(self, x0: np.ndarray) -> dict[str, Any]:
        z = np.zeros_like
        return {"eg": z(x0), "edx": z(x0), "buf": np.empty_like(x0), "d": np.empty_like(x0)}

    def step(self, x: np.ndarray, g: np.ndarray, state: dict[str, Any]) -> tuple[np.ndarray, dict[str, Any]]:
        eg, edx, buf, d = state["eg"], state["edx"], state["buf"], state["d"]
        rho, c = self.rho, 1.0 - self.rho
        np.multiply(g, g, out=buf)
        np.multiply(buf, c, out=buf)
        np.multiply(eg, rho, out=eg)
        np.add(eg, buf, out=eg)
        np.add(eg, self.eps, out=buf)
        np.sqrt(buf, out=buf)  # RMS[g]_t
        np.add(edx, self.eps, out=d)
        np.sqrt(d, out=d)  # RMS[dx]_{t-1}
        np.divide(d, buf, out=d)
        np.multiply(d, g, out=d)  # d_t
        np.multiply(d, d, out=buf)
        np.multiply(buf, c * self.lr * self.lr if self.accumulate_scaled_delta else c, out=buf)
        np.multiply(edx, rho, out=edx)
        np.add(edx, buf, out=edx)
        np.multiply(d, -self.lr, out=d)
        np.add(x, d, out=x)
        return x, state


class Adam(Rule):
    """Adam (Kingma & Ba 2015, Algorithm 1).

    ``m_t = b1 m + (1 - b1) g``, ``v_t = b2 v + (1 - b2) g^2``,
    ``x <- x - lr (m_t / (1 - b1^t)) / (sqrt(v_t / (1 - b2^t)) + eps)``
    (eps outside the root, added to the bias-corrected root, as in torch).
    The state keeps ``M = m/(1 - b1)`` and ``V = v/(1 - b2)``
    (``M = b1 M + g``, ``V = b2 V + g^2``: a memory pass fewer each) and the
    update folds the factors and bias corrections into two scalars: the same
    numbers up to round-off.

    Defaults: ``lr = 1e-3``, ``beta1 = 0.9``, ``beta2 = 0.999``, ``eps = 1e-8``
    (the paper, section 2). torch: ``Adam(lr, betas=(beta1, beta2), eps)``.
    """

    name = "adam"
    paper = "Kingma & Ba (2015), Adam: a method for stochastic optimization, ICLR"
    torch_class = "Adam"

    def __init__(self, lr: float = 1e-3, beta1: float = 0.9, beta2: float = 0.999, eps: float = 1e-8) -> None:
        self.lr = _positive("lr", lr)
        self.beta1 = _unit("beta1", beta1)
        self.beta2 = _unit("beta2", beta2)
        self.eps = _eps(eps)

    @classmethod
    def _torch_kwargs(cls, hp: dict[str, Any]) -> dict[str, Any]:
        return {"lr": hp["lr"], "betas": (hp["beta1"], hp["beta2"]), "eps": hp["eps"]}

    def init(self, x0: np.ndarray) -> dict[str, Any]:
        z = np.zeros_like
        return {"M": z(x0), "V": z(x0), "buf": np.empty_like(x0), "t": 0}

    def _moments(self, g: np.ndarray, state: dict[str, Any]) -> int:
        """``M = b1 M + g``, ``V = b2 V + g^2``: the moments scaled by 1/(1 - b_i)."""
        M, V, buf = state["M"], state["V"], state["buf"]
        np.multiply(M, self.beta1, out=M)
        np.add(M, g, out=M)
        np.multiply(g, g, out=buf)
        np.multiply(V, self.beta2, out=V)
        np.add(V, buf, out=V)
        t = state["t"] = state["t"] + 1
        return t

    def _apply(self, x: np.ndarray, V: np.ndarray, t: int, state: dict[str, Any], bias: bool = True) -> None:
        """``x -= lr m_hat / (sqrt(v_hat) + eps)`` from the scaled ``M``, ``V``.

        ``m_hat = (1-b1) M / c1``, ``sqrt(v_hat) = k sqrt(V)`` with
        ``k = sqrt((1-b2)/c2)``, ``c_i = 1 - b_i^t`` (``c_i = 1`` without bias correction).
        """
        buf = state["buf"]
        c1 = 1.0 - self.beta1**t if bias else 1.0
        k = math.sqrt((1.0 - self.beta2) / (1.0 - self.beta2**t if bias else 1.0))
        np.sqrt(V, out=buf)
        np.add(buf, self.eps / k, out=buf)
        np.divide(state["M"], buf, out=buf)
        np.multiply(buf, -self.lr * (1.0 - self.beta1) / (c1 * k), out=buf)
        np.add(x, buf, out=x)

    def step(self, x: np.ndarray, g: np.ndarray, state: dict[str, Any]) -> tuple[np.ndarray, dict[str, Any]]:
        t = self._moments(g, state)
        self._apply(x, state["V"], t, state)
        return x, state


class AdamW(Adam):
    """AdamW: Adam with decoupled weight decay (Loshchilov & Hutter 2019, Algorithm 2).

    ``x <- x - (lr m_hat / (sqrt(v_hat) + eps) + lambda x)`` with the decay
    step ``lambda = weight_decay`` (the paper, schedule multiplier eta_t = 1)
    or ``lambda = lr * weight_decay`` with ``decay_scaled_by_lr = true``
    (torch's convention); the decay uses ``x_{t-1}``, applied before the Adam
    step. Defaults: Adam's, and ``weight_decay = 1e-5`` in the paper's unscaled
    convention: the per-step decay of torch's published defaults
    (torch.optim.AdamW: ``lr = 1e-3``, ``weight_decay = 1e-2``, decay
    ``lr * weight_decay = 1e-5`` per step). The paper gives no single value
    (it normalises the decay by the run length); taking torch's ``1e-2``
    unscaled would decay 1e-2 per step, 1000x torch's default. With
    ``decay_scaled_by_lr = true`` the same effective default is
    ``weight_decay = 1e-2`` (``torch_preset``). The effective decay per step
    must be < 1 (else ``x`` changes sign or vanishes in one step).
    Note: with ``weight_decay > 0`` the fixed point is not the minimiser of f.
    torch: ``AdamW(lr, betas, eps, weight_decay)`` (decay ``lr * weight_decay``).
    """

    #: torch.optim.AdamW's published defaults (lr, weight_decay): their product is the decay per step
    TORCH_DEFAULT_LR: ClassVar[float] = 1e-3
    TORCH_DEFAULT_WEIGHT_DECAY: ClassVar[float] = 1e-2

    name = "adamw"
    paper = "Loshchilov & Hutter (2019), Decoupled weight decay regularization, ICLR"
    torch_class = "AdamW"
    torch_convention = {"decay_scaled_by_lr": True}
    torch_preset = {"decay_scaled_by_lr": True, "weight_decay": TORCH_DEFAULT_WEIGHT_DECAY}
    seeks_minimiser = False  # the decay term moves the fixed point off the minimiser of f

    def __init__(
        self,
        lr: float = 1e-3,
        beta1: float = 0.9,
        beta2: float = 0.999,
        eps: float = 1e-8,
        weight_decay: float = 1e-5,
        decay_scaled_by_lr: bool = False,
    ) -> None:
        super().__init__(lr, beta1, beta2, eps)
        self.weight_decay = _nonneg("weight_decay", weight_decay)
        self.decay_scaled_by_lr = _flag("decay_scaled_by_lr", decay_scaled_by_lr)
        per_step = self.weight_decay * (self.lr if self.decay_scaled_by_lr else 1.0)
        if not per_step < 1.0:
            what = "lr * weight_decay" if self.decay_scaled_by_lr else "weight_decay"
            raise ValueError(f"the decay per step ({what} = {per_step!r}) must be < 1")

    @classmethod
    def _torch_kwargs(cls, hp: dict[str, Any]) -> dict[str, Any]:
        return {**Adam._torch_kwargs(hp), "weight_decay": hp["weight_decay"]}

    def step(self, x: np.ndarray, g: np.ndarray, state: dict[str, Any]) -> tuple[np.ndarray, dict[str, Any]]:
        lam = self.weight_decay * (self.lr if self.decay_scaled_by_lr else 1.0)
        if lam:
            np.multiply(x, 1.0 - lam, out=x)
        t = self._moments(g, state)
        self._apply(x, state["V"], t, state)
        return x, state


class AMSGrad(Adam):
    """AMSGrad (Reddi, Kale & Kumar 2018, Algorithm 2).

    Adam's moments, then ``vmax_t = max(vmax_{t-1}, v_t)`` and
    ``x <- x - lr m_t / (sqrt(vmax_t) + eps)``: no bias correction in the
    paper (from memory; the paper also has no eps, here ``1e-8`` outside the
    root to keep 0/0 away, common practice). ``bias_correction = true`` is
    torch's ``Adam(amsgrad=True)``: ``x <- x - lr (m_t/c1) / (sqrt(vmax_t/c2) + eps)``.
    Defaults: Adam's (``lr = 1e-3``, ``0.9``, ``0.999``).
    """

    name = "amsgrad"
    paper = "Reddi, Kale & Kumar (2018), On the convergence of Adam and beyond, ICLR"
    torch_class = "Adam"
    torch_convention = {"bias_correction": True}
    torch_preset = {"bias_correction": True}

    def __init__(
        self,
        lr: float = 1e-3,
        beta1: float = 0.9,
        beta2: float = 0.999,
        eps: float = 1e-8,
        bias_correction: bool = False,
    ) -> None:
        super().__init__(lr, beta1, beta2, eps)
        self.bias_correction = _flag("bias_correction", bias_correction)

    @classmethod
    def _torch_kwargs(cls, hp: dict[str, Any]) -> dict[str, Any]:
        return {**Adam._torch_kwargs(hp), "amsgrad": True}

    def init(self, x0: np.ndarray) -> dict[str, Any]:
        state = super().init(x0)
        state["vmax"] = np.zeros_like(x0)
        return state

    def step(self, x: np.ndarray, g: np.ndarray, state: dict[str, Any]) -> tuple[np.ndarray, dict[str, Any]]:
        t = self._moments(g, state)
        vmax = state["vmax"]
        np.maximum(vmax, state["V"], out=vmax)  # the scaling 1/(1-b2) commutes with max
        self._apply(x, vmax, t, state, bias=self.bias_correction)
        return x, state


class Adamax(Rule):
    """Adamax (Kingma & Ba 2015, Algorithm 2: Adam with the infinity norm).

    ``m_t = b1 m + (1 - b1) g``, ``u_t = max(b2 u_{t-1}, |g_t| + eps)``,
    ``x <- x - (lr / (1 - b1^t)) m_t / u_t``. The paper has no eps
    (``eps = 0``; a coordinate whose gradients were all exactly 0 has
    ``m = u = 0`` and does not move: 0/0 is read as 0). torch adds eps to
    ``|g|`` inside the max (``eps = 1e-8``). Defaults: ``lr = 2e-3``,
    ``beta1 = 0.9``, ``beta2 = 0.999`` (the paper, section 7.1, from memory).
    torch: ``Adamax(lr, betas, eps)``.
    """

    name = "adamax"
    paper = "Kingma & Ba (2015), Adam: a method for stochastic optimization, ICLR (section 7.1)"
    torch_class = "Adamax"
    torch_preset = {"eps": 1e-8}

    def __init__(self, lr: float = 2e-3, beta1: float = 0.9, beta2: float = 0.999, eps: float = 0.0) -> None:
        self.lr = _positive("lr", lr)
        self.beta1 = _unit("beta1", beta1)
        self.beta2 = _unit("beta2", beta2)
        self.eps = _eps(eps, allow_zero=True)  # 0/0 is read as 0 in step (the paper's form)

    @classmethod
    def _torch_kwargs(cls, hp: dict[str, Any]) -> dict[str, Any]:
        return {"lr": hp["lr"], "betas": (hp["beta1"], hp["beta2"]), "eps": hp["eps"]}

    def init(self, x0: np.ndarray) -> dict[str, Any]:
        z = np.zeros_like
        return {"M": z(x0), "u": z(x0), "buf": np.empty_like(x0), "t": 0}

    def step(self, x: np.ndarray, g: np.ndarray, state: dict[str, Any]) -> tuple[np.ndarray, dict[str, Any]]:
        M, u, buf = state["M"], state["u"], state["buf"]  # M = m / (1 - b1)
        b1 = self.beta1
        t = state["t"] = state["t"] + 1
        np.multiply(M, b1, out=M)
        np.add(M, g, out=M)
        np.abs(g, out=buf)
        if self.eps:
            np.add(buf, self.eps, out=buf)
        np.multiply(u, self.beta2, out=u)
        np.maximum(u, buf, out=u)
        if self.eps:
            np.divide(M, u, out=buf)
        else:
            np.maximum(u, np.finfo(u.dtype).tiny, out=buf)
            np.divide(M, buf, out=buf)
        np.multiply(buf, -self.lr * (1.0 - b1) / (1.0 - b1**t), out=buf)
        np.add(x, buf, out=x)
        return x, state


class NAdam(Rule):
    """Nadam: Adam with Nesterov momentum (Dozat 2016).

    Momentum schedule ``mu_t = beta1 (1 - 0.5 * 0.96^(t * momentum_decay))``
    (``schedule = "dozat"``; ``momentum_decay = 0.004`` is Dozat's
    ``0.96^(t/250)``, from memory; torch's ``momentum_decay`` psi is the same
    parameter), or ``mu_t = beta1`` (``schedule = "constant"``, the simplified
    form). With ``P_t = prod_{i<=t} mu_i``:
    ``m_t = b1 m + (1 - b1) g``, ``v_t = b2 v + (1 - b2) g^2``,
    ``x <- x - lr [ (1 - mu_t) g / (1 - P_t) + mu_{t+1} m_t / (1 - P_{t+1}) ] / (sqrt(v_t / (1 - b2^t)) + eps)``.

    Defaults: ``lr = 2e-3``, ``beta1 = 0.9``, ``beta2 = 0.999``, ``eps = 1e-8``
    (as in torch and Keras; Dozat's experiments, from memory and uncertain).
    torch: ``NAdam(lr, betas, eps, momentum_decay)`` with ``schedule = "dozat"``;
    torch keeps the product ``P_t`` in its default dtype (float32 unless
    ``torch.set_default_dtype(torch.float64)``), which alone shifts iterates
    by ~1e-8 relative.
    """

    name = "nadam"
    paper = "Dozat (2016), Incorporating Nesterov momentum into Adam, ICLR workshop"
    torch_class = "NAdam"
    torch_convention = {"schedule": "dozat"}
    torch_preset = {"schedule": "dozat"}

    def __init__(
        self,
        lr: float = 2e-3,
        beta1: float = 0.9,
        beta2: float = 0.999,
        eps: float = 1e-8,
        momentum_decay: float = 4e-3,
        schedule: str = "dozat",
    ) -> None:
        self.lr = _positive("lr", lr)
        self.beta1 = _unit("beta1", beta1)
        self.beta2 = _unit("beta2", beta2)
        self.eps = _eps(eps)
        self.momentum_decay = _nonneg("momentum_decay", momentum_decay)
        self.schedule = _choice("schedule", schedule, ("dozat", "constant"))

    @classmethod
    def _torch_kwargs(cls, hp: dict[str, Any]) -> dict[str, Any]:
        return {
            "lr": hp["lr"],
            "betas": (hp["beta1"], hp["beta2"]),
            "eps": hp["eps"],
            "momentum_decay": hp["momentum_decay"],
        }

    def _mu(self, t: int) -> float:
        if self.schedule == "constant":
            return self.beta1
        return self.beta1 * (1.0 - 0.5 * 0.96 ** (t * self.momentum_decay))

    def init(self, x0: np.ndarray) -> dict[str, Any]:
        z = np.zeros_like
        e = np.empty_like
        return {"M": z(x0), "V": z(x0), "buf": e(x0), "num": e(x0), "t": 0, "P": 1.0, "ops": _Kernels(x0)}

    def step(self, x: np.ndarray, g: np.ndarray, state: dict[str, Any]) -> tuple[np.ndarray, dict[str, Any]]:
        M, V, buf, num, ops = state["M"], state["V"], state["buf"], state["num"], state["ops"]
        b1, b2 = self.beta1, self.beta2
        t = state["t"] = state["t"] + 1
        mu, mu_next = self._mu(t), self._mu(t + 1)
        P = state["P"] = state["P"] * mu
        P_next = P * mu_next
        np.multiply(M, b1, out=M)  # M = m / (1 - b1), V = v / (1 - b2) as in Adam
        np.add(M, g, out=M)
        np.multiply(g, g, out=buf)
        np.multiply(V, b2, out=V)
        np.add(V, buf, out=V)
        k = math.sqrt((1.0 - b2) / (1.0 - b2**t))  # sqrt(v_hat) = k sqrt(V)
        np.multiply(g, (1.0 - mu) / (1.0 - P), out=num)
        ops.axpy(mu_next * (1.0 - b1) / (1.0 - P_next), M, num)
        np.sqrt(V, out=buf)
        np.add(buf, self.eps / k, out=buf)
        np.divide(num, buf, out=num)
        ops.axpy(-self.lr / k, num, x)
        return x, state


#: built-in short name -> factory (the class)
BUILTIN_RULES: dict[str, type[Rule]] = {
    cls.name: cls
    for cls in (GD, HeavyBall, Nesterov, NesterovSC, AdaGrad, RMSProp, AdaDelta, Adam, AdamW, AMSGrad, Adamax, NAdam)
}

#: the rules ``benchsuite run`` uses when none is named: every built-in rule
#: whose defaults aim at the minimiser of f (AdamW's decoupled weight decay
#: converges elsewhere, so it could never reach a certified optimum)
DEFAULT_RULES: tuple[str, ...] = tuple(name for name, cls in BUILTIN_RULES.items() if cls.seeks_minimiser)


# -- torch.optim mapping ---------------------------------------------------------
@dataclass(frozen=True)
class TorchEquivalent:
    """A built-in rule configured to reproduce a torch.optim optimizer exactly.

    ``ours``: every hyperparameter of the built-in rule; ``torch_kwargs``:
    the keyword arguments of ``torch.optim.<torch_class>`` (besides params)
    giving the same iterates (up to round-off).
    """

    rule: str
    torch_class: str
    ours: dict[str, Any]
    torch_kwargs: dict[str, Any]


def torch_equivalent(name: str, **hyperparams: Any) -> TorchEquivalent:
    """The torch-matching configuration of built-in rule ``name``.

    Starts from the rule's published defaults, applies ``torch_preset`` (torch's
    conventions and torch's own default values), then ``hyperparams``.
    Raises ValueError if the result cannot be expressed in torch (e.g.
    ``rmsprop`` with ``eps_inside_sqrt=True``).
    """
    cls = BUILTIN_RULES[name]
    if cls.torch_class is None:
        raise ValueError(f"{name} has no torch.optim counterpart")
    ours = {**cls.defaults(), **cls.torch_preset, **hyperparams}
    return TorchEquivalent(name, cls.torch_class, ours, cls.torch_kwargs(ours))


#: one line per rule: torch class and what must be set (for docs and `benchsuite rules`)
TORCH_MAPPING: dict[str, str] = {
    "gd": "SGD(lr)",
    "heavy_ball": "SGD(lr, momentum, dampening)",
    "nesterov": "SGD(lr, momentum, nesterov=True) with schedule=constant",
    "nesterov_sc": "SGD(lr, momentum, nesterov=True)",
    "adagrad": "Adagrad(lr, lr_decay, eps, initial_accumulator_value=initial_accumulator)",
    "rmsprop": "RMSprop(lr, alpha=decay, eps) with eps_inside_sqrt=false, initial_mean_square=0; torch defaults lr=1e-2, decay=0.99",
    "adadelta": "Adadelta(lr, rho, eps) with accumulate_scaled_delta=false; torch default rho=0.9",
    "adam": "Adam(lr, betas=(beta1, beta2), eps)",
    "adamw": "AdamW(lr, betas, eps, weight_decay) with decay_scaled_by_lr=true",
    "amsgrad": "Adam(lr, betas, eps, amsgrad=True) with bias_correction=true",
    "adamax": "Adamax(lr, betas, eps) (eps inside the max; paper eps=0, torch 1e-8)",
    "nadam": "NAdam(lr, betas, eps, momentum_decay) with schedule=dozat (torch default dtype float64 for float64 equality)",
}
