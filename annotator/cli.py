"""The ``annotator`` command: thin; it parses, calls, prints.

User errors (:class:`annotator.errors.UserError`) print one line ``annotator: error: ...`` and
exit with status 2; no traceback. An operating-system error that names a file (permission
denied, ...) is one such line too. Anything else is a bug of annotator or of a plugin: it prints
one line ``annotator: internal error: <exception>: <message> (traceback written to FILE)`` and
exits with status 2; the full traceback goes to a file ``annotator-traceback-*.txt`` in the
temporary folder (``$TMPDIR``). ``ANNOTATOR_DEBUG=1`` lets every traceback through instead.
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys

# OpenBLAS (numpy's, and scipy's own copy) starts its threads when the library loads and
# they spin for 2^28 cycles (~0.1 s each) before they sleep: ~0.15-0.2 s of CPU taken from
# every command, most of a small run's, though a run makes no BLAS call before the redshift
# posteriors' matrix products. 2^20 cycles (~0.4 ms) keeps them spinning between close calls
# and no longer; the threads stay (those products keep both cores). Read when OpenBLAS loads,
# so set before numpy is imported (the package imports it only on use); a value the user
# set is kept. Inherited by the processes the command starts (service and Dask workers).
if "numpy" not in sys.modules:
    os.environ.setdefault("OPENBLAS_THREAD_TIMEOUT", "20")

from . import __version__  # noqa: E402
from .commands import COMMANDS  # noqa: E402
from .errors import UserError  # noqa: E402


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
    except OSError as exc:
        if os.environ.get("ANNOTATOR_DEBUG"):
            raise
        if exc.filename is None:
            return _internal_error(exc)
        print(f"annotator: error: {exc.filename}: {exc.strerror or exc}", file=sys.stderr)
        return 2
    except Exception as exc:
        if os.environ.get("ANNOTATOR_DEBUG"):
            raise
        return _internal_error(exc)


def _internal_error(exc: BaseException) -> int:
    """One line for an unexpected exception; its traceback goes to a file."""
    import tempfile
    import time
    import traceback

    where = "not written"
    try:
        stamp = time.strftime("%Y%m%dT%H%M%S")
        fd, path = tempfile.mkstemp(prefix=f"annotator-traceback-{stamp}-", suffix=".txt")
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(f"annotator {__version__}, command line: {' '.join(sys.argv)}\n")
            traceback.print_exception(type(exc), exc, exc.__traceback__, file=fh)
        where = f"written to {path}"
    except OSError:
        pass
    message = " ".join(str(exc).split()) or "(no message)"
    print(f"annotator: internal error: {type(exc).__name__}: {message[:300]} (a bug; traceback "
          f"{where}; ANNOTATOR_DEBUG=1 shows it here)", file=sys.stderr)
    return 2


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
