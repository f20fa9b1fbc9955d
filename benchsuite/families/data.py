"""Problems on real data: a user's data file, or a data set that ships inside scikit-learn.

Four families, the objectives of their generated counterparts on data read
from ``file`` (SVM-light, CSV, Parquet or ``.npz``: :mod:`benchsuite.datafiles`)
or from ``dataset``:

* ``logistic_data``: ``(1/n) sum_i log(1 + exp(-y_i a_i.x)) + lam/2 ||x||^2``,
  labels all in ``{-1, +1}`` or all in ``{0, 1}`` (mapped to ``{-1, +1}``);
  ``L <= ||A||_2^2/(4n) + lam``, ``mu >= lam`` (bounds, as
  :class:`~benchsuite.families.logistic.Logistic`);
* ``softmax_data``: multinomial regression over the integer labels (``K``
  classes in sorted order), ``L <= ||A||_2^2/(2n) + lam`` (Böhning),
  ``mu >= lam`` (bounds);
* ``least_squares_data``: ``1/(2n) ||A x - b||^2``; ``ridge_data``: plus
  ``lam/2 ||x||^2``. Dense data: ``L`` and ``mu`` are exact, the extreme
  eigenvalues ``s^2/n + lam`` of the Hessian from an SVD of ``A``, and
  ``closed_form()`` solves by ``lstsq`` (resp. Cholesky); sparse data:
  ``L = ||A||_2^2/n + lam`` (bound, svds), ``mu = lam`` (bound; least squares:
  unknown).

Parameters shared by all four: ``file`` (path, relative to the current
folder) or ``dataset`` -- exactly one; ``format`` (``"auto"`` by suffix, or
``svmlight``, ``csv``, ``parquet``, ``npz``); ``label`` (the label column of a
CSV or Parquet table, default ``"label"``); ``n_features`` (SVM-light width,
default the largest index); ``scale``: ``"none"`` (the file as given),
``"standardize"`` (dense only: every column centred and scaled to unit
standard deviation, constant columns left at 0) or ``"unit_rows"`` (every row
scaled to unit norm; dense or sparse); ``intercept`` (append a column of
ones, so the model has an intercept, regularised like the other weights);
``dtype``. The start point is ``x0 = 0``.

Shipped data sets (``dataset = "sklearn:NAME"``, read by scikit-learn's
loaders from files bundled in its package -- no network):

* ``sklearn:breast_cancer`` -- Breast Cancer Wisconsin (Diagnostic), UCI
  (Street, Wolberg & Mangasarian 1993); 569 x 30, labels 0/1
  (``load_breast_cancer``, file ``sklearn/datasets/data/breast_cancer.csv``);
* ``sklearn:digits`` -- Optical Recognition of Handwritten Digits, UCI (test
  part, Alpaydin & Kaynak 1998); 1797 x 64 pixels in 0..16, 10 classes
  (``load_digits``, ``digits.csv.gz``);
* ``sklearn:diabetes`` -- Efron, Hastie, Johnstone & Tibshirani (2004), Least
  Angle Regression; 442 x 10 raw (unscaled) features, disease progression
  after one year (``load_diabetes(scaled=False)``, ``diabetes_data_raw.csv.gz``
  and ``diabetes_target.csv.gz``).

scikit-learn is needed only for these (a one-line error names the missing
package). :meth:`data_digest` hashes the bytes of the file, or of the bundled
files of a shipped data set (located without importing scikit-learn), so an
edited file is a new problem.
"""

from __future__ import annotations

import hashlib
from typing import Any

import numpy as np

from benchsuite.datafiles import DataSet, file_digest, labels_for, read_data
from benchsuite.families.least_squares import SquaredLoss
from benchsuite.families.logistic import Logistic, Softmax, _check_lam, spectral_norm
from benchsuite.problem import Constants, as_dtype

__all__ = ["DATASETS", "LeastSquaresData", "LogisticData", "RidgeData", "SoftmaxData", "load_design"]

#: shipped data set -> (scikit-learn loader, bundled files under sklearn/datasets/data, source)
DATASETS: dict[str, tuple[str, tuple[str, ...], str]] = {
    "sklearn:breast_cancer": ("load_breast_cancer", ("breast_cancer.csv",),
                              "Breast Cancer Wisconsin (Diagnostic), UCI; scikit-learn load_breast_cancer"),
    "sklearn:digits": ("load_digits", ("digits.csv.gz",),
                       "Optical Recognition of Handwritten Digits, UCI; scikit-learn load_digits"),
    "sklearn:diabetes": ("load_diabetes", ("diabetes_data_raw.csv.gz", "diabetes_target.csv.gz"),
                         "Efron et al. (2004) diabetes data; scikit-learn load_diabetes(scaled=False)"),
}
SCALES = ("none", "standardize", "unit_rows")


def _bundled_files(dataset: str) -> list[str]:
    """Paths of a shipped data set's files inside the installed scikit-learn (nothing imported)."""
    import importlib.util
    import os

    spec = importlib.util.find_spec("sklearn")
    if spec is None or not spec.submodule_search_locations:
        raise ValueError(f"dataset {dataset!r} needs scikit-learn, which is not installed (pip install scikit-learn)")
    root = list(spec.submodule_search_locations)[0]
    return [os.path.join(root, "datasets", "data", f) for f in DATASETS[dataset][1]]


def _load_shipped(dataset: str) -> DataSet:
    _bundled_files(dataset)  # the one-line error when scikit-learn is missing
    import sklearn.datasets as skd

    loader, _files, source = DATASETS[dataset]
    kwargs = {"scaled": False} if loader == "load_diabetes" else {}
    X, y = getattr(skd, loader)(return_X_y=True, **kwargs)
    X = np.ascontiguousarray(X, dtype=np.float64)
    return DataSet(X, np.asarray(y, dtype=np.float64), f"{dataset} ({source})", np.arange(1, len(y) + 1), "row")


def _check_source(file: str | None, dataset: str | None) -> None:
    if (file is None) == (dataset is None):
        raise ValueError("give exactly one of 'file' (a path) and 'dataset' (one of " + ", ".join(DATASETS) + ")")
    if dataset is not None and dataset not in DATASETS:
        raise ValueError(f"unknown dataset {dataset!r} (one of {', '.join(DATASETS)})")


def load_design(
    file: str | None, dataset: str | None, format: str, label: str, n_features: int | None,
    scale: str, intercept: bool,
) -> tuple[Any, DataSet]:
    """The design matrix after ``scale`` and ``intercept``, and the data set it came from."""
    import scipy.sparse as sp

    _check_source(file, dataset)
    if scale not in SCALES:
        raise ValueError(f"scale must be one of {', '.join(SCALES)}, got {scale!r}")
    if n_features is not None and (isinstance(n_features, bool) or int(n_features) != n_features or n_features < 1):
        raise ValueError(f"n_features must be a positive integer, got {n_features!r}")
    ds = _load_shipped(dataset) if dataset is not None else read_data(file, format, label, n_features)
    X = ds.X
    if scale == "standardize":
        if sp.issparse(X):
            raise ValueError("scale = 'standardize' would make sparse data dense; use 'unit_rows' or 'none'")
        sd = X.std(axis=0)
        X = (X - X.mean(axis=0)) / np.where(sd > 0, sd, 1.0)
    elif scale == "unit_rows":
        if sp.issparse(X):
            X = X.tocsr(copy=True)
            norms = np.sqrt(np.asarray(X.multiply(X).sum(axis=1)).ravel())
            X.data /= np.repeat(np.where(norms > 0, norms, 1.0), np.diff(X.indptr))
        else:
            norms = np.linalg.norm(X, axis=1, keepdims=True)
            X = X / np.where(norms > 0, norms, 1.0)
    if intercept:
        ones = np.ones((X.shape[0], 1))
        X = sp.hstack([X, sp.csr_matrix(ones)], format="csr") if sp.issparse(X) else np.hstack([X, ones])
    if sp.issparse(X):
        X = X.tocsr()
        X.sum_duplicates()
    return X, ds


def _digest(params: dict[str, Any]) -> str | None:
    """sha256 over the data bytes: the file, or the shipped data set's bundled files."""
    file, dataset = params.get("file"), params.get("dataset")
    try:
        if file is not None and dataset is None:
            return file_digest(str(file))
        if dataset in DATASETS and file is None:
            h = hashlib.sha256(dataset.encode())
            for path in _bundled_files(dataset):
                h.update(file_digest(path).encode())
            return h.hexdigest()
    except (OSError, ValueError):
        return None  # the constructor reports the missing file or package with its location
    return None


class _DataMixin:
    """What the four families share: the data digest and the description."""

    _data_params: dict[str, Any]

    @classmethod
    def data_digest(cls, params: dict[str, Any]) -> str | None:
        return _digest(params)

    def _read(self, file: str | None, dataset: str | None, format: str, label: str, n_features: int | None,
              scale: str, intercept: bool, lam: float, dtype: str, kind: str) -> tuple[Any, np.ndarray, float]:
        """Check dtype and lam, read the design and its labels of ``kind`` (see :func:`labels_for`)."""
        as_dtype(dtype)
        lam = _check_lam(lam)
        X, ds = load_design(file, dataset, format, label, n_features, scale, intercept)
        y = labels_for(ds, kind)
        self.seed = 0
        self._describe_data(ds, X, scale=scale, intercept=bool(intercept))
        return X, y, lam

    def _describe_data(self, ds: DataSet, X: Any, **extra: Any) -> None:
        self.data_source = ds.source
        self._data_params = {"source": ds.source, "rows": int(X.shape[0]), "features": int(X.shape[1]), **extra}


class LogisticData(_DataMixin, Logistic):
    """Binary logistic regression with L2 on a user's file or a shipped data set (module docstring).

    Parameters: ``file`` | ``dataset``, ``format``, ``label``, ``n_features``,
    ``scale``, ``intercept``, ``lam > 0``, ``dtype``. ``L = ||A||_2^2/(4n) + lam``,
    ``mu = lam`` (bounds).
    """

    family = "logistic_data"

    def __init__(
        self, file: str | None = None, dataset: str | None = None, format: str = "auto", label: str = "label",
        n_features: int | None = None, scale: str = "none", intercept: bool = False, lam: float = 1e-3,
        dtype: str = "float64",
    ) -> None:
        X, y, lam = self._read(file, dataset, format, label, n_features, scale, intercept, lam, dtype, "binary")
        self._setup(X, y, lam, dtype, {"sparse": bool(self._is_sparse(X))})

    @staticmethod
    def _is_sparse(X: Any) -> bool:
        import scipy.sparse as sp

        return sp.issparse(X)

    def describe(self) -> dict[str, Any]:
        return {**self._data_params, "lam": self.lam}


class SoftmaxData(_DataMixin, Softmax):
    """Multinomial regression with L2 on a user's file or a shipped data set (module docstring).

    Parameters as :class:`LogisticData`. Labels must be integers; ``K`` is the
    number of distinct labels, ``dim = K x features``. ``L = ||A||_2^2/(2n) + lam``,
    ``mu = lam`` (bounds).
    """

    family = "softmax_data"

    def __init__(
        self, file: str | None = None, dataset: str | None = None, format: str = "auto", label: str = "label",
        n_features: int | None = None, scale: str = "none", intercept: bool = False, lam: float = 1e-3,
        dtype: str = "float64",
    ) -> None:
        X, labels, lam = self._read(file, dataset, format, label, n_features, scale, intercept, lam, dtype, "classes")
        self.scale_range, self.signal = 1.0, float("nan")
        self._setup(X, labels, int(labels.max()) + 1, lam, dtype)

    def describe(self) -> dict[str, Any]:
        return {**self._data_params, "K": self.K, "lam": self.lam}


class _LinearData(_DataMixin, SquaredLoss):
    """``1/(2n) ||A x - b||^2 + lam/2 ||x||^2`` on read data, dense (BLAS) or sparse (CSR kernel)."""

    #: dense designs up to this many columns get an SVD (exact L and mu) and a direct solve
    SVD_MAX_COLUMNS = 5000

    def _init(self, file: str | None, dataset: str | None, format: str, label: str, n_features: int | None,
              scale: str, intercept: bool, lam: float, dtype: str) -> None:
        import scipy.sparse as sp

        as_dtype(dtype)
        X, ds = load_design(file, dataset, format, label, n_features, scale, intercept)
        b = labels_for(ds, "real")
        self.seed = 0
        self._describe_data(ds, X, scale=scale, intercept=bool(intercept))
        self.dtype = as_dtype(dtype)
        self.lam = float(lam)
        self.sparse = sp.issparse(X)
        self.n_samples, self.dim = X.shape
        self.A64, self.b64 = X, b
        if self.sparse:
            self.A = X if self.dtype == np.float64 else X.astype(self.dtype)
            self.At = self.A.T.tocsr()
        else:
            self.A = np.ascontiguousarray(X, dtype=self.dtype)
            self.At = self.A.T
        self.b = b.astype(self.dtype)
        self._inv_n = 1.0 / self.n_samples
        self._r = np.empty(self.n_samples, dtype=self.dtype)
        self._s = np.empty(self.n_samples, dtype=self.dtype)
        self._t = np.empty(self.dim, dtype=self.dtype)
        self.singular_values: np.ndarray | None = None
        if not self.sparse and self.dim <= self.SVD_MAX_COLUMNS:
            s = np.linalg.svd(X, compute_uv=False)
            self.singular_values = np.concatenate([s, np.zeros(self.dim - s.size)])
        self._norm_A: float | None = None

    # -- oracle -------------------------------------------------------------
    def _res(self, x: np.ndarray) -> np.ndarray:
        if self.sparse:
            from benchsuite.families.sparse import csr_matvec_into

            r = csr_matvec_into(self.A, x, self._r)
        else:
            r = np.matmul(self.A, x, out=self._r)
        return np.subtract(r, self.b, out=r)

    def _grad_from(self, x: np.ndarray, r: np.ndarray, out: np.ndarray | None) -> np.ndarray:
        if out is None:
            out = np.empty(self.dim, dtype=self.dtype)
        if self.sparse:
            from benchsuite.families.sparse import csr_matvec_into

            s = np.multiply(r, self._inv_n, out=self._s)
            np.multiply(x, self.lam, out=out)
            return csr_matvec_into(self.At, s, out, accumulate=True)
        return self._finish(x, r, self.A, out)

    def constants(self) -> Constants:
        n, lam = self.n_samples, self.lam
        if self.singular_values is not None:
            s = self.singular_values
            return Constants(L=float(s[0] ** 2 / n + lam), mu=float(s[-1] ** 2 / n + lam), L_kind="exact",
                             mu_kind="exact", note="s_max^2/n + lam and s_min^2/n + lam from an SVD of A")
        if self._norm_A is None:
            self._norm_A = spectral_norm(self.A64)
        return Constants(L=self._norm_A**2 / n + lam, mu=lam if lam else None, L_kind="bound",
                         mu_kind="bound" if lam else "unknown",
                         note="L <= ||A||_2^2/n + lam (svds, padded); mu >= lam" if lam else
                         "L <= ||A||_2^2/n (svds, padded); mu not derived for sparse data")

    def describe(self) -> dict[str, Any]:
        return {**self._data_params, "lam": self.lam}


class LeastSquaresData(_LinearData):
    """Least squares ``1/(2n) ||A x - b||^2`` on read data (module docstring).

    Parameters: ``file`` | ``dataset``, ``format``, ``label``, ``n_features``,
    ``scale``, ``intercept``, ``dtype``. Dense: L and mu exact (SVD) and a
    ``lstsq`` closed form; sparse: L a bound, mu unknown.
    """

    family = "least_squares_data"

    def __init__(
        self, file: str | None = None, dataset: str | None = None, format: str = "auto", label: str = "label",
        n_features: int | None = None, scale: str = "none", intercept: bool = False, dtype: str = "float64",
    ) -> None:
        self._init(file, dataset, format, label, n_features, scale, intercept, 0.0, dtype)

    def closed_form(self) -> np.ndarray | None:
        if self.sparse or self.singular_values is None:
            return None
        from scipy.linalg import lstsq

        return lstsq(self.A64, self.b64)[0]


class RidgeData(_LinearData):
    """Ridge regression on read data (module docstring); ``lam > 0``.

    Dense: L and mu exact (SVD) and a Cholesky closed form of
    ``(A^T A + n lam I) x = A^T b``; sparse: L a bound (svds), mu = lam (bound).
    """

    family = "ridge_data"

    def __init__(
        self, file: str | None = None, dataset: str | None = None, format: str = "auto", label: str = "label",
        n_features: int | None = None, scale: str = "none", intercept: bool = False, lam: float = 1e-3,
        dtype: str = "float64",
    ) -> None:
        self._init(file, dataset, format, label, n_features, scale, intercept, _check_lam(lam), dtype)

    def closed_form(self) -> np.ndarray | None:
        if self.sparse or self.singular_values is None:
            return None
        from scipy.linalg import cho_factor, cho_solve

        H = self.A64.T @ self.A64
        H[np.diag_indices_from(H)] += self.n_samples * self.lam
        return cho_solve(cho_factor(H), self.A64.T @ self.b64)

