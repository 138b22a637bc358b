"""The errors of trackfit's files: what readers raise for a file that does not follow its format, and what writers
raise when a file cannot be written.

:class:`FileFormatError` is the base of every reader's format error (``RawFormatError``, ``TableFormatError``,
``CalibrationFormatError``, ``PixelMapFormatError``, ``ResponseFormatError``), so a caller can catch them all at
once; each names the file, and where it applies the dataset (or attribute owner) and the first bad event:
``file '<path>', dataset '<name>', event N: <what was expected> (got ...)``.

:class:`FileWriteError` is what every writer raises when the file cannot be written: full disk, file-size limit,
permission denied, read-only file system, missing folder, or another process that wrote the same output meanwhile.
It is an :class:`OSError`, names the final file and the cause in words, and keeps the ``errno`` of the system error
behind it. The writer has removed its partial file when it raises.
"""


from __future__ import annotations

import errno as _errno
import os
from pathlib import Path

__all__ = ["FileFormatError", "FileWriteError", "describe_os_error"]

#: causes of failed writes, in the words of the messages (other errno values use the system's own text)
_CAUSES = {
    _errno.ENOSPC: "no space left on device",
    _errno.EFBIG: "file size limit reached",
    _errno.EDQUOT: "disk quota exceeded",
    _errno.EACCES: "permission denied",
    _errno.EPERM: "permission denied",
    _errno.EROFS: "read-only file system",
    _errno.EISDIR: "it is a folder",
    _errno.EIO: "input/output error of the device",
}


def describe_os_error(err: OSError, path=None) -> str:
    """The cause of a failed write in words: ``no space left on device``, ``file size limit reached``,
    ``permission denied``, ``folder '<parent>' does not exist``, ... (the system's text for other errors).

    Examples
    --------
    >>> import errno
    >>> describe_os_error(OSError(errno.ENOSPC, "No space left on device"))
    'no space left on device'
    >>> describe_os_error(FileNotFoundError(errno.ENOENT, "No such file or directory"), "out/run.h5")
    "folder 'out' does not exist"
    """
    code = getattr(err, "errno", None)
    if code == _errno.ENOENT and path is not None:
        return f"folder '{Path(path).parent}' does not exist"
    if code == _errno.ENOTDIR and path is not None:
        return f"'{Path(path).parent}' is not a folder"
    if code in _CAUSES:
        return _CAUSES[code]
    if code is not None:
        return os.strerror(code).lower()
    return str(err) or type(err).__name__


class FileWriteError(OSError):
    """A file that could not be written; names the file and the cause. The partial file is already removed.

    Parameters
    ----------
    path : str or Path
        The file the writer was asked to create (its final name, not the partial file).
    cause : str
        What went wrong, in words (``no space left on device``, ``permission denied``, ...).
    errno : int, optional
        The system error number behind it (``errno.ENOSPC``, ...), as :attr:`OSError.errno`.

    Examples
    --------
    >>> import errno
    >>> err = FileWriteError("run_events.h5", "no space left on device", errno=errno.ENOSPC)
    >>> print(err)
    cannot write file 'run_events.h5': no space left on device
    >>> err.errno == errno.ENOSPC, err.path
    (True, 'run_events.h5')
    """

    def __init__(self, path, cause: str, *, errno: int | None = None):
        self.path = str(path)
        self.cause = str(cause)
        super().__init__(f"cannot write file '{self.path}': {self.cause}")
        self.errno = errno  # set after: OSError(errno, text) would prefix the message with "[Errno N]"

    def __reduce__(self):  # picklable across process pools (the constructor takes keywords)
        return _rebuild, (type(self), self.path, self.cause, self.errno)


def _rebuild(cls, path, cause, errno):
    return cls(path, cause, errno=errno)


class FileFormatError(ValueError):
    """A file that does not follow its trackfit format (or is not a file trackfit can read at all).

    Parameters
    ----------
    path : str or Path
        The file.
    message : str
        What was expected and what was found.
    dataset : str, optional
        The HDF5 object concerned (``"/"`` for the root attributes).
    event : int, optional
        The first bad event (row) where one is concerned.

    Attributes
    ----------
    path : str
    dataset : str or None
    event : int or None
    reason : str
        ``message`` alone, without the location.
    """

    def __init__(self, path, message, *, dataset=None, event=None):
        self.path = str(path)
        self.dataset = dataset
        self.event = event
        self.reason = str(message)
        where = [f"file '{self.path}'"]
        if dataset is not None:
            where.append(f"dataset '{dataset}'")
        if event is not None:
            where.append(f"event {event}")
        super().__init__(f"{', '.join(where)}: {message}")

    def __reduce__(self):  # picklable (errors cross process pools)
        return (_rebuild_format_error, (type(self), self.args, dict(self.__dict__)))


def _rebuild_format_error(cls, args, state):
    error = cls.__new__(cls)
    Exception.__init__(error, *args)
    error.__dict__.update(state)
    return error
