"""The ``trackfit`` command line: one console script with subcommands.

Each subcommand lives in its own module of :mod:`trackfit.commands` and exposes ``register(subparsers)``;
handlers parse arguments and call the library, nothing more. ``trackfit --version`` imports nothing heavy.

Conventions every subcommand follows:

* ``--help`` shows the default of every option: the parsers use :class:`HelpFormatter`, which adds
  ``(default: X)`` to an option's help unless the help already states its default in its own words.
* Errors name what the user typed: a flag (``--bins``), never the Python parameter behind it (``n_bins``). Commands
  check flag values before calling the library where the library's name would be ambiguous, and wrap library
  calls in :func:`flags_for_parameters`, which rewrites a quoted parameter name in a ``ValueError`` into its flag.
* Bad input and problems of the environment never show a traceback: handlers raise :class:`CommandError` (or a
  builtin error that :func:`main` reports as one line on stderr, exit status 2: our file-format errors are
  ``ValueError``, every operating-system error, including our write errors, is an ``OSError``). Any other exception
  is a defect of trackfit: one line saying so, exit status 3. ``trackfit --debug COMMAND`` or ``TRACKFIT_DEBUG=1``
  adds the traceback.
"""

from __future__ import annotations

import argparse
import contextlib
import importlib
import re
import sys
from collections.abc import Mapping

#: subcommand modules, in the order ``trackfit --help`` lists them
COMMAND_MODULES = ("info", "show", "simulate", "pixel_map", "reconstruct", "calibrate", "polarization",
                   "response", "plan")


class CommandError(Exception):
    """An error the command line reports as one line on stderr with exit status 2 (no traceback)."""


class HelpFormatter(argparse.HelpFormatter):
    """Adds ``(default: X)`` to the help of every option, unless the help already states its default (or that the
    option is required) in its own words; options without a value say ``(default: none)``. Switches
    (``store_true``) and positional arguments are left as they are."""

    def _get_help_string(self, action):
        text = action.help or ""
        default = action.default
        if (action.nargs == 0 or not action.option_strings or action.required or default is argparse.SUPPRESS
                or "%(default)" in text or re.search(r"\b(default|required)\b", text)):
            return text
        if default is None or default == []:
            shown = "none"
        else:
            shown = " ".join(str(v) for v in default) if isinstance(default, list | tuple) else "%(default)s"
        return f"{text} (default: {shown})" if text else f"default: {shown}"


class ArgumentParser(argparse.ArgumentParser):
    """The parser of ``trackfit`` and of each subcommand: :class:`HelpFormatter` unless another is given."""

    def __init__(self, *args, **kwargs):
        kwargs.setdefault("formatter_class", HelpFormatter)
        super().__init__(*args, **kwargs)


def translate_parameters(message: str, flags: Mapping[str, str]) -> str:
    """Replace each quoted Python parameter name of ``flags`` in ``message`` (``'n_bins'``) by its flag (``--bins``).

    Examples
    --------
    >>> translate_parameters("'n_bins' must be a positive multiple of 12 (got 10)", {"n_bins": "--bins"})
    '--bins must be a positive multiple of 12 (got 10)'
    """
    for name, flag in flags.items():
        message = re.sub(rf"(['\"]){re.escape(name)}\1", flag, message)
    return message


@contextlib.contextmanager
def flags_for_parameters(flags: Mapping[str, str]):
    """Inside the block, a ``ValueError`` whose message quotes a parameter of ``flags`` becomes a
    :class:`CommandError` that names the flag instead; other errors pass unchanged.

    Use it around a library call whose keyword arguments come from flags with other names, e.g.
    ``with flags_for_parameters({"n_bins": "--bins"}): measure_polarization(..., n_bins=args.bins)``.
    """
    try:
        yield
    except ValueError as err:
        text = str(err)
        translated = translate_parameters(text, flags)
        if translated == text:
            raise
        raise CommandError(translated) from None


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("trackfit")
    except PackageNotFoundError:
        return "0+unknown"


def build_parser() -> argparse.ArgumentParser:
    parser = ArgumentParser(
        prog="trackfit",
        description="Reconstruct, simulate and analyse events of a photoelectric X-ray polarimeter "
        "with a hexagonal-pixel readout.",
    )
    parser.add_argument("--version", action="version", version=f"trackfit {_version()}")
    parser.add_argument("--debug", action="store_true",
                        help=f"show the Python traceback of an error (also: {DEBUG_VARIABLE}=1 in the environment)")
    parser.add_argument("--allow-external-storage", action="store_true", dest="allow_external_everywhere",
                        help="let every reader of this command read data stored in other files (HDF5 external "
                        "links, external storage, virtual datasets with sources elsewhere); refused by default "
                        "(also: TRACKFIT_ALLOW_EXTERNAL_STORAGE=1 in the environment)")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=ArgumentParser)
    for name in COMMAND_MODULES:
        importlib.import_module(f"trackfit.commands.{name}").register(subparsers)
    return parser


#: environment variable that shows the traceback of every error, like the global ``--debug`` flag
DEBUG_VARIABLE = "TRACKFIT_DEBUG"

#: errors of the input or the environment: one line on stderr, exit status 2 (``OSError`` covers the file errors
#: of the readers and writers: missing, permission denied, read-only, no space left, is a directory, ...)
EXPECTED_ERRORS = (CommandError, OSError, ValueError, KeyError, IndexError, ImportError, MemoryError)

#: exit status of an input or environment error, and of an internal error (a defect of trackfit)
EXIT_ERROR, EXIT_INTERNAL = 2, 3


def describe_error(err: BaseException) -> str:
    """One line that says what went wrong, for a user: the message of our own errors, the path and the reason of
    an operating-system error (``'out/x.json': Read-only file system``), the key of a missing key."""
    if isinstance(err, KeyError) and err.args:
        return str(err.args[0])
    if isinstance(err, MemoryError):
        return f"out of memory{': ' + str(err) if str(err) else ''} (try fewer events per batch or fewer workers)"
    if isinstance(err, OSError) and err.strerror and err.filename is not None:
        if f"'{err.filename}'" in err.strerror:  # our own messages name the path (and the flag) already
            return err.strerror
        target = f"'{err.filename}'" + (f" -> '{err.filename2}'" if err.filename2 is not None else "")
        return f"{target}: {err.strerror}"
    return str(err)


def main(argv=None) -> int:
    """Run the ``trackfit`` command line; returns the exit status.

    Exit status 0: done; 2: bad input or a problem of the environment (one line on stderr, no traceback);
    3: an internal error of trackfit (one line asking for a report); 130: interrupted. The global ``--debug`` flag
    (before the subcommand) or ``TRACKFIT_DEBUG=1`` also prints the traceback.
    """
    import os

    argv = sys.argv[1:] if argv is None else list(argv)
    if argv == ["--version"]:  # answered before any subcommand (and numba) is imported
        print(f"trackfit {_version()}")
        return 0
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    if args.allow_external_everywhere:  # in the environment, so that worker processes inherit it
        from .io.structure import EXTERNAL_VARIABLE

        os.environ[EXTERNAL_VARIABLE] = "1"
    debug = args.debug or os.environ.get(DEBUG_VARIABLE, "").strip().lower() not in ("", "0", "false", "no")
    command = f"trackfit {args.command}"
    try:
        result = args.func(args)
    except KeyboardInterrupt:
        print(f"{command}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # the reader of our output went away (trackfit info ... | head): nothing to report
        with contextlib.suppress(OSError):
            sys.stdout = open(os.devnull, "w")  # noqa: SIM115 - keeps Python from failing again at exit
        return 1
    except EXPECTED_ERRORS as err:
        _print_traceback(debug)
        print(f"{command}: error: {describe_error(err)}", file=sys.stderr)
        return EXIT_ERROR
    except Exception as err:  # a defect of trackfit: say so in one line, the traceback on request
        _print_traceback(debug)
        print(f"{command}: internal error: {type(err).__name__}: {describe_error(err)} (rerun with --debug for "
              "the traceback; please report it)", file=sys.stderr)
        return EXIT_INTERNAL
    return int(result or 0)


def _print_traceback(debug: bool) -> None:
    if debug:
        import traceback

        traceback.print_exc(file=sys.stderr)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
