"""A user's data file as a design matrix and labels: SVM-light text, CSV, Parquet and ``.npz``.

Formats (``fmt="auto"`` picks by the file suffix):

* ``svmlight`` (``.svm``, ``.svmlight``, ``.libsvm``, ``.txt``): one sample per
  line, ``label index:value index:value ...``, indices starting at 1 and
  strictly increasing within a line, ``#`` starts a comment, a ``qid:`` pair is
  skipped, blank lines are ignored. Read by :func:`read_svmlight`, a streaming
  reader (one line at a time into growing arrays; no copy of the file in
  memory), into a CSR matrix;
* ``csv`` (``.csv``): a header row of column names, one numeric column is the
  label (``label``, default ``"label"``), the others are features. Parsed by
  pandas; a problem is then located by re-reading the file with the standard
  ``csv`` module, so the message names the physical line;
* ``parquet`` (``.parquet``, ``.pq``): the same table layout, read by pandas
  with pyarrow (an optional extra: ``pip install pyarrow``); rows are counted
  from 1 (Parquet has no lines);
* ``npz`` (``.npz``): arrays ``X`` (2-D, dense) and ``y``, or the CSR parts
  ``data``, ``indices``, ``indptr``, ``shape`` and ``y``; read with
  ``allow_pickle=False``.

Every problem with a file is a :class:`DataFileError` (a
:class:`~benchsuite.errors.UserError`: one line, exit code 2) naming the file
and the line (row, array): a truncated line, a non-numeric value, a feature
index <= 0, an empty file, and -- checked by :func:`labels_for` for the model
that uses them -- labels from mixed label sets.

:func:`file_digest` is the sha256 of the file's bytes: it enters the instance
hash, so an edited file is a new problem (new certified optimum, new baseline).
"""

from __future__ import annotations

import hashlib
import math
from array import array
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from benchsuite.errors import UserError

__all__ = ["FORMATS", "DataFileError", "DataSet", "file_digest", "labels_for", "read_data", "read_svmlight"]

#: suffix -> format
FORMATS: dict[str, str] = {
    ".svm": "svmlight", ".svmlight": "svmlight", ".libsvm": "svmlight", ".txt": "svmlight",
    ".csv": "csv", ".parquet": "parquet", ".pq": "parquet", ".npz": "npz",
}


class DataFileError(UserError):
    """A data file that cannot be used, with its location in the message."""


@dataclass(frozen=True)
class DataSet:
    """Features ``X`` (ndarray or scipy CSR, float64), labels ``y`` (float64) and where each row came from.

    ``rows[i]`` is the line (SVM-light, CSV) or row number (Parquet, 1-based)
    of sample ``i``, for messages; ``unit`` says which ("line" or "row").
    """

    X: Any
    y: np.ndarray
    source: str
    rows: np.ndarray
    unit: str = "line"

    @property
    def shape(self) -> tuple[int, int]:
        return tuple(self.X.shape)  # type: ignore[return-value]

    def where(self, i: int) -> str:
        """``"<file>: line N"`` for sample ``i``."""
        return f"{self.source}: {self.unit} {int(self.rows[i])}"


#: (resolved path, size, mtime_ns) -> digest: a run hashes an instance many times, a big file once.
#: Only files of at least _MEMO_BYTES are kept: mtime can stay put across two quick edits of a
#: small file (coarse filesystem clocks), and small files are cheap to hash again
_DIGESTS: dict[tuple[str, int, int], str] = {}
_MEMO_BYTES = 16 << 20


def file_digest(path: str | Path) -> str:
    """sha256 of the file's bytes, read in 1 MiB blocks (kept per process while size and mtime stay)."""
    import os

    st = os.stat(path)
    key = (os.path.realpath(path), st.st_size, st.st_mtime_ns)
    hit = _DIGESTS.get(key)
    if hit is not None:
        return hit
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    digest = h.hexdigest()
    if st.st_size >= _MEMO_BYTES:
        _DIGESTS[key] = digest
    return digest


def detect_format(path: str | Path, fmt: str = "auto") -> str:
    if fmt != "auto":
        if fmt not in set(FORMATS.values()):
            raise DataFileError(f"{path}: unknown format {fmt!r} (one of auto, {', '.join(sorted(set(FORMATS.values())))})")
        return fmt
    suffix = Path(path).suffix.lower()
    if suffix not in FORMATS:
        raise DataFileError(f"{path}: cannot tell the format from the suffix {suffix!r} "
                            f"(known: {', '.join(FORMATS)}); set params.format")
    return FORMATS[suffix]


def read_data(path: str | Path, fmt: str = "auto", label: str = "label", n_features: int | None = None) -> DataSet:
    """Read ``path`` in format ``fmt`` (see the module docstring); :class:`DataFileError` on any problem."""
    p = Path(path)
    if not p.is_file():
        raise DataFileError(f"{path}: data file not found")
    kind = detect_format(p, fmt)
    if kind == "svmlight":
        return read_svmlight(p, n_features=n_features)
    if kind == "npz":
        return _read_npz(p)
    return _read_table(p, kind, label)


# -- SVM-light ---------------------------------------------------------------------------
def _bad(path: Path, lineno: int, msg: str) -> DataFileError:
    return DataFileError(f"{path}: line {lineno}: {msg}")


def _show(tok: bytes) -> str:
    return repr(tok.decode("utf-8", "replace")[:40])


def read_svmlight(path: str | Path, n_features: int | None = None) -> DataSet:
    """Stream an SVM-light file into a CSR matrix (``n_features`` fixes the width; default: largest index)."""
    import scipy.sparse as sp

    p = Path(path)
    labels, rows = array("d"), array("q")
    indices, values, indptr = array("q"), array("d"), array("q", [0])
    with p.open("rb") as fh:
        lineno = 0
        for lineno, raw in enumerate(fh, 1):
            line = raw.split(b"#", 1)[0]
            toks = line.split()
            if not toks:
                continue
            try:
                lab = float(toks[0])
            except ValueError:
                raise _bad(p, lineno, f"non-numeric label {_show(toks[0])}") from None
            if not math.isfinite(lab):
                raise _bad(p, lineno, f"label {_show(toks[0])} is not finite")
            prev = 0
            for tok in toks[1:]:
                key, sep, val = tok.partition(b":")
                if not sep or not key or not val:
                    raise _bad(p, lineno, f"truncated or malformed pair {_show(tok)} (expected index:value)")
                if key == b"qid":
                    continue
                try:
                    j = int(key)
                except ValueError:
                    raise _bad(p, lineno, f"non-integer feature index {_show(key)}") from None
                if j <= 0:
                    raise _bad(p, lineno, f"feature index {j} <= 0 (SVM-light indices start at 1)")
                if j <= prev:
                    raise _bad(p, lineno, f"feature index {j} after {prev} (indices must increase within a line)")
                try:
                    v = float(val)
                except ValueError:
                    raise _bad(p, lineno, f"non-numeric value {_show(val)} for feature {j}") from None
                if not math.isfinite(v):
                    raise _bad(p, lineno, f"value {_show(val)} for feature {j} is not finite")
                prev = j
                indices.append(j - 1)
                values.append(v)
            labels.append(lab)
            rows.append(lineno)
            indptr.append(len(indices))
    if not labels:
        what = "empty file" if lineno == 0 else "no data lines (only blank or comment lines)"
        raise _bad(p, max(lineno, 1), what)
    idx = np.frombuffer(indices, dtype=np.int64) if len(indices) else np.zeros(0, dtype=np.int64)
    width = int(idx.max()) + 1 if idx.size else 1
    if n_features is not None:
        if idx.size and width > n_features:
            i = int(np.argmax(idx >= n_features))
            line = rows[int(np.searchsorted(np.frombuffer(indptr, dtype=np.int64), i, side="right")) - 1]
            raise _bad(p, line, f"feature index {int(idx[i]) + 1} > n_features = {n_features}")
        width = int(n_features)
    index = np.int32 if max(width, idx.size) < 2**31 - 1 else np.int64
    X = sp.csr_matrix((np.frombuffer(values, dtype=np.float64) if len(values) else np.zeros(0),
                       idx.astype(index), np.frombuffer(indptr, dtype=np.int64).astype(index)),
                      shape=(len(labels), width))
    return DataSet(X, np.frombuffer(labels, dtype=np.float64).copy(), str(path),
                   np.frombuffer(rows, dtype=np.int64).copy(), "line")


# -- CSV and Parquet -------------------------------------------------------------------------
def _csv_problem(path: Path, label: str) -> str | None:
    """The first problem of a CSV file, found with the standard csv module (exact line numbers)."""
    import csv

    with path.open(newline="", encoding="utf-8", errors="replace") as fh:
        reader = csv.reader(fh)
        header, data_seen = None, False
        for record in reader:
            if not record or all(not c.strip() for c in record):
                continue
            if header is None:
                header = [c.strip() for c in record]
                continue
            data_seen = True
            line = reader.line_num
            if len(record) != len(header):
                more = "truncated line?" if len(record) < len(header) else "extra values"
                return f"line {line}: {len(record)} fields, expected {len(header)} ({more})"
            for name, cell in zip(header, record):
                text = cell.strip()
                if not text:
                    return f"line {line}: column {name!r}: missing value (truncated line?)"
                try:
                    v = float(text)
                except ValueError:
                    return f"line {line}: column {name!r}: non-numeric value {text[:40]!r}"
                if not math.isfinite(v):
                    return f"line {line}: column {name!r}: value {text[:40]!r} is not finite"
        if header is None:
            return "line 1: empty file"
        if not data_seen:
            return f"line {reader.line_num + 1}: no data rows after the header"
    return None


def _csv_line_numbers(path: Path, n: int) -> np.ndarray:
    """Physical line of each data record (blank lines skipped, quoted newlines honoured)."""
    import csv

    out = np.empty(n, dtype=np.int64)
    k = -1
    with path.open(newline="", encoding="utf-8", errors="replace") as fh:
        reader = csv.reader(fh)
        for record in reader:
            if not record or all(not c.strip() for c in record):
                continue
            if k >= 0 and k < n:
                out[k] = reader.line_num
            k += 1
    return out


def _read_table(path: Path, kind: str, label: str) -> DataSet:
    import pandas as pd

    if kind == "csv":
        if path.stat().st_size == 0:
            raise DataFileError(f"{path}: line 1: empty file")
        try:
            df = pd.read_csv(path, skipinitialspace=True)
        except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError, ValueError) as exc:
            problem = _csv_problem(path, label)
            raise DataFileError(f"{path}: {problem or str(exc).splitlines()[0]}") from None
    else:
        try:
            import pyarrow  # noqa: F401
        except ImportError:
            raise DataFileError(f"{path}: reading Parquet needs pyarrow (pip install pyarrow)") from None
        try:
            df = pd.read_parquet(path)
        except Exception as exc:  # pyarrow raises its own error types for a damaged file
            raise DataFileError(f"{path}: row 1: not a readable Parquet file: {str(exc).splitlines()[0][:120]}") from None
    df.columns = [str(c).strip() for c in df.columns]
    if label not in df.columns:
        raise DataFileError(f"{path}: no label column {label!r} (columns: {', '.join(map(str, df.columns[:12]))}); "
                            "set params.label")
    if len(df) == 0:
        unit = "line 2" if kind == "csv" else "row 1"
        raise DataFileError(f"{path}: {unit}: no data rows")
    bad_row, bad_col, why = None, None, ""
    for col in df.columns:
        raw = df[col]
        num = pd.to_numeric(raw, errors="coerce")
        bad = num.isna() | ~np.isfinite(num.to_numpy(dtype=np.float64, na_value=np.nan))
        if bad.any():
            i = int(np.argmax(bad.to_numpy()))
            if bad_row is None or i < bad_row:
                bad_row, bad_col = i, col
                why = "missing value" if pd.isna(raw.iloc[i]) else f"non-numeric value {str(raw.iloc[i])[:40]!r}"
        df[col] = num
    if bad_row is not None:
        if kind == "csv":
            problem = _csv_problem(path, label)  # exact line and the first problem in file order
            raise DataFileError(f"{path}: {problem}" if problem else
                                f"{path}: row {bad_row + 1}: column {bad_col!r}: {why}")
        raise DataFileError(f"{path}: row {bad_row + 1}: column {bad_col!r}: {why}")
    y = df[label].to_numpy(dtype=np.float64)
    X = np.ascontiguousarray(df.drop(columns=[label]).to_numpy(dtype=np.float64))
    if X.shape[1] == 0:
        raise DataFileError(f"{path}: no feature columns besides the label {label!r}")
    rows = _csv_line_numbers(path, len(y)) if kind == "csv" else np.arange(1, len(y) + 1)
    return DataSet(X, y, str(path), rows, "line" if kind == "csv" else "row")


# -- npz -------------------------------------------------------------------------------------
def _read_npz(path: Path) -> DataSet:
    import scipy.sparse as sp

    try:
        with np.load(path, allow_pickle=False) as z:
            arrays = {k: z[k] for k in z.files}
    except Exception as exc:  # zipfile.BadZipFile, ValueError (pickled objects), OSError
        raise DataFileError(f"{path}: not a readable .npz file: {str(exc).splitlines()[0][:120]}") from None
    if "y" not in arrays:
        raise DataFileError(f"{path}: array 'y' (labels) missing (found: {', '.join(sorted(arrays)) or 'none'})")
    y = np.asarray(arrays["y"]).ravel()
    if "X" in arrays:
        X = np.asarray(arrays["X"])
        if X.ndim != 2:
            raise DataFileError(f"{path}: array 'X' must be 2-D, got shape {X.shape}")
    elif {"data", "indices", "indptr", "shape"} <= set(arrays):
        try:
            X = sp.csr_matrix((arrays["data"], arrays["indices"], arrays["indptr"]),
                              shape=tuple(int(s) for s in arrays["shape"]))
            X.check_format(full_check=True)
        except Exception as exc:
            raise DataFileError(f"{path}: arrays data/indices/indptr/shape are not a valid CSR matrix: {exc}") from None
    else:
        raise DataFileError(f"{path}: needs array 'X' or the CSR arrays data, indices, indptr, shape "
                            f"(found: {', '.join(sorted(arrays))})")
    if X.shape[0] != y.size:
        raise DataFileError(f"{path}: 'y' has {y.size} labels for {X.shape[0]} rows")
    if y.size == 0:
        raise DataFileError(f"{path}: array 'y': no data rows")
    for name, arr in (("y", y), ("X", X.data if sp.issparse(X) else X)):
        if not np.issubdtype(np.asarray(arr).dtype, np.number) or np.asarray(arr).dtype.kind == "c":
            raise DataFileError(f"{path}: array {name!r} is not real numeric (dtype {np.asarray(arr).dtype})")
        bad = ~np.isfinite(np.asarray(arr, dtype=np.float64))
        if bad.any():
            i = int(np.argmax(bad.ravel()))
            raise DataFileError(f"{path}: array {name!r}: non-finite value at flat position {i}")
    X = X.astype(np.float64) if sp.issparse(X) else np.ascontiguousarray(X, dtype=np.float64)
    return DataSet(X, y.astype(np.float64), str(path), np.arange(1, y.size + 1), "row")


# -- labels for a model --------------------------------------------------------------------------
def labels_for(ds: DataSet, kind: str) -> np.ndarray:
    """Labels checked and mapped for a model: ``"binary"``, ``"classes"`` or ``"real"``.

    * ``binary``: every label in ``{-1, +1}`` or every label in ``{0, 1}``
      (mapped to ``{-1, +1}``); a file mixing the two sets, or with any other
      value, is an error at the first line that breaks the set of the lines
      before it; a single class is an error too;
    * ``classes``: integer labels (any values), mapped to ``0..K-1`` in sorted
      order; at least two classes;
    * ``real``: any finite values.
    """
    y = ds.y
    if kind == "real":
        return y
    if kind == "classes":
        frac = y != np.round(y)
        if frac.any():
            i = int(np.argmax(frac))
            raise DataFileError(f"{ds.where(i)}: class label {float(y[i]):g} is not an integer")
        classes, mapped = np.unique(y, return_inverse=True)
        if classes.size < 2:
            raise DataFileError(f"{ds.source}: only one class ({classes[0]:g}) in the file: nothing to classify")
        return mapped.astype(np.int64)
    if kind != "binary":
        raise ValueError(f"unknown label kind {kind!r}")
    sets = ({-1.0, 1.0}, {0.0, 1.0})
    values, first = np.unique(y, return_index=True)
    order = np.argsort(first)  # distinct labels in the order they first appear
    seen: list[float] = []
    for k in order:
        v, i = float(values[k]), int(first[k])
        if not any(set(seen + [v]) <= s for s in sets):
            shown = ", ".join(f"{u:g} (first at {ds.unit} {int(ds.rows[int(first[np.searchsorted(values, u)])])})"
                              for u in seen)
            raise DataFileError(f"{ds.where(i)}: label {v:g} mixes label sets: binary labels are all in {{-1, +1}} "
                                f"or all in {{0, 1}}, and earlier {ds.unit}s have {shown}")
        seen.append(v)
    if len(seen) < 2:
        raise DataFileError(f"{ds.source}: only one class ({seen[0]:g}) in the file: nothing to classify")
    return np.where(y > 0, 1.0, -1.0)
