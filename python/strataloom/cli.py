"""Command-line interface: parses arguments and calls the Python API, nothing more.

Errors reach the user as one line on stderr with exit code 2; ``--debug`` shows the traceback.
"""

from __future__ import annotations

import argparse
import sys
import traceback
from collections.abc import Callable, Sequence

from . import __version__

EXIT_USAGE = 2
EXIT_INTERRUPTED = 130

# Subcommands register here: name -> (help, add_arguments(parser), run(args) -> exit code).
Command = tuple[str, Callable[[argparse.ArgumentParser], None], Callable[[argparse.Namespace], int]]
COMMANDS: dict[str, Command] = {}


def command(name: str, help: str) -> Callable:
    """Register a subcommand: decorate ``run(args)``; ``run.arguments(parser)`` adds its options."""

    def wrap(run: Callable[[argparse.Namespace], int]) -> Callable[[argparse.Namespace], int]:
        COMMANDS[name] = (help, getattr(run, "arguments", lambda p: None), run)
        return run

    return wrap


class _Parser(argparse.ArgumentParser):
    """argparse with the project's one-line error format."""

    def error(self, message: str) -> None:  # type: ignore[override]
        self.exit(EXIT_USAGE, f"{self.prog}: error: {message} (see '{self.prog} --help')\n")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="strataloom",
        description="Multiple-point simulation of facies and property models from training images, "
        "wells and soft data.",
    )
    parser.add_argument("--version", action="version", version=f"strataloom {__version__}")
    parser.add_argument("--debug", action="store_true", help="show the full traceback on errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name, (help_text, add_arguments, run) in COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text)
        add_arguments(p)
        p.set_defaults(run=run)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the CLI; returns the exit code."""
    from . import commands  # noqa: F401  (registers the subcommands)

    parser = build_parser()
    args = parser.parse_args(argv)
    if getattr(args, "run", None) is None:
        parser.print_help()
        return 0
    try:
        return int(args.run(args) or 0)
    except KeyboardInterrupt:
        print("strataloom: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except Exception as exc:  # one line for people, the traceback for developers
        if args.debug:
            traceback.print_exc()
        else:
            message = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
            print(f"strataloom: error: {message}", file=sys.stderr)
        return EXIT_USAGE
