"""The ``groupmodel`` command: a thin layer over the Python API.

It parses arguments, calls the API, prints results, and turns every
:class:`~groupmodel.errors.GroupModelError` into one line on stderr and an exit
code: 0 ok, 1 the model or data has problems, 2 usage or unreadable input.
``--debug`` shows the traceback instead.
"""

from __future__ import annotations

import sys
import traceback
from collections.abc import Sequence

from ..errors import GroupModelError
from .commands import COMMANDS
from .parser import make_parser


def main(argv: Sequence[str] | None = None) -> int:
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
