"""The ``annotator`` command: thin; it parses, calls, prints.

User errors (:class:`annotator.errors.UserError`) print one line ``annotator: error: ...`` and
exit with status 2; no traceback. ``ANNOTATOR_DEBUG=1`` shows tracebacks.
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys

from . import __version__
from .commands import COMMANDS
from .errors import UserError


def _command_module(name: str):
    return importlib.import_module(f"annotator.commands.{name.replace('-', '_')}")


def build_parser(only: str | None = None) -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="annotator",
        description="Annotate survey catalogues with quantities of one stated cosmology.",
    )
    parser.add_argument("--version", action="version", version=f"annotator {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, help_text in COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text)
        if only is None or only == name:
            try:
                _command_module(name).add_arguments(p)
            except ModuleNotFoundError as exc:
                if exc.name and exc.name.startswith("annotator.commands"):
                    p.set_defaults(_missing=name)
                else:
                    raise
    return parser


def main(argv: list[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    wanted = next((a for a in argv if a in COMMANDS), None)
    parser = build_parser(only=wanted)
    args, extra = parser.parse_known_args(argv)
    if extra:  # a command may take a positional given after its options (query's SQL)
        take = getattr(_command_module(args.command), "take_extra", None) if args.command \
            else None
        if take is None or not take(args, extra):
            parser.parse_args(argv)  # the usual one-line error, exit 2
    args._argv = argv  # the command as typed (run prints the exact --resume command)
    if not args.command:
        parser.print_help()
        return 2
    if getattr(args, "_missing", None):
        print(f"annotator: error: command {args.command!r} is not available in this build",
              file=sys.stderr)
        return 2
    try:
        return int(_command_module(args.command).main(args) or 0)
    except UserError as exc:
        if os.environ.get("ANNOTATOR_DEBUG"):
            raise
        print(f"annotator: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("annotator: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
