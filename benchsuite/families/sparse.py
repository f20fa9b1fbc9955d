"""Large sparse problems: seeded power-law CSR data, logistic and ridge regression at 1e5-1e7 unknowns.

Both families minimise an L2-regularised finite sum over the ``n`` rows ``a_i``
of a CSR matrix ``A`` (``n x d``)::

    logistic_sparse:  f(x) = (1/n) sum_i log(1 + exp(-y_i a_i.x)) + lam/2 ||x||^2,   y_i in {-1, +1}
    ridge_sparse:     f(x) = 1/(2n) ||A x - b||^2 + lam/2 ||x||^2

Data (:func:`power_law_rows`), generated from ``seed`` alone:

* row ``i`` has ``k_i = 1 + Poisson(row_nnz - 1)`` non-zeros (so about
  ``row_nnz`` on average, never an empty row);
* their columns are drawn from a continuous power law on ``[1, d + 1)`` with
  exponent ``zipf`` (inverse CDF, no array of length ``d`` needed), so column
  ``j`` is non-zero with frequency about ``(j + 1.5)^-zipf`` -- a few very
  common features and a long tail of rare ones, as in text or click data;
  repeated columns within a row are merged;
* values are standard normal and every row is scaled to unit Euclidean norm.

**Controlled condition.** Unit rows give ``||A||_2^2 <= ||A||_F^2 = n``, so
whatever the draw ``L <= 1/4 + lam`` (logistic, ``sigma' <= 1/4``) and
``L <= 1 + lam`` (ridge), while ``mu >= lam``: the condition number is at
most ``1 + 1/(4 lam)`` resp. ``1 + 1/lam``, set by ``lam``. The declared
constants are the tighter ``L = ||A||_2^2 / (4n) + lam`` (logistic) and
``||A||_2^2 / n + lam`` (ridge), with ``||A||_2`` from ``scipy.sparse.linalg.svds``
padded by ``1e-10`` relative (an upper bound), computed on first use, and
``mu = lam``: all **bounds** (for ridge with ``n < d``, ``mu = lam`` is exact
but is declared a bound, as svds does not show that ``A`` is rank deficient).

Labels: a seeded ground truth ``w`` (standard normal) gives margins ``z = A w``
scaled to standard deviation ``signal``; logistic labels are ``+1`` with
probability ``sigma(z_i)``, ridge targets ``b = z + noise * N(0, 1)``.

Memory: ``A`` and its transpose in CSR, 12 bytes per non-zero each (float64
values, int32 indices), ``A`` shared between the float64 copy and the working
one in float64; vectors of length ``n`` and ``d`` as scratch. A 1e6-unknown
instance with 1e7 non-zeros takes about 0.3 GB, a 1e7-unknown one with 3e7
about 1 GB, far from the 24 GiB of the reference machine, with room for the
rules' state (a few vectors of length ``d``).

The gradient avoids temporaries: the CSR products write into preallocated
buffers (:func:`csr_matvec_into`) and the elementwise work on the margins is
four in-place passes (see :meth:`benchsuite.families.logistic.Logistic.grad`).
Both families give the value of the Fenchel dual at the dual point matched to
``x`` (:meth:`duality_gap`), the certificate of the large-scale optimum route.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from benchsuite.families.least_squares import SquaredLoss, positive_int
from benchsuite.families.logistic import Logistic, _check_lam, spectral_norm
from benchsuite.problem import Constants, as_dtype

__all__ = ["SparseLogistic", "SparseRidge", "csr_matvec_into", "power_law_rows"]


def _kernel() -> Any:
    """scipy's C++ ``csr_matvec`` (``y += A x``), the kernel behind ``A @ x``; None if unavailable."""
    try:
        from scipy.sparse import _sparsetools

        return _sparsetools.csr_matvec
    except (ImportError, AttributeError):  # pragma: no cover - other scipy layouts
        return None


_CSR_MATVEC = _kernel()


def csr_matvec_into(A: Any, x: np.ndarray, out: np.ndarray, accumulate: bool = False) -> np.ndarray:
    """``out = A @ x`` (or ``out += A @ x`` with ``accumulate``) for a CSR ``A``, without temporaries.

    Calls the kernel ``A @ x`` itself uses, with ``out`` as its output, when
    the dtypes agree and the arrays are contiguous; otherwise falls back to
    ``A @ x`` (one temporary). Results are identical to ``A @ x`` either way
    (same kernel, same order of summation) apart from the accumulation.
    """
    fast = (_CSR_MATVEC is not None and A.format == "csr" and x.dtype == A.dtype == out.dtype
            and x.flags.c_contiguous and out.flags.c_contiguous and x.ndim == 1)
    if not fast:
        if accumulate:
            out += A @ x
        else:
            out[...] = A @ x
        return out
    if not accumulate:
        out.fill(0)
    _CSR_MATVEC(A.shape[0], A.shape[1], A.indptr, A.indices, A.data, x, out)
    return out


def power_law_columns(rng: np.random.Generator, size: int, d: int, zipf: float) -> np.ndarray:
    """``size`` column indices in ``[0, d)`` with density ``~ (j + 1.5)^-zipf`` (inverse CDF)."""
    u = rng.random(size)
    if zipf == 1.0:
        t = np.exp(u * np.log(d + 1.0))
    else:
        e = 1.0 - zipf
        t = (1.0 + u * ((d + 1.0) ** e - 1.0)) ** (1.0 / e)
    cols = t.astype(np.int64) - 1
    np.clip(cols, 0, d - 1, out=cols)  # t = d + 1 only by round-off
    return cols


def power_law_rows(rng: np.random.Generator, n: int, d: int, row_nnz: float, zipf: float) -> Any:
    """A seeded ``n x d`` CSR matrix with unit rows and power-law column frequencies (module docstring)."""
    import scipy.sparse as sp

    if not (np.isfinite(row_nnz) and 1 <= row_nnz <= d):
        raise ValueError(f"row_nnz must lie in [1, d], got {row_nnz!r}")
    if not (np.isfinite(zipf) and zipf >= 0):
        raise ValueError(f"zipf must be >= 0, got {zipf!r}")
    counts = 1 + rng.poisson(row_nnz - 1.0, size=n)
    np.minimum(counts, d, out=counts)
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(counts, out=indptr[1:])
    nnz = int(indptr[-1])
    index = np.int32 if max(nnz, d) < 2**31 - 1 else np.int64
    cols = power_law_columns(rng, nnz, d, zipf).astype(index)
    vals = rng.standard_normal(nnz)
    A = sp.csr_matrix((vals, cols, indptr.astype(index)), shape=(n, d))
    del vals, cols
    A.sum_duplicates()  # sorts each row's columns and merges repeats
    sq = np.add.reduceat(A.data**2, A.indptr[:-1]) if A.nnz else np.zeros(n)
    norms = np.sqrt(sq)
    norms[norms == 0] = 1.0  # merged repeats cancelling exactly: leave the row at zero
    A.data /= np.repeat(norms, np.diff(A.indptr))
    return A


def _check_size(n: Any, d: Any) -> tuple[int, int]:
    n, d = positive_int("n", n), positive_int("d", d)
    if n * 1.0 * d < 1:
        raise ValueError("empty problem")
    return n, d


class SparseLogistic(Logistic):
    """Binary logistic regression with L2 on a large seeded power-law CSR design (module docstring).

    Parameters: ``n`` samples, ``d`` features, ``lam > 0``, ``row_nnz`` (mean
    non-zeros per row, ``1 <= row_nnz <= d``), ``zipf >= 0`` (power-law
    exponent of the feature frequencies), ``signal > 0`` (margin scale of the
    ground truth), ``seed``, ``dtype``. ``L = ||A||_2^2/(4n) + lam <= 1/4 + lam``
    (bound, svds), ``mu = lam`` (bound). Inherits the oracle, ``hessp`` and the
    entropy dual of :class:`~benchsuite.families.logistic.Logistic`.
    """

    family = "logistic_sparse"
    convex = True

    def __init__(
        self,
        n: int = 10000,
        d: int = 100000,
        lam: float = 1e-4,
        row_nnz: float = 20.0,
        zipf: float = 1.0,
        signal: float = 3.0,
        seed: int = 0,
        dtype: str = "float64",
    ) -> None:
        as_dtype(dtype)  # fail before generating any data
        n, d = _check_size(n, d)
        lam = _check_lam(lam)
        if not (np.isfinite(signal) and signal > 0):
            raise ValueError(f"signal must be > 0, got {signal!r}")
        rng = np.random.default_rng(int(seed))
        A = power_law_rows(rng, n, d, row_nnz, zipf)
        z = A @ rng.standard_normal(d)
        sd = float(np.std(z))
        z *= signal / sd if sd > 0 else 1.0
        # y = +1 with probability sigma(z): a well-specified logistic model
        y = np.where(rng.random(n) < 1.0 / (1.0 + np.exp(-z)), 1.0, -1.0)
        self.seed = int(seed)
        self.w_true = None  # not kept: a vector of length d is memory the rules need more
        self._setup(A, y, lam, dtype,
                    {"sparse": True, "row_nnz": float(row_nnz), "zipf": float(zipf), "signal": float(signal)})

    def describe(self) -> dict[str, Any]:
        out = dict(self._params, lam=self.lam, nnz=int(self.A.nnz))
        out["nnz_density"] = self.A.nnz / (self.n_samples * self.dim)
        return out


class SparseRidge(SquaredLoss):
    """Ridge regression ``1/(2n) ||A x - b||^2 + lam/2 ||x||^2`` on a seeded power-law CSR design.

    Parameters: ``n`` rows, ``d`` unknowns, ``lam > 0``, ``row_nnz``, ``zipf``,
    ``noise >= 0`` (standard deviation of the noise in ``b``), ``signal > 0``
    (standard deviation of the noiseless ``A w``), ``seed``, ``dtype``.
    ``L = ||A||_2^2 / n + lam <= 1 + lam`` (bound, svds), ``mu = lam`` (bound).
    Certification: the Fenchel dual is a concave quadratic with the closed-form
    dual point ``alpha = b - A x`` (:meth:`duality_gap`).
    """

    family = "ridge_sparse"
    convex = True

    def __init__(
        self,
        n: int = 10000,
        d: int = 100000,
        lam: float = 1e-4,
        row_nnz: float = 20.0,
        zipf: float = 1.0,
        noise: float = 0.1,
        signal: float = 1.0,
        seed: int = 0,
        dtype: str = "float64",
    ) -> None:
        as_dtype(dtype)
        n, d = _check_size(n, d)
        if not (np.isfinite(lam) and lam > 0):
            raise ValueError(f"lam must be > 0, got {lam!r}")
        if not (np.isfinite(noise) and noise >= 0):
            raise ValueError(f"noise must be >= 0, got {noise!r}")
        if not (np.isfinite(signal) and signal > 0):
            raise ValueError(f"signal must be > 0, got {signal!r}")
        rng = np.random.default_rng(int(seed))
        A = power_law_rows(rng, n, d, row_nnz, zipf)
        z = A @ rng.standard_normal(d)
        sd = float(np.std(z))
        z *= signal / sd if sd > 0 else 1.0
        b = z + noise * rng.standard_normal(n)
        self.seed = int(seed)
        self.lam, self.noise, self.signal = float(lam), float(noise), float(signal)
        self.row_nnz, self.zipf = float(row_nnz), float(zipf)
        self.dtype = as_dtype(dtype)
        self.n_samples, self.dim = n, d
        self.A64, self.b64 = A, b
        self.A = A if self.dtype == np.float64 else A.astype(self.dtype)
        self.At = self.A.T.tocsr()
        self.b = b.astype(self.dtype, copy=False)
        self._inv_n = 1.0 / n
        self._r = np.empty(n, dtype=self.dtype)
        self._s = np.empty(n, dtype=self.dtype)
        self._t = np.empty(d, dtype=self.dtype)
        self._norm_A: float | None = None

    @property
    def norm_A(self) -> float:
        """``||A||_2`` (svds, padded to an upper bound), computed on first use."""
        if self._norm_A is None:
            self._norm_A = spectral_norm(self.A64)
        return self._norm_A

    # -- oracle -------------------------------------------------------------
    def _res(self, x: np.ndarray) -> np.ndarray:
        r = csr_matvec_into(self.A, x, self._r)
        return np.subtract(r, self.b, out=r)

    def _grad_from(self, x: np.ndarray, r: np.ndarray, out: np.ndarray | None) -> np.ndarray:
        if out is None:
            out = np.empty(self.dim, dtype=self.dtype)
        s = np.multiply(r, self._inv_n, out=self._s)
        np.multiply(x, self.lam, out=out)
        return csr_matvec_into(self.At, s, out, accumulate=True)

    def constants(self) -> Constants:
        return Constants(
            L=self.norm_A**2 / self.n_samples + self.lam, mu=self.lam, L_kind="bound", mu_kind="bound",
            note="L <= ||A||_2^2/n + lam (||A||_2 by svds, padded; <= 1 + lam for unit rows); mu >= lam",
        )

    def describe(self) -> dict[str, Any]:
        return {"lam": self.lam, "row_nnz": self.row_nnz, "zipf": self.zipf, "noise": self.noise,
                "signal": self.signal, "nnz": int(self.A.nnz), "nnz_density": self.A.nnz / (self.n_samples * self.dim)}


def ridge_dual(A: Any, b: np.ndarray, lam: float, x: np.ndarray) -> tuple[float, float, np.ndarray]:
    """Primal value, Fenchel dual value and the dual's primal point for ridge regression.

    With ``phi_i(z) = (z - b_i)^2 / 2`` (conjugate ``phi_i*(u) = u^2/2 + u b_i``)
    the Fenchel dual of ``P(x) = (1/n) sum_i phi_i(a_i.x) + lam/2 ||x||^2`` is::

        D(alpha) = (1/n) (b.alpha - ||alpha||^2 / 2) - lam/2 ||w(alpha)||^2,   w(alpha) = A^T alpha / (lam n)

    a concave quadratic; weak duality gives ``D(alpha) <= P* <= P(x)`` for any
    ``alpha``, so ``P(x) - D(alpha)`` bounds ``P(x) - P*``. The dual point matched
    to ``x`` is ``alpha = b - A x`` (``alpha_i = -phi_i'(a_i.x)``); at the optimum
    ``w(alpha*) = x*`` and the gap is 0.
    """
    n = A.shape[0]
    alpha = b - A @ x
    primal = 0.5 * float(alpha @ alpha) / n + 0.5 * lam * float(x @ x)
    w = (A.T @ alpha) / (lam * n)
    dual = (float(b @ alpha) - 0.5 * float(alpha @ alpha)) / n - 0.5 * lam * float(w @ w)
    return primal, dual, w
