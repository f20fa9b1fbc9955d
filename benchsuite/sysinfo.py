"""Machine and tool metadata recorded with every run.

:func:`machine_info` gathers what a timing depends on: Python, numpy and
scipy versions, the BLAS libraries loaded and their thread counts
(``threadpoolctl.threadpool_info()``), the CPU model (``/proc/cpuinfo`` where
there is one, else :func:`platform.processor`), the number of cores and the
thread-related environment variables. :func:`git_info` says which commit of
the *user's* repository (the current directory) was measured and whether its
tree was dirty; ``None`` fields outside a git repository.
"""

from __future__ import annotations

import os
import platform
import subprocess
import sys
from pathlib import Path
from typing import Any

__all__ = ["cpu_model", "git_info", "machine_info"]

_THREAD_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "BLIS_NUM_THREADS")


def cpu_model() -> str:
    """The CPU model name (first ``model name`` line of /proc/cpuinfo when present)."""
    try:
        for line in Path("/proc/cpuinfo").read_text(encoding="utf-8", errors="replace").splitlines():
            if line.lower().startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine() or "unknown"


def git_info(cwd: str | Path | None = None) -> dict[str, Any]:
    """``{"commit": sha or None, "dirty": bool or None}`` for the repository at ``cwd``."""
    cwd = Path(cwd or os.getcwd())
    try:
        commit = subprocess.run(
            ["git", "rev-parse", "HEAD"], cwd=cwd, capture_output=True, text=True, timeout=10
        )
        if commit.returncode != 0:
            return {"commit": None, "dirty": None}
        status = subprocess.run(
            ["git", "status", "--porcelain"], cwd=cwd, capture_output=True, text=True, timeout=30
        )
    except (OSError, subprocess.SubprocessError):
        return {"commit": None, "dirty": None}
    dirty = bool(status.stdout.strip()) if status.returncode == 0 else None
    return {"commit": commit.stdout.strip(), "dirty": dirty}


def blas_info() -> list[dict[str, Any]]:
    """The thread pools loaded in this process (BLAS, OpenMP) as threadpoolctl reports them."""
    from threadpoolctl import threadpool_info

    keep = ("user_api", "internal_api", "version", "num_threads", "threading_layer", "architecture", "filepath")
    return [{k: p.get(k) for k in keep if k in p} for p in threadpool_info()]


def machine_info() -> dict[str, Any]:
    import numpy
    import scipy

    from benchsuite import __version__

    return {
        "benchsuite": __version__,
        "python": sys.version.split()[0],
        "implementation": platform.python_implementation(),
        "numpy": numpy.__version__,
        "scipy": scipy.__version__,
        "platform": platform.platform(),
        "cpu": cpu_model(),
        "cores": os.cpu_count(),
        "blas": blas_info(),
        "thread_env": {v: os.environ.get(v) for v in _THREAD_VARS},
    }
