"""Command line: ``peekalign <command> ...`` (also ``python -m peekalign``).

Each command is a module in :mod:`peekalign.commands` with ``add_parser(subparsers)``
and ``run(args) -> int``. Exit codes: 0 success, 1 some input was bad (the rest was
processed), 2 usage error.
"""

from __future__ import annotations

import argparse
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
    for name in COMMANDS:
        module = importlib.import_module(f".commands.{name}", __package__)
        p = module.add_parser(sub)
        p.set_defaults(_run=module.run)
    return parser


def _format_warning(message, category, filename, lineno, line=None):  # noqa: ARG001
    return f"warning: {message}\n"


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
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
