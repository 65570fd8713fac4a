"""The ``passby`` command line: a thin shell around the library.

Each command lives in a module of this package with two functions,
``add_parser(subparsers)`` and ``run(args) -> int``. Errors a user can
cause arrive here as :class:`~passby.errors.PassbyError` and leave as one
line on stderr, ``passby: error: WHERE: what is wrong``, with exit status 2;
any other exception is an internal fault, exit status 1 (set
``PASSBY_DEBUG=1`` to see its traceback).
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys
import traceback

from passby import __version__
from passby.errors import PassbyError

#: The commands, in the order ``passby --help`` lists them.
COMMANDS = ("analyze", "station", "devices", "sitecheck", "export", "report", "calibrate", "plot")

EXIT_OK, EXIT_FAULT, EXIT_USAGE = 0, 1, 2


def error_line(message: str) -> str:
    """The one line a user sees for an error."""
    return f"passby: error: {message}"


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="passby",
        description="Speed of passing vehicles from their sound, by the Doppler effect.",
    )
    parser.add_argument("--version", action="version", version=f"passby {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for name in COMMANDS:
        module = importlib.import_module(f"passby.cli.{name}")
        p = module.add_parser(sub)
        p.set_defaults(_run=module.run)
    return parser


def main(argv=None) -> int:
    """Run the command line; return the exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args._run(args) or 0)
    except PassbyError as exc:
        print(error_line(str(exc)), file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print("passby: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return EXIT_OK
    except Exception as exc:  # an internal fault, not the user's
        if os.environ.get("PASSBY_DEBUG"):
            traceback.print_exc()
        print(f"passby: internal error: {type(exc).__name__}: {exc} "
              "(set PASSBY_DEBUG=1 for the traceback)", file=sys.stderr)
        return EXIT_FAULT
