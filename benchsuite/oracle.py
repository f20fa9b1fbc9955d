"""Gradient oracles: the full gradient, or seeded minibatches of a finite sum.

The runner owns the sampling (a rule only sees the gradient it is handed, so
"SGD" is gradient descent fed minibatch gradients). Two oracles:

* ``"full"`` -- ``problem.grad(x)``; one gradient call costs ``n`` sample
  gradients (one epoch) on a finite sum.
* ``"minibatch"`` -- ``problem.minibatch_grad(x, idx)`` on ``B`` sample rows:
  *with replacement*, ``idx`` are ``B`` independent uniform draws from
  ``0..n-1``; *without replacement*, each epoch is a fresh random permutation
  of ``0..n-1`` cut into consecutive batches of ``B`` (the last batch of an
  epoch is smaller when ``B`` does not divide ``n``, so every epoch visits every
  row exactly once).

Sample-gradient evaluations are counted; ``epochs = samples / n``.

Determinism: the generator is ``numpy.random.default_rng`` seeded from the
pair (problem identity, seed) -- see :func:`sampling_rng`. The rule is *not*
part of the seed, so two rules run on the same problem with the same seed see
the same sequence of sample indices (common random numbers: a comparison of
two rules is not blurred by different draws).
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

__all__ = ["ORACLES", "OracleSpec", "Sampler", "gradient_function", "sampling_rng"]

ORACLES = ("full", "minibatch")


@dataclass(frozen=True)
class OracleSpec:
    """Which gradient the rule gets: ``kind`` full or minibatch of ``batch`` rows."""

    kind: str = "full"
    batch: int | None = None
    replace: bool = True

    def __post_init__(self) -> None:
        if self.kind not in ORACLES:
            raise ValueError(f"oracle must be one of {ORACLES}, got {self.kind!r}")
        if self.kind == "minibatch" and (self.batch is None or int(self.batch) != self.batch or self.batch < 1):
            raise ValueError(f"minibatch oracle needs a batch size >= 1, got {self.batch!r}")

    @property
    def stochastic(self) -> bool:
        return self.kind == "minibatch"

    def check(self, n_samples: int | None, where: str = "") -> None:
        """``ValueError`` when the oracle does not fit a problem with ``n_samples`` rows."""
        if self.kind == "full":
            return
        prefix = f"{where}: " if where else ""
        if n_samples is None:
            raise ValueError(f"{prefix}a minibatch oracle needs a finite-sum problem; this one is not")
        assert self.batch is not None
        if self.batch > n_samples:
            raise ValueError(f"{prefix}batch {self.batch} exceeds the number of samples n = {n_samples}")


def sampling_rng(problem_key: str, seed: int) -> np.random.Generator:
    """The sampling generator for one (problem, seed) pair.

    ``default_rng`` is seeded with ``[seed, w0, w1, w2, w3]`` where the ``w`` are
    four 32-bit words of ``sha256(problem_key)``: independent streams per
    problem, reproducible across processes and machines (no Python ``hash``).
    """
    digest = hashlib.sha256(problem_key.encode()).digest()
    words = [int.from_bytes(digest[i : i + 4], "little") for i in range(0, 16, 4)]
    return np.random.default_rng([int(seed), *words])


class Sampler:
    """Index batches for a minibatch oracle, counting sample gradients.

    ``next()`` returns the next index array; ``samples`` is the number of
    sample rows handed out so far.
    """

    __slots__ = ("n", "batch", "replace", "rng", "samples", "_perm", "_pos")

    def __init__(self, n: int, batch: int, replace: bool, rng: np.random.Generator) -> None:
        if not 1 <= batch <= n:
            raise ValueError(f"batch must be in 1..{n}, got {batch}")
        self.n = int(n)
        self.batch = int(batch)
        self.replace = bool(replace)
        self.rng = rng
        self.samples = 0
        self._perm = np.empty(0, dtype=np.intp)
        self._pos = self.n  # the first call draws the first epoch's permutation

    def next(self) -> np.ndarray:
        if self.replace:
            idx = self.rng.integers(0, self.n, size=self.batch)
        else:
            if self._pos >= self.n:
                self._perm = self.rng.permutation(self.n)
                self._pos = 0
            idx = self._perm[self._pos : self._pos + self.batch]
            self._pos += idx.size
        self.samples += idx.size
        return idx


def gradient_function(
    problem, spec: OracleSpec, problem_key: str, seed: int
) -> tuple[Callable[[np.ndarray], np.ndarray], Sampler | None]:
    """``grad(x)`` for the oracle, and its sampler (``None`` for the full gradient).

    The full oracle is the problem's own bound method (no wrapper: nothing is
    added to a timed loop); the minibatch oracle is a closure drawing the next
    batch and calling ``problem.minibatch_grad``.
    """
    if spec.kind == "full":
        return problem.grad, None
    spec.check(problem.n_samples)
    assert spec.batch is not None and problem.n_samples is not None
    sampler = Sampler(problem.n_samples, spec.batch, spec.replace, sampling_rng(problem_key, seed))
    draw = sampler.next
    mb = problem.minibatch_grad

    def grad(x: np.ndarray) -> np.ndarray:
        return mb(x, draw())

    return grad, sampler
