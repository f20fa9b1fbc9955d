"""The ``benchsuite`` command line.

Each sub-command lives in ``benchsuite/commands/<name>.py`` with two
functions: ``add_arguments(parser)`` and ``run(args) -> int``. Command modules
import only argparse-level things at the top; heavy work is imported inside
``run`` so that ``benchsuite --help`` stays fast.

Exit codes (every command; the README lists them too):

* 0 -- done; for ``run``: every case ran cleanly (``reached``, ``partial`` and
  ``budget`` are measurements, not failures);
* 1 -- done, with a failure: ``run``: a case errored, timed out, diverged or
  was unstable; ``gate``: the candidate failed; ``optimum``: not certified;
* 2 -- a usage error: bad input, one line on stderr naming the file, field or
  value (a :class:`benchsuite.errors.UserError` anywhere, including a rule that
  breaks the step contract);
* 130 -- interrupted by Ctrl-C (SIGINT); 143 -- terminated by SIGTERM, which CI
  systems send on cancel. Both are handled alike: no traceback, finished work
  kept (``run`` marks its run ``partial``; ``--resume`` completes it).
"""

from __future__ import annotations

import argparse
import contextlib
import importlib
import os
import signal
import sys
import threading
from collections.abc import Iterator
from typing import Any

from benchsuite import __version__
from benchsuite.errors import UserError

#: exit codes (see the module docstring)
EXIT_OK, EXIT_FAILED, EXIT_USAGE, EXIT_INTERRUPTED, EXIT_TERMINATED = 0, 1, 2, 130, 143

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
    "report": "draw a run's report: summary, performance and data profiles, convergence curves, provenance (HTML or markdown)",
    "runs": "list earlier runs (also interrupted ones) or one run's cases and the tracebacks of its failures",
}

EPILOG = ("exit codes: 0 done; 1 done with a failure (run: a case errored, timed out, diverged or was unstable; "
          "gate: failed; optimum: not certified); 2 usage error; 130 interrupted (Ctrl-C); 143 terminated (SIGTERM)")

#: set when SIGTERM arrived during the current command
_TERMINATED = threading.Event()


def stop_reason() -> str:
    """How the current command was stopped, for messages: ``"terminated (SIGTERM)"`` or ``"interrupted"``."""
    return "terminated (SIGTERM)" if _TERMINATED.is_set() else "interrupted"


@contextlib.contextmanager
def sigterm_as_interrupt() -> Iterator[None]:
    """While active, SIGTERM raises :class:`KeyboardInterrupt` in this process, as Ctrl-C does.

    So a CI cancel stops a command the way Ctrl-C does: finished work is kept,
    files are closed properly, no traceback. A second SIGTERM while that
    clean-up runs is ignored (it would tear it). A worker process forked while
    this is active inherits the handler; there it restores the default action
    and re-raises the signal, so workers die on SIGTERM as before.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    main_pid = os.getpid()

    def handler(signum: int, frame: Any) -> None:
        if os.getpid() != main_pid:  # a forked child: behave as if no handler had been installed
            signal.signal(signal.SIGTERM, signal.SIG_DFL)
            os.kill(os.getpid(), signal.SIGTERM)
            return
        if _TERMINATED.is_set():
            return
        _TERMINATED.set()
        raise KeyboardInterrupt

    _TERMINATED.clear()
    previous = signal.signal(signal.SIGTERM, handler)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


class _Parser(argparse.ArgumentParser):
    """argparse with exit code 2 and a one-line message for usage errors."""

    def error(self, message: str) -> None:  # pragma: no cover - exercised via CLI tests
        self.exit(EXIT_USAGE, f"{self.prog}: error: {message}\n")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="benchsuite",
        description="Sanity benchmarks for first-order update rules: certified optima, "
        "iterations and wall time to tolerance, a merge gate against a baseline.",
        epilog=EPILOG,
    )
    parser.add_argument("--version", action="version", version=f"benchsuite {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name, help_text in COMMANDS.items():
        module = importlib.import_module(f"benchsuite.commands.{name}")
        p = sub.add_parser(name, help=help_text, description=help_text,
                           epilog=getattr(module, "EPILOG", None),
                           formatter_class=argparse.RawDescriptionHelpFormatter)
        module.add_arguments(p)
        p.set_defaults(_module=module)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return EXIT_USAGE
    with sigterm_as_interrupt():
        try:
            code = int(args._module.run(args) or 0)
        except UserError as exc:
            print(f"benchsuite: error: {exc}", file=sys.stderr)
            code = exc.exit_code
        except KeyboardInterrupt:
            print(f"benchsuite: {stop_reason()}", file=sys.stderr)
            code = EXIT_INTERRUPTED
        except BrokenPipeError:  # e.g. `benchsuite list | head`
            code = EXIT_OK
        if code == EXIT_INTERRUPTED and _TERMINATED.is_set():
            code = EXIT_TERMINATED
        return code


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
