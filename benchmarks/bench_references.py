"""Certified references for the default (small) catalogue: cold and warm, and CLI start-up.

Measures, in one run on this machine:

* cold: every small-tier instance solved by all its routes into an empty
  temporary cache (aim: < 60 s on 2 cores), with the time per instance and
  per route kind;
* warm: the same instances loaded from that cache (each entry is checked by
  one objective evaluation at x*; aim: < 2 s), against a bare baseline that
  only reads the JSON files and builds the problems;
* ``benchsuite --help`` and ``benchsuite list`` wall time in a fresh
  interpreter (aim: < 0.3 s for --help), against a bare ``python -c pass``.

Usage: ``.venv/bin/python benchmarks/bench_references.py``
"""

from __future__ import annotations

import json
import statistics
import subprocess
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path

from benchsuite.catalogue import load_catalogue, select
from benchsuite.optimum import cache_path, certified_optimum

ROOT = Path(__file__).resolve().parents[1]


def wall(cmd: list[str], repeats: int = 5) -> float:
    """Median wall time of a command in a fresh process."""
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        subprocess.run(cmd, capture_output=True, check=True, cwd=ROOT)
        times.append(time.perf_counter() - t)
    return statistics.median(times)


def main() -> int:
    instances = select(load_catalogue(), None, tier="small")
    print(f"{len(instances)} small-tier instances")
    with tempfile.TemporaryDirectory() as tmp:
        cache = Path(tmp)
        per_kind: dict[str, float] = defaultdict(float)
        t0 = time.perf_counter()
        slow = []
        for inst in instances:
            t = time.perf_counter()
            opt = certified_optimum(inst, cache_dir=cache, refresh=True)
            slow.append((time.perf_counter() - t, inst.name, opt.certified))
            for r in opt.routes:
                per_kind[r.kind] += r.seconds
        cold = time.perf_counter() - t0
        print(f"cold: {cold:.2f} s for {len(instances)} instances (aim < 60 s)")
        print("  route seconds by kind: " + ", ".join(f"{k} {v:.2f}" for k, v in sorted(per_kind.items())))
        for secs, name, ok in sorted(slow, reverse=True)[:5]:
            print(f"  {secs:6.2f} s  {name}{'' if ok else '  NOT CERTIFIED'}")

        t0 = time.perf_counter()
        for inst in instances:
            assert certified_optimum(inst, cache_dir=cache).from_cache
        warm = time.perf_counter() - t0

        t0 = time.perf_counter()
        for inst in instances:
            json.loads(cache_path(inst, cache).read_text())
            inst.build()
        bare = time.perf_counter() - t0
        print(f"warm: {warm:.3f} s (aim < 2 s); bare read JSON + build: {bare:.3f} s; ratio {warm / bare:.2f}x")

    py = [sys.executable]
    base = wall(py + ["-c", "pass"])
    helptime = wall(py + ["-m", "benchsuite", "--help"])
    listtime = wall(py + ["-m", "benchsuite", "list", "--tier", "small"], repeats=3)
    print(f"python -c pass: {base:.3f} s")
    print(f"benchsuite --help: {helptime:.3f} s (aim < 0.3 s; {helptime / base:.1f}x bare interpreter start)")
    print(f"benchsuite list --tier small: {listtime:.3f} s ({listtime / base:.1f}x bare interpreter start)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
