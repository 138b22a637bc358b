"""What every trackfit HDF5 writer shares: a file written under a temporary name and renamed when complete.

Data go to a *partial file* next to the final one, ``<name>.<host>-<pid>-<token>.partial``, created exclusively, so
two processes writing the same output never share (or truncate) one file. :meth:`PartialFileWriter.close` gives it
its final name, :meth:`~PartialFileWriter.abort` (also called when the ``with`` block raises) deletes it. A crash
therefore never leaves a file that looks complete, and a later writer of the same output deletes the partial files
of processes of this machine that no longer run.

Writes never fail inside HDF5. The library reaches the partial file through a file object of ours (h5py's
``fileobj`` driver), which records the first failed write (full disk, file-size limit, ...) and from then on
discards the bytes HDF5 sends. HDF5 thus always closes the file cleanly: an HDF5 dataset whose close fails on a
write error is left half-closed, and a later release of its identifier crashed the whole process (segmentation
fault). The writer looks at the record after every step and at the close, deletes the partial file and raises
:class:`~trackfit.io.errors.FileWriteError` naming the file and the cause.

The rename refuses to replace a file that appeared while the writer worked (another process wrote the same output),
unless overwriting was asked for: the final name is made with ``os.link``, which fails when the name exists, in one
step. Where the file system has no hard links it falls back to "check, then rename", with a window of a few
microseconds in which a file that appears would be replaced.
"""

from __future__ import annotations

import datetime as _dt
import errno
import os
import re
import secrets
import socket
from pathlib import Path
from typing import NoReturn

import h5py

from .errors import FileWriteError, describe_os_error

__all__ = ["PartialFileWriter", "now_utc", "append_rows", "partial_path", "partial_files", "remove_stale_partials",
           "write_text_file", "PARTIAL_SUFFIX"]

PARTIAL_SUFFIX = ".partial"
#: this machine, as it appears in the names of partial files (letters, digits and ``_`` only)
_HOST = re.sub(r"[^A-Za-z0-9]", "_", socket.gethostname())[:40] or "host"
#: ``<name>.<host>-<pid>-<token>.partial``; ``<name>.partial`` (older trackfit versions) is recognised too
_PARTIAL_NAME = re.compile(r"(?P<name>.+?)(?:\.(?P<host>[A-Za-z0-9_]+)-(?P<pid>\d+)-(?P<token>[0-9a-f]+))?\.partial")


def now_utc() -> str:
    """The current time as ISO 8601 UTC text, to the second (``2026-12-02T05:15:39Z``)."""
    return _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def append_rows(dataset: h5py.Dataset, values) -> None:
    """Grow a resizable dataset along its first axis by ``values``."""
    n = dataset.shape[0]
    dataset.resize((n + len(values), *dataset.shape[1:]))
    dataset[n:] = values


def partial_path(path) -> Path:
    """A new partial-file name for ``path``, unique to this process: ``<name>.<host>-<pid>-<token>.partial``."""
    path = Path(path)
    return path.with_name(f"{path.name}.{_HOST}-{os.getpid()}-{secrets.token_hex(4)}{PARTIAL_SUFFIX}")


def partial_files(path) -> list[Path]:
    """The partial files of ``path`` in its folder (of running writers, or left by interrupted ones)."""
    path = Path(path)
    folder = path.parent
    try:
        names = os.listdir(folder if str(folder) else ".")
    except OSError:
        return []
    found = []
    for name in names:
        match = _PARTIAL_NAME.fullmatch(name)
        if match and match.group("name") == path.name:
            found.append(folder / name)
    return sorted(found)


def _process_runs(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:  # exists, but belongs to someone else
        return True
    return True


def remove_stale_partials(path) -> list[Path]:
    """Delete the partial files of ``path`` left by processes of this machine that no longer run; returns them.

    Partial files of running processes, of other machines (a shared folder) and of older trackfit versions
    (``<name>.partial``, whose writer is unknown) are kept.
    """
    removed = []
    for partial in partial_files(path):
        match = _PARTIAL_NAME.fullmatch(partial.name)
        if match.group("pid") is None or match.group("host") != _HOST or int(match.group("pid")) == os.getpid():
            continue
        if not _process_runs(int(match.group("pid"))):
            try:
                partial.unlink()
                removed.append(partial)
            except OSError:
                pass
    return removed


def _read_at(fd: int, view: memoryview, offset: int) -> int:
    """Read into ``view`` from ``offset``; returns the bytes read (0 at the end of the file)."""
    if hasattr(os, "preadv"):
        return os.preadv(fd, [view], offset)
    os.lseek(fd, offset, os.SEEK_SET)  # pragma: no cover - systems without preadv
    data = os.read(fd, len(view))  # pragma: no cover
    view[:len(data)] = data  # pragma: no cover
    return len(data)  # pragma: no cover


class _GuardedFile:
    """The file object HDF5 writes through (h5py's ``fileobj`` driver): positioned reads and writes on a descriptor.

    A failed write or truncation is recorded in :attr:`failure` and never reported to HDF5; later writes are
    discarded. HDF5 therefore never sees a write error (see the module docstring); the writer raises instead.
    """

    def __init__(self, fd: int):
        self.fd = fd
        self.position = 0
        self.failure: OSError | None = None

    # --- what the fileobj driver calls
    def seek(self, offset, whence=os.SEEK_SET):
        if whence == os.SEEK_SET:
            self.position = int(offset)
        elif whence == os.SEEK_CUR:
            self.position += int(offset)
        else:
            self.position = os.fstat(self.fd).st_size + int(offset)
        return self.position

    def tell(self):
        return self.position

    def readinto(self, buffer):
        view = memoryview(buffer).cast("B")
        done = 0
        while done < len(view):
            n = _read_at(self.fd, view[done:], self.position + done)
            if n == 0:  # past the end (HDF5 reads zeros there)
                break
            done += n
        self.position += done
        return done

    def read(self, size=-1):
        if size is None or size < 0:
            size = max(0, os.fstat(self.fd).st_size - self.position)
        buffer = bytearray(size)
        n = self.readinto(buffer)
        return bytes(buffer[:n])

    def write(self, data):
        view = memoryview(data).cast("B")
        if self.failure is None:
            done = 0
            try:
                while done < len(view):
                    done += self._write_at(view[done:], self.position + done)
            except Exception as err:  # noqa: BLE001 - nothing may reach HDF5 (see the module docstring)
                self.failure = err if isinstance(err, OSError) else OSError(errno.EIO, f"{type(err).__name__}: {err}")
        self.position += len(view)
        return len(view)

    def _write_at(self, view, offset: int) -> int:
        """One positioned write; returns the bytes written (the seam the fault tests replace)."""
        if hasattr(os, "pwrite"):
            return os.pwrite(self.fd, view, offset)
        os.lseek(self.fd, offset, os.SEEK_SET)  # pragma: no cover - systems without pwrite
        return os.write(self.fd, view)  # pragma: no cover

    def truncate(self, size=None):
        size = self.position if size is None else int(size)
        if self.failure is None:
            try:
                os.ftruncate(self.fd, size)
            except Exception as err:  # noqa: BLE001 - nothing may reach HDF5
                self.failure = err if isinstance(err, OSError) else OSError(errno.EIO, f"{type(err).__name__}: {err}")
        return size

    def flush(self):
        pass

    # --- ours
    def close(self) -> None:
        """Close the descriptor (a network file system may report a full disk only here)."""
        fd, self.fd = self.fd, -1
        if fd < 0:
            return
        try:
            os.close(fd)
        except OSError as err:
            if self.failure is None:
                self.failure = err


def _open_exclusive(path: Path) -> int:
    """Create ``path`` for reading and writing; fails if it exists (the seam tests use to inject faults)."""
    flags = os.O_RDWR | os.O_CREAT | os.O_EXCL | getattr(os, "O_CLOEXEC", 0) | getattr(os, "O_BINARY", 0)
    return os.open(path, flags, 0o666)


def _write_error(path: Path, err: OSError) -> FileWriteError:
    return FileWriteError(path, describe_os_error(err, path), errno=getattr(err, "errno", None))


def _give_final_name(partial: Path, path: Path, *, overwrite: bool) -> None:
    """Rename ``partial`` to ``path``; without ``overwrite``, refuse when ``path`` exists (see the module docstring).

    Raises FileWriteError (the partial file is left for the caller to delete).
    """
    if overwrite:
        try:
            os.replace(partial, path)
        except OSError as err:
            raise _write_error(path, err) from None
        return
    try:
        os.link(partial, path)  # atomic: fails if `path` exists
    except FileExistsError:
        raise _appeared(path) from None
    except OSError as err:
        if err.errno not in (errno.EPERM, errno.ENOTSUP, errno.EOPNOTSUPP, errno.EXDEV, errno.EMLINK, errno.ENOSYS):
            raise _write_error(path, err) from None
        # no hard links here: check, then rename (a file appearing between the two lines would be replaced)
        if os.path.lexists(path):
            raise _appeared(path) from None
        try:
            os.rename(partial, path)
        except OSError as err2:
            raise _write_error(path, err2) from None
        return
    try:
        os.unlink(partial)
    except OSError:  # pragma: no cover - the complete file has its name; a second name is only untidy
        pass


def _appeared(path: Path) -> FileWriteError:
    return FileWriteError(path, f"another process wrote '{path}' while this one was writing it: that file is kept "
                                "and this one removed (pass overwrite=True, or --overwrite, to replace it)",
                          errno=errno.EEXIST)


class PartialFileWriter:
    """Base of the writers: opens a new partial file and writes the root attributes of our formats.

    Subclasses call :meth:`_open` first in ``__init__`` and build their layout inside ``try: ... except
    BaseException as err: self.fail(err)``, so a bad argument never leaves a stray partial file behind. They
    call :meth:`check_writes` after each step that writes a lot (appends), so a full disk is reported at once.
    """

    format_name = ""
    format_version = 0

    def _open(self, path, *, overwrite: bool, created_by: str | None = None, created_utc: str | None = None):
        from .. import __version__

        self.path = Path(path)
        self._overwrite = bool(overwrite)
        if self.path.exists() and not overwrite:
            raise FileExistsError(f"'{self.path}' exists; pass overwrite=True to replace it")
        if self.path.is_dir():
            raise FileWriteError(self.path, "it is a folder", errno=errno.EISDIR)
        remove_stale_partials(self.path)
        self._partial = partial_path(self.path)
        try:
            fd = _open_exclusive(self._partial)
        except OSError as err:
            self._partial = None  # not ours: never delete it
            raise _write_error(self.path, err) from None
        self._io = _GuardedFile(fd)
        try:
            self._file = h5py.File(self._io, "w")
            attrs = self._file.attrs
            attrs["trackfit_format"] = self.format_name
            attrs["format_version"] = self.format_version
            attrs["created_by"] = created_by or f"trackfit {__version__}"
            attrs["created_utc"] = created_utc or now_utc()
            self.check_writes()
        except BaseException as err:
            self.fail(err)
        return self._file

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            self.close()
            return False
        replacement = self._abort_after(exc)
        if replacement is not None:
            raise replacement from exc
        return False

    @property
    def closed(self) -> bool:
        return getattr(self, "_file", None) is None

    @property
    def partial_path(self) -> Path | None:
        """The partial file being written (None once closed or aborted)."""
        return None if self.closed else self._partial

    def check_writes(self) -> None:
        """Raise FileWriteError (after deleting the partial file) if a write to the file has failed."""
        io = getattr(self, "_io", None)
        if io is not None and io.failure is not None:
            failure = io.failure
            self.abort()
            raise _write_error(self.path, failure)

    def close(self) -> Path:
        """Finish the file and give it its final name; returns the path.

        Raises
        ------
        FileWriteError
            The file could not be written (full disk, file-size limit, ...) or, without ``overwrite``, another
            process wrote ``path`` meanwhile; the partial file is deleted.
        """
        if self.closed:
            return self.path
        try:
            self._finish()
            self.check_writes()
        except BaseException as err:
            self.fail(err)
        self._close_file()
        failure = self._io.failure
        try:
            if failure is not None:
                raise _write_error(self.path, failure)
            _give_final_name(self._partial, self.path, overwrite=self._overwrite)
        except BaseException:
            self._remove_partial()
            raise
        self._partial = None
        return self.path

    def _finish(self) -> None:
        """Hook: last writes before the file is closed."""

    def _close_file(self) -> None:
        f, self._file = self._file, None
        try:
            f.close()
        except (OSError, RuntimeError, ValueError) as err:  # pragma: no cover - writes cannot fail inside HDF5
            if self._io.failure is None:
                self._io.failure = err if isinstance(err, OSError) else OSError(errno.EIO, str(err))
        self._io.close()

    def _remove_partial(self) -> None:
        partial = getattr(self, "_partial", None)
        if partial is not None:
            try:
                partial.unlink(missing_ok=True)
            except OSError:  # pragma: no cover - e.g. the folder became read-only meanwhile
                pass

    def _abort_after(self, error: BaseException) -> FileWriteError | None:
        """Abort after ``error``; returns the FileWriteError to raise instead when a write had failed before
        (``error`` is then its consequence, e.g. HDF5 reading back bytes that were never written)."""
        io = getattr(self, "_io", None)
        failure = None if io is None else io.failure
        self.abort()
        if failure is None or not isinstance(error, Exception) or isinstance(error, FileWriteError):
            return None
        return _write_error(self.path, failure)

    def fail(self, error: BaseException) -> NoReturn:
        """Abort after ``error`` and raise: :class:`FileWriteError` (caused by ``error``) when a write to the file
        had failed before, else ``error`` itself. For ``except BaseException as err: writer.fail(err)``."""
        replacement = self._abort_after(error)
        if replacement is not None:
            raise replacement from error
        raise error

    def abort(self) -> None:
        """Close and delete the partial file (the final name is never created)."""
        if not self.closed:
            try:
                self._close_file()
            except Exception:  # noqa: BLE001, S110 - the error that made us abort is the one reported
                pass
        self._remove_partial()


def write_text_file(path, text: str, *, overwrite: bool = True) -> Path:
    """Write a small text file (JSON summaries, plans) under a partial name and rename it when complete.

    Concurrent writers of one file never mix their text: each writes its own partial file and the last rename
    wins (with ``overwrite=False`` a file that exists, or appears meanwhile, is never replaced).

    Raises
    ------
    FileWriteError
        Full disk, permission denied, ...; the partial file is deleted.
    """
    path = Path(path)
    if not overwrite and os.path.lexists(path):
        raise FileExistsError(f"'{path}' exists; pass overwrite=True to replace it")
    partial = partial_path(path)
    try:
        fd = _open_exclusive(partial)
    except OSError as err:
        raise _write_error(path, err) from None
    io = _GuardedFile(fd)
    try:
        try:
            io.write(text.encode())
        finally:
            io.close()
        if io.failure is not None:
            raise _write_error(path, io.failure)
        _give_final_name(partial, path, overwrite=overwrite)
    except OSError as err:
        partial.unlink(missing_ok=True)
        if isinstance(err, FileWriteError):
            raise
        raise _write_error(path, err) from None
    except BaseException:
        partial.unlink(missing_ok=True)
        raise
    return path
