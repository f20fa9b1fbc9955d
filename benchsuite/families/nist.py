"""NIST StRD nonlinear least-squares problems, read from the standard file format.

``f(b) = sum_i r_i(b)**2`` with ``r_i = t(y_i) - model(x_i; b)``, where the
model and the response transform ``t`` (``y`` itself, or e.g. ``log(y)`` for
Nelson) come from the file's own ``Model:`` block, parsed into a safe
expression tree by :mod:`benchsuite.formula`. The Jacobian ``dr/db = -d model/d b``
is exact (forward-mode differentiation of the tree), so the gradient
``2 J^T r`` is exact too. ``f*`` is NIST's certified residual sum of squares
and ``b*`` the certified parameters (:meth:`NistStrd.published`).

These problems are not convex; L and mu are not derived. The certified
optimum is the one NIST publishes (computed by NIST in 128-bit arithmetic
from two starting points and confirmed with several algorithms).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from benchsuite.formula import BoundModel
from benchsuite.problem import Constants, Published, ResidualProblem, as_dtype
from benchsuite.strd import StrdDataset, read_strd, shipped_path


class NistStrd(ResidualProblem):
    """A NIST StRD nonlinear regression problem; parameters ``b1..bk``.

    Parameters: ``dataset`` (a shipped dataset name such as ``"Misra1a"``,
    case-insensitive) or ``file`` (a path to any file of the StRD format),
    exactly one of them; ``start`` (1 or 2, the file's certified starting
    points); ``dtype`` (results are computed in float64 and returned in this
    precision). Dimension ``k`` (parameters), ``n_samples = m`` (observations);
    the residual and Jacobian code is vectorised over the observations.
    """

    family = "nist_strd"
    convex = False

    def __init__(
        self,
        dataset: str | None = None,
        file: str | None = None,
        start: int = 1,
        dtype: str = "float64",
    ) -> None:
        if (dataset is None) == (file is None):
            raise ValueError("give exactly one of 'dataset' (a shipped name) and 'file' (a path)")
        if isinstance(start, bool) or start not in (1, 2):
            raise ValueError(f"start must be 1 or 2, got {start!r}")
        path = shipped_path(dataset) if dataset is not None else Path(str(file))
        self.data: StrdDataset = read_strd(path)
        self.start = int(start)
        self.dtype = as_dtype(dtype)
        self.dim = self.data.k
        self.n_samples = self.data.n_obs
        self._x0 = self.data.start(self.start)
        self._t = self.data.response_value()
        self._model = BoundModel(self.data.model, self.data.columns())  # data-only subtrees folded once

    @classmethod
    def data_digest(cls, params: dict[str, Any]) -> str | None:
        """sha256 of the StRD file's bytes (a corrected or edited file is a new problem)."""
        import hashlib

        dataset, file = params.get("dataset"), params.get("file")
        try:
            path = shipped_path(dataset) if dataset is not None else Path(str(file))
            return hashlib.sha256(path.read_bytes()).hexdigest()
        except (OSError, ValueError):
            return None  # the constructor reports the bad path with its location

    @property
    def name(self) -> str:
        return self.data.name

    # -- residual form ----------------------------------------------------------
    def residuals(self, x: np.ndarray) -> np.ndarray:
        b = np.asarray(x, dtype=np.float64)
        r = self._t - self._model.evaluate(b)
        return r.astype(self.dtype, copy=False)

    def jacobian(self, x: np.ndarray) -> np.ndarray:
        b = np.asarray(x, dtype=np.float64)
        _, J = self._model.value_and_jacobian(b)
        return np.negative(J).astype(self.dtype, copy=False)

    def residuals_rows(self, x: np.ndarray, idx: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        b = np.asarray(x, dtype=np.float64)
        v, J = self._model.value_and_jacobian(b, idx)
        r = self._t[idx] - v
        return r.astype(self.dtype, copy=False), np.negative(J).astype(self.dtype, copy=False)

    def value_and_grad(self, x: np.ndarray, out: np.ndarray | None = None) -> tuple[float, np.ndarray]:
        b = np.asarray(x, dtype=np.float64)
        v, J = self._model.value_and_jacobian(b)
        r = self._t - v
        g = (-2.0 * (J.T @ r)).astype(self.dtype, copy=False)
        if out is not None:
            out[...] = g
            g = out
        return float(r @ r), g

    def grad(self, x: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        return self.value_and_grad(x, out=out)[1]

    def initial_point(self) -> np.ndarray:
        return self._x0.astype(self.dtype, copy=True)

    # -- what is known ------------------------------------------------------------
    def constants(self) -> Constants:
        return Constants(note="non-convex nonlinear least squares: L and mu not derived (the Hessian varies with b)")

    def published(self) -> Published:
        """The certified parameters and RSS as printed in the file.

        The note flags a file whose certified parameters do not give its
        certified RSS: ``f(b_cert) > 2 RSS + 1e-18 sum t(y)^2`` (the absolute
        term covers an RSS at round-off level, as Lanczos1's 1.4e-25, where
        parameters printed to 11 digits cannot reproduce it). The
        Roszman1 copy we received tripped it (b1 = 1.20196866396 for NIST's
        0.20196866396; see data/strd/ERRATA.md).
        """
        d = self.data
        note = (
            f"certified values from {Path(d.path).name}; f = residual sum of squares "
            f"(residual SD {d.residual_sd:.10E}, {d.n_obs} observations)"
        )
        r = self._t - d.model_value(np.array(d.certified))
        f_cert = float(r @ r)
        if not f_cert <= 2.0 * d.rss + 1e-18 * float(self._t @ self._t):
            note += (
                f"; WARNING: the certified parameters give f = {f_cert:.6g}, not the certified "
                f"{d.rss:.6g}: the file's certified block is inconsistent (misprint?)"
            )
        return Published(f=d.rss, x=d.certified, source=f"NIST StRD {d.name}", note=note)

    def describe(self) -> dict[str, Any]:
        d = self.data
        return {
            "dataset": d.name,
            "start": self.start,
            "difficulty": d.difficulty,
            "model": f"{d.response_transform} = {d.formula}",
        }
