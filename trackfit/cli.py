"""The ``trackfit`` command line: one console script with subcommands.

Each subcommand lives in its own module of :mod:`trackfit.commands` and exposes ``register(subparsers)``;
handlers parse arguments and call the library, nothing more. ``trackfit --version`` imports nothing heavy.
"""

from __future__ import annotations

import argparse
import importlib
import sys

#: subcommand modules, in the order ``trackfit --help`` lists them
COMMAND_MODULES = ("info", "show", "simulate", "reconstruct", "calibrate", "polarization")


class CommandError(Exception):
    """An error the command line reports as one line on stderr with exit status 2 (no traceback)."""


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("trackfit")
    except PackageNotFoundError:
        return "0+unknown"


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="trackfit",
        description="Reconstruct, simulate and analyse events of a photoelectric X-ray polarimeter "
        "with a hexagonal-pixel readout.",
    )
    parser.add_argument("--version", action="version", version=f"trackfit {_version()}")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMAND_MODULES:
        importlib.import_module(f"trackfit.commands.{name}").register(subparsers)
    return parser


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    if argv == ["--version"]:  # answered before any subcommand (and numba) is imported
        print(f"trackfit {_version()}")
        return 0
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    try:
        result = args.func(args)
    except (CommandError, FileNotFoundError, FileExistsError, ValueError, KeyError, IndexError, ImportError) as err:
        message = err.args[0] if isinstance(err, KeyError) and err.args else err
        print(f"trackfit {args.command}: error: {message}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"trackfit {args.command}: interrupted", file=sys.stderr)
        return 130
    return int(result or 0)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
