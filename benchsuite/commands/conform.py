"""``benchsuite conform``: check a rule step by step against the built-in method it claims to be (exit 0/1/2)."""

from __future__ import annotations

import argparse


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--rule", required=True, help="the rule to check: import path package.module:attr (or a built-in name)")
    p.add_argument("--as", dest="reference", required=True, metavar="METHOD",
                   help="the built-in rule it claims to implement (adam, rmsprop, heavy_ball, ...)")
    p.add_argument("--param", action="append", default=[], metavar="NAME=VALUE",
                   help="hyperparameter of the rule, in its own names (repeatable); torch-style names such as "
                        "betas=(0.9,0.999), alpha, weight_decay are mapped onto the built-in's")
    p.add_argument("--convention", choices=("paper", "torch"), default=None,
                   help="the reference's defaults: the paper's, or torch.optim's (default: torch when torch-style "
                        "names are given or the rule is a torch optimizer, else paper)")
    p.add_argument("--problems", default=None, metavar="SELECTOR",
                   help="comma-separated names or globs (default: five small problems of different curvature)")
    p.add_argument("--steps", type=int, default=None, help="steps compared per problem (default 1500)")
    p.add_argument("--catalogue", action="append", default=[], metavar="PATH", help="extra catalogue file or folder")
    p.add_argument("--json", action="store_true", help="print JSON instead of the table")


def run(args: argparse.Namespace) -> int:
    from benchsuite.conformance import (
        DEFAULT_STEPS,
        check_conformance,
        conformance_json,
        conformance_table,
        parse_params,
    )

    report = check_conformance(
        args.rule, args.reference, parse_params(args.param), problems=args.problems,
        steps=DEFAULT_STEPS if args.steps is None else args.steps, convention=args.convention,
        catalogue=args.catalogue,
    )
    print(conformance_json(report) if args.json else conformance_table(report), end="" if args.json else "\n")
    return 0 if report.conforms else 1
