"""benchsuite: convex-optimization sanity benchmarks for first-order update rules.

The package is organised one module per concept; data flows one way::

    catalogue files -> problem -> certified optimum -> case run -> results table
                    -> gate / compare / report

Heavy dependencies (cvxpy, torch, matplotlib) are imported only where used, so
``import benchsuite`` and ``benchsuite --help`` stay fast.
"""

from __future__ import annotations

__version__ = "0.1.0"

__all__ = ["__version__", "run"]


def __getattr__(name: str):  # lazy: `import benchsuite` stays light
    if name == "run":
        from benchsuite.runner import run

        return run
    raise AttributeError(f"module 'benchsuite' has no attribute {name!r}")


def __dir__() -> list[str]:  # `run` is listed although it is imported only when first used
    return sorted({*globals(), *__all__})
