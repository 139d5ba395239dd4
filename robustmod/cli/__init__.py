"""The command line: ``robustmod check``, ``appendix``, ``grid``, ``demo`` and ``backends``.

One module per command; :mod:`.options` holds what they share. Building the parser imports
no pandas, scipy or back-end, so ``robustmod --help`` is quick; each command imports what it
needs when it runs. Exit status 0 on success, 2 on bad input (one line on stderr naming what
is wrong and how to fix it), 1 on an internal error (one line; ``--debug`` shows the traceback),
130 when interrupted.
"""
from __future__ import annotations

import argparse
import atexit
import gc
import os
import sys
import threading
import warnings
from collections.abc import Sequence

from ..errors import RobustmodError
from . import appendix, backends, check, demo, grid
from .options import PROG, Parser

#: The commands in the order ``--help`` lists them.
COMMANDS = (check, appendix, grid, demo, backends)


def build_parser() -> argparse.ArgumentParser:
    parser = Parser(prog=PROG, description="Is a moderation effect an artifact of non-constant variance? "
                    "Fit it with several variance treatments and compare.")
    parser.add_argument("--debug", action="store_true",
                        help="show tracebacks of internal errors and library warnings (default: off)")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=Parser)
    sub.required = True
    for command in COMMANDS:
        command.add_command(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run one command; returns the exit status."""
    parser = build_parser()
    args_list = list(sys.argv[1:] if argv is None else argv)
    args = parser.parse_args(args_list)
    args.argv = args_list  # the literal command, for provenance
    if not args.debug:
        # The results carry every warning that matters, worded for the user; library notices
        # (deprecations, numerical chatter of dependencies) would only clutter the terminal.
        warnings.simplefilter("ignore")
    try:
        return int(args.func(args) or 0)
    except RobustmodError as exc:
        sys.stderr.write(f"{PROG}: error: {exc}\n")
        return 2
    except KeyboardInterrupt:
        sys.stderr.write(f"{PROG}: interrupted\n")
        return 130
    except Exception as exc:
        if args.debug or os.environ.get("ROBUSTMOD_DEBUG"):
            raise
        first = str(exc).splitlines()[0] if str(exc) else ""
        sys.stderr.write(f"{PROG}: internal error: {type(exc).__name__}: {first} (rerun with --debug for details)\n")
        return 1


def run() -> None:
    """The ``robustmod`` command: :func:`main`, then a prompt exit.

    A finished command has written every output atomically and closed it, so after stdout and
    stderr are flushed and the exit handlers have run (temporary folders, logging, Dask), the
    interpreter's own teardown only frees memory: with the Bayesian back-end's libraries loaded
    that is about 0.7 s of a user's wait, so the process ends with :func:`os._exit` instead. If a
    non-daemon thread is still alive (it might still write), the normal exit joins it.

    The cycle collector starts its young generation at 10,000 new objects rather than 700. A
    command builds a few hundred thousand long-lived objects (compiled models, imported
    libraries), and at the default each full collection scanned them all again: 0.5-0.7 s of a
    default ``check``. Cycles are still collected; the streaming passes collect their own
    explicitly after each chunk. This is the command's process only: :func:`compare` called from
    Python leaves the caller's collector alone.
    """
    gc.set_threshold(10_000, 10, 10)
    code = main()
    try:
        sys.stdout.flush()
        sys.stderr.flush()
    except (BrokenPipeError, ValueError):  # the reader has gone, or the stream is closed
        pass
    if any(t.is_alive() and not t.daemon for t in threading.enumerate() if t is not threading.main_thread()):
        sys.exit(code)
    atexit._run_exitfuncs()  # the registered exit handlers, as a normal exit would run them
    try:
        sys.stdout.flush()
        sys.stderr.flush()
    except (BrokenPipeError, ValueError):
        pass
    os._exit(code)


__all__ = ["build_parser", "main", "run"]
