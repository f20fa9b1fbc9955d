"""Reader of NIST StRD nonlinear regression files, and the LRE measure.

The NIST Statistical Reference Datasets (StRD) for nonlinear regression are
plain-text files with labelled blocks (public domain; 18 of them ship in
``benchsuite/data/strd``). The reader finds each block by its header or
label, not by the line numbers the file announces (those are cross-checked
where present):

* ``Dataset Name:  Misra1a ...`` -- the name (else the file's stem);
* the ``Model:`` block -- ``k Parameters (b1 to bk)``, optional constant
  definitions such as ``pi = 3.14159...`` (Roszman1), and the model equation
  ``y = <formula>  +  e``, possibly continued over several lines (Hahn1,
  ENSO, Gauss1: the equation runs until the ``+ e`` error term or a blank
  line). The left-hand side may transform the response (``log[y] = ...`` in
  Nelson), so that the residual is ``log(y) - model``;
* the starting values / certified values table, one row per parameter:
  ``b1 = start1 start2 certified_value standard_deviation``;
* ``Residual Sum of Squares:``, ``Residual Standard Deviation:``,
  ``Degrees of Freedom:``, ``Number of Observations:``;
* the data block, headed by ``Data:`` followed by the column names
  (``y x`` or ``y x1 x2``; the first column is the response), one row per
  observation.

Any mistake in a file raises :class:`~benchsuite.errors.UserError` with one
line naming the file, the line and what is wrong.
"""

from __future__ import annotations

import functools
import re
from dataclasses import dataclass
from importlib import resources
from pathlib import Path

import numpy as np

from benchsuite.errors import UserError
from benchsuite.formula import Node, Var, evaluate, params_used, parse, to_text, value_and_jacobian, vars_used

__all__ = ["StrdDataset", "read_strd", "shipped_datasets", "shipped_path", "lre", "LRE_CAP"]

#: LRE is capped at 15 digits: float64 holds about 15.95 significant digits
LRE_CAP = 15.0


def lre(computed, certified):
    """Log relative error, the accuracy measure of the NIST StRD: correct significant digits.

    ``LRE = -log10(|c - t| / |t|)`` for a certified value ``t != 0`` and
    ``-log10(|c|)`` (log absolute error) when ``t == 0``, as NIST's StRD
    documentation and McCullough (1998, "Assessing the reliability of
    statistical software") define it (from memory). The result is capped at
    :data:`LRE_CAP` = 15 (also when ``c == t`` exactly) and floored at 0: a
    value that is not even within a factor of ten has no correct digit (a
    non-finite ``c`` scores 0 too). Works elementwise on arrays; returns a
    float for scalar input.
    """
    c = np.asarray(computed, dtype=np.float64)
    t = np.asarray(certified, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        err = np.where(t == 0, np.abs(c), np.abs(c - t) / np.where(t == 0, 1.0, np.abs(t)))
        digits = np.where(err == 0, LRE_CAP, -np.log10(err))
    digits = np.where(np.isfinite(c), np.clip(digits, 0.0, LRE_CAP), 0.0)
    return float(digits) if digits.ndim == 0 else digits


@dataclass(frozen=True, eq=False)
class StrdDataset:
    """One StRD nonlinear regression problem as read from its file.

    ``x`` has one column per predictor (in the order of ``predictors``), ``y``
    is the raw response; the model tree evaluates on :meth:`columns`. The
    residual of observation ``i`` is ``response_value()[i] - model(x_i; b)``,
    where ``response_value`` applies the left-hand side (``y`` or e.g.
    ``log(y)``). The arrays are read-only.
    """

    name: str
    path: str
    formula: str  # the model's right-hand side, as written (lines joined)
    model: Node
    response_transform: str  # the left-hand side, printed: "y" or e.g. "log(y)"
    response_tree: Node
    response_name: str
    predictors: tuple[str, ...]
    params: tuple[str, ...]  # ("b1", ..., "bk")
    start1: tuple[float, ...]
    start2: tuple[float, ...]
    certified: tuple[float, ...]
    certified_sd: tuple[float, ...]
    rss: float
    residual_sd: float
    dof: int  # as printed; NIST's Rat43 prints 9 although n - k = 11 (its residual SD uses 11)
    n_obs: int
    x: np.ndarray  # (m, p)
    y: np.ndarray  # (m,)
    constants: tuple[tuple[str, float], ...] = ()
    difficulty: str = ""  # "Lower" | "Average" | "Higher" where the file says so

    @property
    def k(self) -> int:
        return len(self.params)

    def start(self, which: int) -> np.ndarray:
        """Certified starting point 1 or 2."""
        if which not in (1, 2):
            raise ValueError(f"start must be 1 or 2, got {which!r}")
        return np.array(self.start1 if which == 1 else self.start2, dtype=np.float64)

    def columns(self, rows: np.ndarray | slice = slice(None)) -> dict[str, np.ndarray]:
        """Predictor columns by name (optionally only ``rows``), for formula evaluation."""
        return {n: self.x[rows, j] for j, n in enumerate(self.predictors)}

    def response_value(self, rows: np.ndarray | slice = slice(None)) -> np.ndarray:
        """The (transformed) response the model is fitted to: ``y`` or e.g. ``log(y)``."""
        y = self.y[rows]
        if isinstance(self.response_tree, Var):
            return np.array(y, dtype=np.float64)
        return evaluate(self.response_tree, np.zeros(0), {self.response_name: y})

    def model_value(self, b: np.ndarray, rows: np.ndarray | slice = slice(None)) -> np.ndarray:
        return evaluate(self.model, b, self.columns(rows))

    def model_and_jacobian(self, b: np.ndarray, rows: np.ndarray | slice = slice(None)) -> tuple[np.ndarray, np.ndarray]:
        """Model values and the exact Jacobian ``d model / d b`` (m, k)."""
        return value_and_jacobian(self.model, b, self.columns(rows))


# -- locating the blocks -------------------------------------------------------------
_NUMBER = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eEdD][-+]?\d+)?"
_NUM_RE = re.compile(_NUMBER + r"\Z")
_PARAMS_RE = re.compile(r"(\d+)\s+Parameters?\b", re.IGNORECASE)
_CONST_RE = re.compile(r"\s*([A-Za-z_]\w*)\s*=\s*(" + _NUMBER + r")\s*\Z")
_ROW_RE = re.compile(r"\s*(b\d+)\s*=(.*)\Z")
_DATA_HEADER_RE = re.compile(r"Data:\s+([A-Za-z]\w*(?:\s+[A-Za-z]\w*)*)\s*\Z")
_DATA_LINES_RE = re.compile(r"^\s*Data\s*\(lines\s+(\d+)\s+to\s+(\d+)\)", re.IGNORECASE)
_ERROR_TERM_RE = re.compile(r"\+\s*e\s*\Z")
_LABELS = {
    "rss": "Residual Sum of Squares:",
    "residual_sd": "Residual Standard Deviation:",
    "dof": "Degrees of Freedom:",
    "n_obs": "Number of Observations:",
}


def _number(text: str) -> float:
    """A StRD number (``1.5E-02``, ``1.20196866396E-0``, Fortran ``D`` exponents)."""
    t = text.strip()
    if not _NUM_RE.match(t):
        raise ValueError(f"not a number: {t!r}")
    return float(t.replace("d", "e").replace("D", "e"))


class _Reader:
    def __init__(self, path: Path, text: str) -> None:
        self.path = path
        self.lines = [ln.rstrip() for ln in text.splitlines()]

    def error(self, lineno: int | None, what: str) -> UserError:
        where = f"{self.path}: line {lineno}" if lineno else f"{self.path}"
        return UserError(f"{where}: {what}")

    def find(self, prefix: str, start: int = 0) -> int | None:
        """0-based index of the first line (from ``start``) beginning with ``prefix``."""
        for i in range(start, len(self.lines)):
            if self.lines[i].lstrip().lower().startswith(prefix.lower()):
                return i
        return None

    # -- model block ---------------------------------------------------------
    def model_block(self) -> tuple[int, dict[str, float], str, Node, Node, str, int]:
        top = self.find("Model:")
        if top is None:
            raise self.error(None, "no 'Model:' block")
        end = len(self.lines)
        for i in range(top + 1, len(self.lines)):
            s = self.lines[i].strip().lower()
            if s.startswith("starting values") or s.startswith("certified values") or _ROW_RE.match(self.lines[i]):
                end = i
                break
        k = None
        k_line = top
        for i in range(top, end):
            m = _PARAMS_RE.search(self.lines[i])
            if m:
                k, k_line = int(m.group(1)), i
                break
        if k is None or k < 1:
            raise self.error(top + 1, "Model block: no 'k Parameters (b1 to bk)' line")
        constants: dict[str, float] = {}
        i = k_line + 1
        while i < end:
            line = self.lines[i]
            if not line.strip():
                i += 1
                continue
            m = _CONST_RE.match(line)
            if m and m.group(1) not in ("y",):
                constants[m.group(1)] = _number(m.group(2))
                i += 1
                continue
            if "=" not in line:
                raise self.error(i + 1, f"Model block: expected the model equation 'y = ... + e', found {line.strip()!r}")
            return self.equation(i, end, constants, k)
        raise self.error(top + 1, "Model block: no model equation 'y = ... + e'")

    def equation(self, first: int, end: int, constants: dict[str, float], k: int):
        # join continuation lines until the error term "+ e" (or a blank line)
        pieces: list[tuple[int, int, str]] = []  # (line index, offset in joined text, text)
        joined = ""
        i = first
        while i < end and self.lines[i].strip():
            text = self.lines[i].strip()
            if pieces:
                joined += " "
            pieces.append((i, len(joined), text))
            joined += text
            i += 1
            if _ERROR_TERM_RE.search(joined):
                break
        lhs_text, rhs_text = joined.split("=", 1)
        rhs_offset = len(lhs_text) + 1
        m = _ERROR_TERM_RE.search(rhs_text)
        if m:
            rhs_text = rhs_text[: m.start()]
        # positions in messages refer to the stripped texts the messages quote
        rhs_offset += len(rhs_text) - len(rhs_text.lstrip())
        rhs_text = rhs_text.strip()
        lhs_text = lhs_text.strip()

        def line_of(pos: int) -> int:
            line = pieces[0][0]
            for idx, off, _ in pieces:
                if off <= pos:
                    line = idx
            return line + 1

        try:
            response = parse(lhs_text, constants, allow_response=True)
        except ValueError as exc:
            raise self.error(pieces[0][0] + 1, f"Model: cannot read the left-hand side {lhs_text!r}: {exc}") from None
        try:
            model = parse(rhs_text, constants)
        except ValueError as exc:
            pos = _position(str(exc))
            line = line_of(rhs_offset + pos) if pos is not None else pieces[0][0] + 1
            raise self.error(line, f"Model: cannot parse the formula {rhs_text!r}: {exc}") from None
        if params_used(response) or len(vars_used(response)) != 1:
            raise self.error(pieces[0][0] + 1, f"Model: the left-hand side {lhs_text!r} must be a function of the response alone")
        used = params_used(model)
        wanted = set(range(1, k + 1))
        if used != wanted:
            extra = sorted(used - wanted)
            missing = sorted(wanted - used)
            what = (
                f"uses b{extra[0]} but the file declares {k} parameters"
                if extra
                else f"does not use b{missing[0]} (declared {k} parameters)"
            )
            raise self.error(pieces[0][0] + 1, f"Model: the formula {what}")
        return first + 1, constants, rhs_text, model, response, lhs_text, k

    # -- certified values -----------------------------------------------------------
    def table(self, start: int, k: int):
        rows: list[tuple[int, str, list[float]]] = []
        for i in range(start, len(self.lines)):
            m = _ROW_RE.match(self.lines[i])
            if m:
                fields = m.group(2).split()
                try:
                    values = [_number(f) for f in fields]
                except ValueError as exc:
                    raise self.error(i + 1, f"parameter row {m.group(1)}: {exc}") from None
                if len(values) != 4:
                    raise self.error(
                        i + 1,
                        f"parameter row {m.group(1)}: expected 4 numbers (start 1, start 2, certified value, "
                        f"standard deviation), found {len(values)}",
                    )
                rows.append((i, m.group(1), values))
            elif rows:
                break
        if not rows:
            raise self.error(None, "no certified values block (rows 'b1 = start1 start2 certified sd')")
        names = [r[1] for r in rows]
        if names != [f"b{j}" for j in range(1, len(rows) + 1)]:
            raise self.error(rows[0][0] + 1, f"parameter rows must be b1..b{len(rows)} in order, found {' '.join(names)}")
        if len(rows) != k:
            raise self.error(rows[-1][0] + 1, f"{len(rows)} parameter rows but the Model block declares {k} parameters")
        return rows

    def label(self, key: str, start: int) -> tuple[int, float]:
        label = _LABELS[key]
        i = self.find(label, start)
        if i is None:
            raise self.error(None, f"no certified block: {label!r} not found")
        text = self.lines[i].lstrip()[len(label):]
        try:
            return i, _number(text)
        except ValueError:
            raise self.error(i + 1, f"{label} {text.strip()!r} is not a number") from None

    # -- data -------------------------------------------------------------------------
    def data(self, start: int) -> tuple[int, list[str], np.ndarray]:
        header = None
        for i in range(start, len(self.lines)):
            m = _DATA_HEADER_RE.match(self.lines[i].strip())
            if m:
                header = i
                names = m.group(1).split()
                break
        if header is None:
            raise self.error(None, "no data block (a line 'Data:  y  x' naming the columns)")
        rows: list[list[float]] = []
        for i in range(header + 1, len(self.lines)):
            fields = self.lines[i].split()
            if not fields:
                continue
            if len(fields) != len(names):
                raise self.error(i + 1, f"data row has {len(fields)} values, the header names {len(names)} columns ({' '.join(names)})")
            try:
                rows.append([_number(f) for f in fields])
            except ValueError as exc:
                raise self.error(i + 1, f"data row: {exc}") from None
        return header, names, np.array(rows, dtype=np.float64).reshape(len(rows), len(names))


def _position(message: str) -> int | None:
    m = re.search(r"at position (\d+)", message)
    return int(m.group(1)) if m else None


def _parse_file(path: Path, text: str) -> StrdDataset:
    r = _Reader(path, text)
    name_line = r.find("Dataset Name:")
    name = path.stem
    if name_line is not None:
        parts = r.lines[name_line].split(":", 1)[1].split()
        if parts:
            name = parts[0]
    eq_line, constants, formula, model, response, lhs, k = r.model_block()
    rows = r.table(eq_line, k)
    after = rows[-1][0] + 1
    found = {key: r.label(key, after) for key in _LABELS}
    for key in ("dof", "n_obs"):
        i, v = found[key]
        if v != int(v) or v < 1:
            raise r.error(i + 1, f"{_LABELS[key]} must be a positive whole number, got {v!r}")
    n_obs = int(found["n_obs"][1])
    dof = int(found["dof"][1])
    header, names, table = r.data(max(i for i, _ in found.values()) + 1)
    response_name, predictors = names[0], tuple(names[1:])
    if not predictors:
        raise r.error(header + 1, "the data block names no predictor column")
    if vars_used(response) != {response_name}:
        raise r.error(eq_line, f"Model: the left-hand side {lhs!r} does not use the response column {response_name!r}")
    unknown = sorted(vars_used(model) - set(predictors))
    if unknown:
        raise r.error(eq_line, f"Model: the formula uses {unknown[0]!r} but the data columns are {' '.join(names)}")
    if table.shape[0] != n_obs:
        raise r.error(found["n_obs"][0] + 1, f"Number of Observations is {n_obs} but the data block has {table.shape[0]} rows")
    for i, line in enumerate(r.lines[:header]):  # cross-check the announced data lines
        m = _DATA_LINES_RE.match(line)
        if m and int(m.group(2)) - int(m.group(1)) + 1 != n_obs:
            raise r.error(i + 1, f"announces data on lines {m.group(1)} to {m.group(2)} but there are {n_obs} observations")
    difficulty = ""
    for line in r.lines[: eq_line]:
        m = re.search(r"(Lower|Average|Higher)\s+Level of Difficulty", line, re.IGNORECASE)
        if m:
            difficulty = m.group(1).capitalize()
    x = np.ascontiguousarray(table[:, 1:])
    y = np.ascontiguousarray(table[:, 0])
    x.setflags(write=False)
    y.setflags(write=False)
    return StrdDataset(
        name=name,
        path=str(path),
        formula=formula,
        model=model,
        response_transform=to_text(response),
        response_tree=response,
        response_name=response_name,
        predictors=predictors,
        params=tuple(f"b{j}" for j in range(1, k + 1)),
        start1=tuple(v[0] for _, _, v in rows),
        start2=tuple(v[1] for _, _, v in rows),
        certified=tuple(v[2] for _, _, v in rows),
        certified_sd=tuple(v[3] for _, _, v in rows),
        rss=found["rss"][1],
        residual_sd=found["residual_sd"][1],
        dof=dof,
        n_obs=n_obs,
        x=x,
        y=y,
        constants=tuple(sorted(constants.items())),
        difficulty=difficulty,
    )


@functools.lru_cache(maxsize=64)
def _read_cached(path: str, mtime_ns: int, size: int) -> StrdDataset:
    p = Path(path)
    try:
        raw = p.read_bytes()
    except OSError as exc:
        raise UserError(f"{path}: cannot read StRD file: {exc.strerror}") from None
    return _parse_file(p, raw.decode("latin-1"))


def read_strd(path: str | Path) -> StrdDataset:
    """Read a NIST StRD nonlinear regression file; ``UserError`` naming file and line if malformed.

    Results are cached per (path, modification time, size): the dataset is
    immutable, so repeated builds of the same problem share it.
    """
    p = Path(path)
    try:
        st = p.stat()
    except OSError:
        raise UserError(f"{path}: StRD file not found") from None
    if not p.is_file():
        raise UserError(f"{path}: not a file")
    return _read_cached(str(p), st.st_mtime_ns, st.st_size)


def _data_dir():
    return resources.files("benchsuite") / "data" / "strd"


def shipped_datasets() -> tuple[str, ...]:
    """Names of the StRD files shipped with the package (e.g. ``"Misra1a"``)."""
    return tuple(sorted((p.name[:-4] for p in _data_dir().iterdir() if p.name.endswith(".dat")), key=str.lower))


def shipped_path(name: str) -> Path:
    """The package data file of a shipped dataset, matched case-insensitively."""
    for known in shipped_datasets():
        if known.lower() == str(name).lower():
            return Path(str(_data_dir() / f"{known}.dat"))
    raise ValueError(f"unknown NIST StRD dataset {name!r} (shipped: {', '.join(shipped_datasets())})")

