"""The ``groupmodel`` command: a thin layer over the Python API.

It parses arguments, calls the API, prints results, and turns every
:class:`~groupmodel.errors.GroupModelError` into one line on stderr and an exit
code: 0 ok, 1 the model or data has problems, 2 usage or unreadable input.
``--debug`` shows the traceback instead.

When the reader of its output goes away (``groupmodel check ... | head``), it stops quietly with exit code
141 (128 + SIGPIPE, as a command killed by the broken pipe), the recipe of the Python documentation's
"Note on SIGPIPE".

SIGTERM (what a batch system sends at its time limit) is handled as Ctrl-C: it raises :class:`Terminated`, a
kind of KeyboardInterrupt, so the same clean-up runs (worker processes stopped, spill file and hidden folders
removed, the lock released), then one line and exit code 143 (128 + SIGTERM).
"""

from __future__ import annotations

import argparse
import os
import signal
import sys
import threading
import traceback
from collections.abc import Callable, Sequence
from types import FrameType

from ..errors import GroupModelError
from .commands import COMMANDS
from .parser import make_parser

#: Exit code when the reader of the output went away: 128 + SIGPIPE, as a command killed by the broken pipe.
EXIT_BROKEN_PIPE = 141
#: Exit code after SIGTERM: 128 + SIGTERM.
EXIT_TERMINATED = 143


class Terminated(KeyboardInterrupt):
    """SIGTERM received: a KeyboardInterrupt, so every clean-up written for Ctrl-C runs for it too."""


def _on_sigterm(signum: int, frame: FrameType | None) -> None:
    signal.signal(signal.SIGTERM, signal.SIG_IGN)  # once: a second SIGTERM must not interrupt the clean-up
    raise Terminated()


def main(argv: Sequence[str] | None = None) -> int:
    try:
        code = _run(argv)
        sys.stdout.flush()  # a broken pipe shows here rather than at exit, where it cannot be handled
        return code
    except BrokenPipeError:
        _silence_stdout()
        return EXIT_BROKEN_PIPE


def _silence_stdout() -> None:
    """Point stdout at devnull, so that Python's own flush at exit does not fail on the broken pipe again."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError):  # stdout replaced by an object without a file descriptor
        pass


def _run(argv: Sequence[str] | None) -> int:
    parser = make_parser()
    args = parser.parse_args(argv)
    args.argv = list(sys.argv[1:] if argv is None else argv)  # recorded in dataset_description.json
    if args.command is None:
        parser.print_help()
        return 2
    command = COMMANDS.get(args.command)
    if command is None:
        return 2
    if threading.current_thread() is not threading.main_thread():  # signal handlers belong to the main thread
        return _call(command, args)
    previous = signal.signal(signal.SIGTERM, _on_sigterm)
    try:
        return _call(command, args)
    finally:
        signal.signal(signal.SIGTERM, previous)


def _call(command: Callable[[argparse.Namespace], int], args: argparse.Namespace) -> int:
    """Run ``command``; errors, Ctrl-C and SIGTERM become one line on stderr and the exit code."""
    try:
        return command(args)
    except GroupModelError as exc:
        if args.debug:
            traceback.print_exc()
        sys.stderr.write(f"groupmodel: error: {exc}\n")
        return exc.exit_code
    except Terminated:
        sys.stderr.write("groupmodel: terminated (SIGTERM); nothing was written\n")
        return EXIT_TERMINATED
    except KeyboardInterrupt:
        sys.stderr.write("groupmodel: interrupted; nothing was written\n")
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
