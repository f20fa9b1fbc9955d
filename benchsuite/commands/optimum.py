"""``benchsuite optimum NAME_OR_PATH``: reproduce a known optimum and show how it is certified.

Prints f*, x* (abbreviated for large dimensions; ``--json`` gives it whole),
the routes that agreed and how closely, the certificate (gradient norm, the
strong-convexity distance bound, solver statuses, duality gaps) and, for
published problems, the published value and the LRE per parameter with the
minimum. Exit code 0 when certified, 1 when not (the reason is printed), 2 for
bad input. A NIST StRD ``.dat`` file given by path works like a name.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path
from typing import Any

HELP = "compute (or load) the certified optimum of an instance or a NIST StRD file, with its certificate"
#: coordinates shown at each end of an abbreviated x*
_SHOW = 4


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("target", metavar="NAME_OR_PATH",
                   help="instance name (or comma-separated names/globs) or a NIST StRD .dat file")
    p.add_argument("--start", type=int, default=1, choices=(1, 2),
                   help="certified starting point of a StRD file given by path (default 1)")
    p.add_argument("--json", action="store_true",
                   help="print the optimum and certificate as JSON (x* whole; unknown or infinite numbers as null)")
    p.add_argument("--refresh", action="store_true", help="recompute even when a cache entry exists")
    p.add_argument("--catalogue", action="append", default=[], metavar="PATH",
                   help="extra catalogue file or folder (repeatable)")
    p.add_argument("--cache-dir", type=Path, metavar="DIR",
                   help="reference cache folder (default ./results/reference, then the committed one)")


def _instances(args: argparse.Namespace) -> list[Any]:
    from benchsuite.catalogue import instance_from_strd, load_catalogue, select

    target = args.target.strip()
    if target.lower().endswith(".dat") or Path(target).is_file():
        return [instance_from_strd(target, start=args.start)]
    return select(load_catalogue(args.catalogue), target, tier=None, option="NAME_OR_PATH")


def _f(v: float | None) -> float | None:
    """A number for JSON: ``null`` when missing or not finite (e.g. kappa of a problem that is not strongly convex)."""
    if v is None:
        return None
    return v if math.isfinite(v) else None


def _plain(obj: Any) -> Any:
    """``obj`` with every non-finite float (anywhere inside) replaced by ``None``: strict JSON."""
    if isinstance(obj, float):
        return _f(obj)
    if isinstance(obj, dict):
        return {k: _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if hasattr(obj, "item") and not isinstance(obj, (str, bytes)):  # numpy scalar
        return _plain(obj.item())
    return obj


def to_json(opt: Any) -> dict[str, Any]:
    """The JSON document of ``benchsuite optimum --json`` for one optimum."""
    out: dict[str, Any] = {
        "name": opt.name,
        "certified": opt.certified,
        "reason": opt.reason,
        "how": opt.how,
        "f_star": _f(opt.f_star),
        "x_star": [_f(float(v)) for v in opt.x_star],
        "grad_norm": _f(opt.grad_norm),
        "dist_bound": _f(opt.dist_bound),
        "methods": opt.methods,
        "agreement_digits": _f(opt.agreement_digits),
        "tolerances": {k: _f(v) for k, v in opt.tolerances.items()},
        "routes": [
            {"method": r.method, "ok": r.ok, "status": r.status, "f": _f(r.f), "grad_norm": _f(r.grad_norm),
             "seconds": r.seconds, "duality_gap": _f(r.duality_gap)}
            for r in opt.routes
        ],
        "facts": opt.facts,
        "versions": opt.versions,
        "from_cache": opt.from_cache,
    }
    if opt.published is not None:
        out["published"] = {"f": opt.published.f, "x": None if opt.published.x is None else list(opt.published.x),
                            "source": opt.published.source, "note": opt.published.note}
        out["lre"] = opt.lre["min"] if opt.lre else None
        out["lre_per_parameter"] = opt.lre
    return _plain(out)


def _vector(x: Any) -> str:
    vals = [f"{v:.15g}" for v in x]
    if len(vals) <= 2 * _SHOW + 1:
        return "[" + ", ".join(vals) + "]"
    return "[" + ", ".join(vals[:_SHOW]) + ", ..., " + ", ".join(vals[-_SHOW:]) + f"]  (d = {len(vals)}; --json for all)"


def _g(v: float | None) -> str:
    return "unknown" if v is None or v != v else f"{v:.3g}"  # v != v: NaN


def _print(opt: Any) -> None:
    d = opt.facts.get("dim", opt.x_star.size)
    verdict = "CERTIFIED" if opt.certified else "NOT CERTIFIED"
    print(f"{opt.name}  ({opt.facts.get('family', '?')}, d = {d}): {verdict}"
          + (" [from cache]" if opt.from_cache else ""))
    if not opt.certified:
        print(f"  reason: {opt.reason}")
    print(f"  f*  = {opt.f_star!r}")
    print(f"  x*  = {_vector(opt.x_star)}")
    print(f"  how: {opt.how}")
    tol = opt.tolerances
    print(f"  routes agree to {opt.agreement_digits:.1f} digits "
          f"(tolerances: f {_g(tol.get('eps_f'))} relative, x {_g(tol.get('x'))} relative; kappa {_g(tol.get('kappa'))})")
    line = f"  ||grad f(x*)|| = {opt.grad_norm:.3g}"
    if opt.dist_bound is not None:
        line += f";  ||x* - x_true|| <= {opt.dist_bound:.3g} (strong convexity: ||grad|| / mu)"
    print(line)
    print("  routes:")
    w = max(len(r.method) for r in opt.routes) if opt.routes else 6
    for r in opt.routes:
        mark = "ok" if r.ok else "--"
        gap = f"  gap {r.duality_gap:.2g}" if r.duality_gap is not None else ""
        print(f"    {mark} {r.method.ljust(w)}  f = {r.f:.15g}  |g| = {r.grad_norm:.2g}  {r.seconds:.2f} s{gap}")
        print(f"       {r.status}")
    if opt.published is not None:
        pub = opt.published
        print(f"  published ({pub.source}): f = {pub.f!r}" + ("" if pub.x is None else f", x = {_vector(pub.x)}"))
        if opt.lre:
            items = [(k, v) for k, v in opt.lre.items() if k != "min"]
            if len(items) > 12:  # large d: the worst few, --json has them all
                items = sorted(items, key=lambda kv: kv[1])[:6]
                label = f"LRE (worst 6 of {len(opt.lre) - 1}; --json for all)"
            else:
                label = "LRE"
            per = "  ".join(f"{k} {v:.1f}" for k, v in items)
            print(f"  {label}: {per}   min {opt.lre['min']:.1f}")


def run(args: argparse.Namespace) -> int:
    from benchsuite.optimum import certified_optimum

    optima = []
    for k, inst in enumerate(_instances(args)):
        o = certified_optimum(inst, cache_dir=args.cache_dir, refresh=args.refresh)
        optima.append(o)
        if not args.json:  # one at a time: a cold catalogue-wide run shows progress
            if k:
                print()
            _print(o)
            sys.stdout.flush()
    if args.json:
        docs = [to_json(o) for o in optima]
        json.dump(docs[0] if len(docs) == 1 else docs, sys.stdout, indent=1, allow_nan=False)
        sys.stdout.write("\n")
    bad = [o.name for o in optima if not o.certified]
    if bad:
        print(f"benchsuite: not certified: {', '.join(bad)}", file=sys.stderr)
        return 1
    return 0
