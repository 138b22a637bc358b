"""The errors of trackfit's file writers (and, beside them, of its readers).

:class:`FileWriteError` is what every writer raises when the file cannot be written: full disk, file-size limit,
permission denied, read-only file system, missing folder, or another process that wrote the same output meanwhile.
It is an :class:`OSError`, names the final file and the cause in words, and keeps the ``errno`` of the system error
behind it. The writer has removed its partial file when it raises.
"""

from __future__ import annotations

import errno as _errno
import os
from pathlib import Path

__all__ = ["FileWriteError", "describe_os_error"]

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
