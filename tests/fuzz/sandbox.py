"""Run each fuzz input in a child process with a time limit, and classify what happened.

A hang inside the HDF5 library or a compiled kernel cannot be interrupted from Python (a signal handler runs only
between bytecodes), so every input goes to a long-lived child process started with the ``spawn`` method (numba's
threading layer hangs in forked children). The parent waits at most ``timeout_s`` for the answer; a child that does
not answer is killed (by its own process handle) and replaced, and the input is reported as a hang. A child that
dies (a segfault) is reported as such.

The child answers with an :class:`Outcome`: the value the probe returned, or the exception it raised, described
with the facts the contract needs (the class, whether it is one of trackfit's own error types, where it was
raised, its message), since exception objects themselves do not always survive pickling.
"""

from __future__ import annotations

import contextlib
import io
import multiprocessing
import os
import traceback
from dataclasses import dataclass, field

__all__ = ["Outcome", "Sandbox", "our_error_names", "describe_exception"]

#: how long one input may take (s); generous, the machine is shared and a first call loads the numba cache
DEFAULT_TIMEOUT_S = 30.0


@dataclass
class Outcome:
    """What one input did: ``kind`` is "accepted", "raised", "hang" or "died"."""

    kind: str
    value: object = None
    error_type: str = ""
    error_module: str = ""
    ours: bool = False
    raised_in_trackfit: bool = False
    message: str = ""
    traceback: str = ""
    exitcode: int | None = None
    bases: tuple = ()
    extra: dict = field(default_factory=dict)

    def __str__(self):
        if self.kind == "accepted":
            return "accepted"
        if self.kind == "raised":
            return f"raised {self.error_module}.{self.error_type}: {self.message}\n{self.traceback}"
        return f"{self.kind} (exit code {self.exitcode})"


def our_error_names() -> tuple:
    """trackfit's own error types for bad input (imported in the process that classifies)."""
    from trackfit.analysis.calfile import CalibrationFormatError
    from trackfit.events import EventBatchError
    from trackfit.io.pixelmap import PixelMapFormatError
    from trackfit.io.raw import RawFormatError
    from trackfit.io.table import TableFormatError
    from trackfit.response import ResponseFormatError
    from trackfit.simulate.config import ConfigError

    types = [RawFormatError, TableFormatError, CalibrationFormatError, PixelMapFormatError, ResponseFormatError,
             EventBatchError, ConfigError]
    try:  # the common base of the file errors, and the writers' error
        from trackfit.io import errors

        types += [getattr(errors, name) for name in ("FileFormatError", "FileWriteError") if hasattr(errors, name)]
    except ImportError:
        pass
    try:
        from trackfit.recon.config import ConfigError as ReconConfigError

        types.append(ReconConfigError)
    except ImportError:
        pass
    return tuple(types)


def describe_exception(err: BaseException) -> Outcome:
    """An :class:`Outcome` of kind "raised" describing ``err`` (its innermost frame tells where it was raised)."""
    frames = traceback.extract_tb(err.__traceback__)
    innermost = frames[-1].filename if frames else ""
    package = os.path.dirname(os.path.dirname(os.path.abspath(__import__("trackfit").__file__)))
    return Outcome(kind="raised", error_type=type(err).__qualname__, error_module=type(err).__module__,
                   ours=isinstance(err, our_error_names()),
                   bases=tuple(cls.__name__ for cls in type(err).__mro__),
                   raised_in_trackfit=innermost.startswith(os.path.join(package, "trackfit")),
                   message=str(err.args[0]) if isinstance(err, KeyError) and err.args else str(err),
                   traceback="".join(traceback.format_exception(err)),
                   extra={"event": getattr(err, "event", None), "dataset": getattr(err, "dataset", None)})


#: environment variables that change what trackfit accepts or prints; the child tests the defaults
NEUTRALISED = ("TRACKFIT_ALLOW_EXTERNAL_STORAGE", "TRACKFIT_DEBUG")


def _serve(connection):
    """Child process: answer ``(function, args, kwargs)`` requests until the parent closes the pipe."""
    for name in NEUTRALISED:
        os.environ.pop(name, None)
    while True:
        try:
            request = connection.recv()
        except EOFError:
            return
        function, args, kwargs = request
        try:
            outcome = Outcome(kind="accepted", value=function(*args, **kwargs))
        except BaseException as err:  # noqa: BLE001 - every exception is a finding to classify
            outcome = describe_exception(err)
        connection.send(outcome)


class Sandbox:
    """A child process that runs probe functions with a time limit per call.

    ``warm_up`` (a module-level function) runs once in each new child before the first input, outside the time
    limit of the inputs (it loads the compiled kernels).
    """

    def __init__(self, warm_up=None, *, timeout_s: float = DEFAULT_TIMEOUT_S, warm_up_timeout_s: float = 600.0):
        self.warm_up = warm_up
        self.timeout_s = timeout_s
        self.warm_up_timeout_s = warm_up_timeout_s
        self._context = multiprocessing.get_context("spawn")
        self._process = None
        self._connection = None
        self.restarts = 0

    def _start(self):
        parent, child = self._context.Pipe()
        self._process = self._context.Process(target=_serve, args=(child,), daemon=False, name="trackfit-fuzz-child")
        self._process.start()
        child.close()
        self._connection = parent
        if self.warm_up is not None:
            outcome = self._call(self.warm_up, (), {}, self.warm_up_timeout_s)
            if outcome.kind != "accepted":
                raise RuntimeError(f"the fuzz child process did not start: {outcome}")

    def _stop(self):
        if self._process is not None:
            if self._process.is_alive():
                self._process.kill()
            self._process.join(timeout=30)
            self._connection.close()
        self._process = None
        self._connection = None

    def _call(self, function, args, kwargs, timeout_s):
        try:
            self._connection.send((function, args, kwargs))
            if self._connection.poll(timeout_s):
                return self._connection.recv()
            kind = "hang"
        except (EOFError, BrokenPipeError, ConnectionResetError):
            kind = "died"
        self._process.join(timeout=0.5 if kind == "died" else 0)
        exitcode = self._process.exitcode
        self._stop()
        self.restarts += 1
        return Outcome(kind=kind, exitcode=exitcode)

    def run(self, function, *args, timeout_s: float | None = None, **kwargs) -> Outcome:
        """``function(*args, **kwargs)`` in the child (a module-level function and picklable arguments)."""
        if self._process is None or not self._process.is_alive():
            self._stop()
            self._start()
        return self._call(function, args, kwargs, self.timeout_s if timeout_s is None else timeout_s)

    def close(self):
        if self._connection is not None:
            self._connection.close()
        if self._process is not None:
            self._process.join(timeout=10)
        self._stop()


def captured(function, *args, **kwargs):
    """``function(*args, **kwargs)`` with stdout and stderr captured: returns (value or SystemExit code, out, err)."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            value = function(*args, **kwargs)
        except SystemExit as exit_:
            value = exit_.code
    return value, out.getvalue(), err.getvalue()
