"""Problem families: the built-in ones by short name, any other by import path.

A catalogue entry names its family either by a short name from
:data:`BUILTIN` or by an import path ``package.module:ClassName`` pointing at
a :class:`benchsuite.problem.Problem` subclass (the current directory is
importable). Modules are imported only when a family is used.

Family constructors take the entry's ``params`` as keyword arguments and raise
``ValueError`` with a short message for an impossible value; the catalogue
turns that into one line naming the file, the instance and the field.
"""

from __future__ import annotations

from benchsuite.errors import UserError

#: short family name -> "module:ClassName"
BUILTIN: dict[str, str] = {
    "quadratic": "benchsuite.families.quadratic:Quadratic",
    "least_squares": "benchsuite.families.least_squares:LeastSquares",
    "ridge": "benchsuite.families.least_squares:Ridge",
    "logistic": "benchsuite.families.logistic:Logistic",
    "softmax": "benchsuite.families.logistic:Softmax",
    "huber": "benchsuite.families.huber:Huber",
    "rosenbrock": "benchsuite.families.rosenbrock:Rosenbrock",
    "mgh": "benchsuite.families.mgh:MGH",
    "nist_strd": "benchsuite.families.nist:NistStrd",
    "longley": "benchsuite.families.longley:Longley",
    "logistic_sparse": "benchsuite.families.sparse:SparseLogistic",
    "ridge_sparse": "benchsuite.families.sparse:SparseRidge",
    "logistic_data": "benchsuite.families.data:LogisticData",
    "softmax_data": "benchsuite.families.data:SoftmaxData",
    "least_squares_data": "benchsuite.families.data:LeastSquaresData",
    "ridge_data": "benchsuite.families.data:RidgeData",
}


def resolve_family(name: str) -> type:
    """The Problem subclass for a short name or a ``module:attr`` import path."""
    from benchsuite.imports import load_object
    from benchsuite.problem import Problem

    target = BUILTIN.get(name)
    if target is None:
        if ":" not in name:
            known = ", ".join(sorted(BUILTIN))
            raise UserError(f"unknown family {name!r} (built-in: {known}; or give module:ClassName)")
        target = name
    cls = load_object(target, what="family")
    if not (isinstance(cls, type) and issubclass(cls, Problem)):
        raise UserError(f"family {name!r} -> {target} is not a benchsuite.problem.Problem subclass")
    return cls
