"""The ``groupmodel`` command: a thin layer over the Python API.

It parses arguments, calls the API, prints results, and turns every
:class:`~groupmodel.errors.GroupModelError` into one line on stderr and an exit
code: 0 ok, 1 the model or data has problems, 2 usage or unreadable input.
``--debug`` shows the traceback instead.

When the reader of its output goes away (``groupmodel check ... | head``), it stops quietly with exit code
141 (128 + SIGPIPE, as a command killed by the broken pipe), the recipe of the Python documentation's
"Note on SIGPIPE".
"""

from __future__ import annotations

import os
import sys
import traceback
from collections.abc import Sequence

from ..errors import GroupModelError
from .commands import COMMANDS
from .parser import make_parser

#: Exit code when the reader of the output went away: 128 + SIGPIPE, as a command killed by the broken pipe.
EXIT_BROKEN_PIPE = 141


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
    if args.command is None:
        parser.print_help()
        return 2
    command = COMMANDS.get(args.command)
    if command is None:
        return 2
    try:
        return command(args)
    except GroupModelError as exc:
        if args.debug:
            traceback.print_exc()
        sys.stderr.write(f"groupmodel: error: {exc}\n")
        return exc.exit_code
    except KeyboardInterrupt:
        sys.stderr.write("groupmodel: interrupted; nothing was written\n")
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
