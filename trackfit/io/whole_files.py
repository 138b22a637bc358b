"""Files other than our HDF5 formats (figures, JSON, text) written whole or not at all.

The bytes go to a temporary file of a unique name in the target's folder, which is renamed to the target only when
it is complete (a rename within one folder is atomic on POSIX and Windows file systems); when writing fails (no
space left, a file-size limit, an interrupt) the temporary file is removed and the target is left as it was. The
HDF5 writers have their own base with the same promise (:mod:`trackfit.io._partial`).
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path

__all__ = ["replaced_when_complete", "write_text_whole", "save_figure_whole", "check_output_file",
           "make_output_folder"]


@contextlib.contextmanager
def replaced_when_complete(path, *, overwrite: bool = True) -> Iterator[Path]:
    """Yield a temporary path next to ``path``; when the block ends without an error, rename it to ``path``.

    The temporary name keeps the suffix of ``path`` (libraries that choose a format from the suffix, such as
    matplotlib, see the right one) and is unique per call (``.<name>.<random>.tmp<suffix>``), so two processes
    writing the same target never write into one file.

    Parameters
    ----------
    path : str or Path
        The file to write.
    overwrite : bool
        Whether an existing ``path`` may be replaced; when False and ``path`` exists (also when it appears while
        the block runs), ``FileExistsError`` is raised and the temporary file is removed.

    Raises
    ------
    FileExistsError
        ``path`` exists and ``overwrite`` is False.
    trackfit.io.errors.FileWriteError
        The folder cannot be written (permission denied, read-only, no space left, ...); an ``OSError`` naming
        ``path`` and the cause.
    """
    path = Path(path)
    if not overwrite and path.exists():
        raise FileExistsError(f"'{path}' exists; pass --overwrite to replace it")
    try:
        handle, name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=f".tmp{path.suffix}", dir=path.parent)
    except OSError as err:
        raise _naming(err, path) from None
    os.close(handle)
    temporary = Path(name)
    try:
        yield temporary
        if overwrite:
            os.replace(temporary, path)
        else:  # a hard link refuses an existing target, even one that appeared meanwhile
            os.link(temporary, path)
            temporary.unlink()
    except OSError as err:
        temporary.unlink(missing_ok=True)
        raise _naming(err, path) from None
    except BaseException:
        temporary.unlink(missing_ok=True)
        raise


def _naming(err: OSError, path: Path) -> OSError:
    """The error to raise for ``err``, naming ``path`` (what a user asked for, not our temporary name)."""
    from .errors import FileWriteError, describe_os_error

    if isinstance(err, FileExistsError):
        return FileExistsError(err.errno, f"'{path}' appeared while it was being written; pass --overwrite to "
                               "replace it", str(path))
    if isinstance(err, FileWriteError):
        return err
    return FileWriteError(path, describe_os_error(err, path), errno=err.errno)


def write_text_whole(path, text: str, *, overwrite: bool = True) -> Path:
    """Write ``text`` (UTF-8) to ``path`` whole or not at all (:func:`replaced_when_complete`); returns the path."""
    with replaced_when_complete(path, overwrite=overwrite) as temporary:
        temporary.write_text(text, encoding="utf-8")
    return Path(path)


def save_figure_whole(fig, path, **savefig_kwargs) -> Path:
    """Save a matplotlib figure to ``path`` whole or not at all, then close it; returns the path."""
    import matplotlib.pyplot as plt

    try:
        with replaced_when_complete(path) as temporary:
            fig.savefig(temporary, **savefig_kwargs)
    finally:
        plt.close(fig)
    return Path(path)


def check_output_file(path, *, flag: str, overwrite: bool = False) -> Path:
    """Check, before any work, that ``path`` can be written as a new file; the error names ``flag``.

    Parameters
    ----------
    path : str or Path
        The output file.
    flag : str
        The command-line flag (or the words) that gave it, e.g. ``"-o/--output"``.
    overwrite : bool
        Whether an existing file may be replaced.

    Raises
    ------
    FileExistsError
        ``path`` exists and ``overwrite`` is False.
    OSError
        ``path`` is a folder, its folder does not exist, is not a folder, or cannot be written (permission
        denied, read-only file system); the message names the path and the flag.
    """
    import errno

    path = Path(path)
    folder = path.parent
    if path.is_dir():
        raise IsADirectoryError(errno.EISDIR, f"{flag} '{path}' is a folder, not a file", str(path))
    if path.exists() and not overwrite:
        raise FileExistsError(errno.EEXIST, f"{flag} '{path}' exists; pass --overwrite to replace it",
                              str(path))
    if not folder.exists():
        raise FileNotFoundError(errno.ENOENT, f"{flag} '{path}': the folder '{folder}' does not exist",
                                str(path))
    if not folder.is_dir():
        raise NotADirectoryError(errno.ENOTDIR, f"{flag} '{path}': '{folder}' is not a folder", str(path))
    _check_writable(folder, path, flag)
    return path


def make_output_folder(path, *, flag: str) -> Path:
    """Create the folder ``path`` (and its parents) if needed and check that files can be written into it.

    Raises
    ------
    OSError
        It cannot be created or written (a file of that name, permission denied, read-only file system); the
        message names the path and the flag.
    """
    path = Path(path)
    try:
        path.mkdir(parents=True, exist_ok=True)
    except FileExistsError:
        import errno

        raise NotADirectoryError(errno.ENOTDIR, f"{flag} '{path}': a file of that name exists, not a folder",
                                 str(path)) from None
    except OSError as err:
        raise type(err)(err.errno, f"{flag} '{path}': cannot create the folder ({_reason(err)})",
                        str(path)) from None
    _check_writable(path, path, flag)
    return path


def _check_writable(folder: Path, path: Path, flag: str) -> None:
    """Create and remove a temporary file in ``folder``: the one check that also holds for read-only file systems,
    access control lists and the superuser. ``path`` is the output file, or ``folder`` itself for an output
    folder."""
    from .errors import FileWriteError

    try:
        handle, name = tempfile.mkstemp(prefix=".trackfit-write-check.", dir=folder)
    except OSError as err:
        if path == folder:
            raise type(err)(err.errno, f"{flag} '{folder}': cannot write into the folder ({_reason(err)})",
                            str(folder)) from None
        raise FileWriteError(path, f"{_reason(err)} (checked before any work; the folder '{folder}', given with "
                             f"{flag})", errno=err.errno) from None
    os.close(handle)
    os.unlink(name)


def _reason(err: OSError) -> str:
    """The operating system's reason in words (``read-only file system``, ``permission denied``)."""
    from .errors import describe_os_error

    return describe_os_error(err)
