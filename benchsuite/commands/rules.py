"""``benchsuite rules``: the built-in update rules, their defaults, papers and torch.optim mapping."""

from __future__ import annotations

import argparse
from typing import Any


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--json", action="store_true", help="print JSON instead of a readable listing")


def describe() -> list[dict[str, Any]]:
    """One record per built-in rule (what the listing and --json print)."""
    from benchsuite.rules import BUILTIN_RULES, TORCH_MAPPING

    out = []
    for name, cls in BUILTIN_RULES.items():
        out.append({
            "name": name,
            "class": f"{cls.__module__}:{cls.__qualname__}",
            "paper": cls.paper,
            "defaults": cls.defaults(),
            "problem_aware": cls.problem_aware,
            "torch": {"class": f"torch.optim.{cls.torch_class}", "mapping": TORCH_MAPPING[name],
                      "preset": dict(cls.torch_preset)},
        })
    return out


def run(args: argparse.Namespace) -> int:
    from benchsuite.rulespec import format_value

    records = describe()
    if args.json:
        import json

        print(json.dumps(records, indent=2))
        return 0
    for r in records:
        defaults = ", ".join(f"{k}={format_value(v)}" for k, v in r["defaults"].items())
        print(f"{r['name']}  ({r['paper']})")
        print(f"    defaults:       {defaults}")
        print(f"    with L, mu:     {r['problem_aware']}")
        print(f"    torch.optim:    {r['torch']['mapping']}")
    print("\nAny other rule: --rule package.module:attribute (numpy class or factory, torch.optim.Optimizer "
          "subclass, optax-style (init, update) pair, or a plain step(x, g, state, t) function).")
    return 0
