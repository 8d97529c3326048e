"""Entry point of the ``poolbandit`` command.

Each subcommand lives in its own module of this package and exposes
``register(subparsers)``, which adds its parser and sets ``run`` to a
function taking the parsed arguments and returning an exit status.

Exit status: 0 on success, 2 for bad input or usage (message on stderr
naming the file, row, column and value), 1 for an internal error.
"""

from __future__ import annotations

import argparse
import importlib
import sys
import traceback
import warnings

from ..errors import InputError

__all__ = ["main", "build_parser"]

#: Subcommand modules, in the order ``--help`` lists them.
_COMMANDS = [
    "demo",
    "simulate",
    "classify",
    "study",
    "analyse",
    "fit",
    "compare",
]


def build_parser(only: str | None = None) -> argparse.ArgumentParser:
    """The top-level parser with every subcommand registered (or only the module ``only``)."""
    parser = argparse.ArgumentParser(
        prog="poolbandit",
        description="Design, run and report short adaptive intervention studies with partially pooled bandits.",
    )
    from .. import __version__

    parser.add_argument("--version", action="version", version=f"poolbandit {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True
    for name in _COMMANDS if only is None else [only]:
        importlib.import_module(f"{__package__}.{name}").register(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Run the command line; returns (and, as a script, exits with) the status."""
    warnings.filterwarnings("ignore", message=".*ArviZ is undergoing a major refactor.*")
    argv = sys.argv[1:] if argv is None else list(argv)
    # import only the invoked command's module: a command never pays for another's heavy imports
    first = next((a for a in argv if not a.startswith("-")), None)
    parser = build_parser(first if first in _COMMANDS else None)
    args = parser.parse_args(argv)
    try:
        status = args.run(args)
    except InputError as err:
        print(f"poolbandit {args.command}: error: {err}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130
    except Exception:  # an internal error: say so plainly, keep the traceback
        traceback.print_exc()
        print(f"poolbandit {args.command}: internal error (please report it with the traceback above)",
              file=sys.stderr)
        return 1
    return int(status or 0)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
