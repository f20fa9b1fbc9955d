"""The ``benchsuite`` command line.

Each sub-command lives in ``benchsuite/commands/<name>.py`` with two
functions: ``add_arguments(parser)`` and ``run(args) -> int``. Command modules
import only argparse-level things at the top; heavy work is imported inside
``run`` so that ``benchsuite --help`` stays fast.

A :class:`benchsuite.errors.UserError` anywhere becomes one line on stderr and
exit code 2; Ctrl-C becomes exit code 130 without a traceback.
"""

from __future__ import annotations

import argparse
import importlib
import sys

from benchsuite import __version__
from benchsuite.errors import UserError

#: sub-command name -> one-line help. The module is benchsuite.commands.<name>.
COMMANDS: dict[str, str] = {
    "list": "list the catalogue: dimension, samples, L, mu, kappa, convexity, certified optimum cached",
    "optimum": "compute (or load) the certified optimum of an instance or a NIST StRD file, with its certificate",
    "run": "run update rules on catalogue problems: iterations, gradient calls and wall time to targets",
    "history": "query the history of recorded runs",
    "baseline": "record a rule's results on chosen problems as a baseline file for the gate",
    "gate": "rerun a baseline's cases with a candidate rule and pass or fail it (exit 0/1)",
    "conform": "check a rule step by step against the built-in method it claims to be (exit 0 conforms, 1 not)",
    "compare": "measure the speed-up of rule B over rule A (or one rule at two git revisions, or two saved runs)",
    "rules": "list the built-in update rules: defaults, problem-aware defaults, papers, torch.optim mapping",
}


class _Parser(argparse.ArgumentParser):
    """argparse with exit code 2 and a one-line message for usage errors."""

    def error(self, message: str) -> None:  # pragma: no cover - exercised via CLI tests
        self.exit(2, f"{self.prog}: error: {message}\n")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="benchsuite",
        description="Sanity benchmarks for first-order update rules: certified optima, "
        "iterations and wall time to tolerance, a merge gate against a baseline.",
    )
    parser.add_argument("--version", action="version", version=f"benchsuite {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name, help_text in COMMANDS.items():
        module = importlib.import_module(f"benchsuite.commands.{name}")
        p = sub.add_parser(name, help=help_text, description=help_text)
        module.add_arguments(p)
        p.set_defaults(_module=module)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    try:
        return int(args._module.run(args) or 0)
    except UserError as exc:
        print(f"benchsuite: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("benchsuite: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # e.g. `benchsuite list | head`
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
