"""``benchsuite list``: the catalogue as a table (no solving, no cvxpy import).

Columns: name, family, tier, dimension, samples, L, mu and kappa (each marked
``exact`` or ``bound``, ``-`` when unknown), convex, and whether a certified
optimum is cached. Facts come from the reference cache when an entry exists;
otherwise the problem is built (data generation only).
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

HELP = "list the catalogue: dimension, samples, L, mu, kappa, convexity, certified optimum cached"


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--tier", choices=("small", "medium", "large", "all"), default="all",
                   help="catalogue tier (default all)")
    p.add_argument("--problems", metavar="SELECTOR",
                   help="comma-separated names or globs, or a NIST StRD .dat file")
    p.add_argument("--catalogue", action="append", default=[], metavar="PATH",
                   help="extra catalogue file or folder (repeatable)")
    p.add_argument("--cache-dir", type=Path, metavar="DIR",
                   help="reference cache folder (default ./results/reference, then the committed one)")
    p.add_argument("--json", action="store_true", help="print the rows as JSON")


def _facts(instance: Any, cache_dir: Path | None) -> tuple[dict[str, Any], bool]:
    from benchsuite.optimum import cached_entry

    entry = cached_entry(instance, cache_dir)
    if entry is not None and isinstance(entry.get("facts"), dict):
        return entry["facts"], bool(entry.get("certified"))
    problem = instance.build()
    c = problem.constants()
    facts = {"family": problem.family, "dim": int(problem.dim), "n_samples": problem.n_samples,
             "convex": bool(problem.convex), "L": c.L, "mu": c.mu, "L_kind": c.L_kind, "mu_kind": c.mu_kind,
             "note": c.note}
    return facts, False


def _kappa(f: dict[str, Any]) -> tuple[float | None, str]:
    L, mu = f.get("L"), f.get("mu")
    if L is None or not mu:
        return None, "unknown"
    kinds = {f.get("L_kind"), f.get("mu_kind")}
    return L / mu, "exact" if kinds == {"exact"} else "bound"


def rows(args: argparse.Namespace) -> list[dict[str, Any]]:
    from benchsuite.catalogue import load_catalogue, select

    cat = load_catalogue(args.catalogue)
    tier = None if args.tier == "all" else args.tier
    out = []
    for inst in select(cat, args.problems, tier=tier):
        f, certified = _facts(inst, args.cache_dir)
        kappa, kappa_kind = _kappa(f)
        out.append({
            "name": inst.name, "family": inst.family, "tier": inst.tier, "dim": f["dim"],
            "n_samples": f["n_samples"], "L": f["L"], "L_kind": f["L_kind"], "mu": f["mu"],
            "mu_kind": f["mu_kind"], "kappa": kappa, "kappa_kind": kappa_kind, "convex": f["convex"],
            "certified": certified, "measure": inst.measure, "targets": list(inst.targets), "budget": inst.budget,
        })
    return out


def _num(v: float | None, kind: str) -> str:
    return "-" if v is None or kind == "unknown" else f"{v:.3g} {kind}"


def run(args: argparse.Namespace) -> int:
    table = rows(args)
    if args.json:
        from benchsuite.results import json_value

        plain = [{k: [json_value(x) for x in v] if isinstance(v, list) else json_value(v) for k, v in r.items()}
                 for r in table]  # strict JSON: an unknown (NaN) number is null
        json.dump(plain, sys.stdout, indent=1, allow_nan=False)
        sys.stdout.write("\n")
        return 0
    head = ("name", "family", "tier", "dim", "n", "L", "mu", "kappa", "convex", "certified")
    body = [
        (r["name"], r["family"], r["tier"], str(r["dim"]), "-" if r["n_samples"] is None else str(r["n_samples"]),
         _num(r["L"], r["L_kind"]), _num(r["mu"], r["mu_kind"]), _num(r["kappa"], r["kappa_kind"]),
         "yes" if r["convex"] else "no", "yes" if r["certified"] else "no")
        for r in table
    ]
    widths = [max(len(h), *(len(b[i]) for b in body)) if body else len(h) for i, h in enumerate(head)]
    right = {3, 4}
    for line in (head, tuple("-" * w for w in widths), *body):
        cells = [c.rjust(w) if i in right else c.ljust(w) for i, (c, w) in enumerate(zip(line, widths))]
        print("  ".join(cells).rstrip())
    print(f"{len(body)} instance(s); certified = a certified optimum is in the reference cache "
          "(benchsuite optimum NAME computes one)")
    return 0
