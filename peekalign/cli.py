"""Command line: ``peekalign <command> ...`` (also ``python -m peekalign``).

Each command is a module in :mod:`peekalign.commands` with ``add_parser(subparsers)``
and ``run(args) -> int``. Exit codes: 0 success, 1 some input was bad (the rest was
processed), 2 usage error.
"""

from __future__ import annotations

import argparse
import difflib
import importlib
import sys
import warnings
from collections.abc import Sequence

from .exceptions import ParameterError, PeekalignError

__all__ = ["main", "COMMANDS"]

# Order shown in --help.
COMMANDS: tuple[str, ...] = (
    "check",
    "align",
    "latency",
    "search",
    "sweep",
    "redecode",
    "probe",
    "view",
    "scan",
    "compare",
    "demo",
)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="peekalign",
        description="Find where a streaming CTC/attention recognizer loses words.",
    )
    from . import __version__

    parser.add_argument("--version", action="version", version=f"peekalign {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    parser.set_defaults(_commands={})
    for name in COMMANDS:
        module = importlib.import_module(f".commands.{name}", __package__)
        p = module.add_parser(sub)
        p.set_defaults(_run=module.run)
        parser.get_default("_commands")[name] = p
    return parser


def _unknown_arguments(parser: argparse.ArgumentParser, command: str, extra: list[str]):
    """Fail as the subcommand's own parser: its usage, and the closest option to a typo.

    argparse would report a subcommand's unknown option against the top-level usage,
    which lists no option of the subcommand.
    """
    sub = parser.get_default("_commands")[command]
    msg = f"unrecognized arguments: {' '.join(extra)}"
    options = [o for a in sub._actions for o in a.option_strings]
    for arg in extra:
        if arg.startswith("-"):
            close = difflib.get_close_matches(arg.split("=", 1)[0], options, n=1, cutoff=0.6)
            if close:
                msg += f" (did you mean {close[0]}?)"
                break
    sub.error(msg)


def _format_warning(message, category, filename, lineno, line=None):  # noqa: ARG001
    return f"warning: {message}\n"


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code."""
    parser = build_parser()
    args, extra = parser.parse_known_args(argv)
    if extra:
        _unknown_arguments(parser, args.command, extra)
    warnings.formatwarning = _format_warning
    try:
        return int(args._run(args) or 0)
    except ParameterError as exc:
        print(f"peekalign {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except PeekalignError as exc:
        print(f"peekalign {args.command}: error: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
