"""Subcommands of the ``trackfit`` command line, one module each (see :mod:`trackfit.cli`)."""
