"""What every trackfit HDF5 writer shares: a file written under a temporary name and renamed when complete.

Data go to ``<path>.partial``; :meth:`PartialFileWriter.close` renames it to ``path``, :meth:`abort` (also called
when the ``with`` block raises) deletes it. A crash therefore never leaves a file that looks complete.
"""

from __future__ import annotations

import datetime as _dt
import os
from pathlib import Path

import h5py

__all__ = ["PartialFileWriter", "now_utc", "append_rows"]


def now_utc() -> str:
    """The current time as ISO 8601 UTC text, to the second (``2026-12-02T05:15:39Z``)."""
    return _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def append_rows(dataset: h5py.Dataset, values) -> None:
    """Grow a resizable dataset along its first axis by ``values``."""
    n = dataset.shape[0]
    dataset.resize((n + len(values), *dataset.shape[1:]))
    dataset[n:] = values


class PartialFileWriter:
    """Base of the writers: opens ``<path>.partial`` and writes the root attributes of our formats.

    Subclasses call :meth:`_open` first in ``__init__`` and build their layout inside ``try: ... except:
    self.abort(); raise``, so a bad argument never leaves a stray partial file behind.
    """

    format_name = ""
    format_version = 0

    def _open(self, path, *, overwrite: bool, created_by: str | None = None, created_utc: str | None = None):
        from .. import __version__

        self.path = Path(path)
        if self.path.exists() and not overwrite:
            raise FileExistsError(f"'{self.path}' exists; pass overwrite=True to replace it")
        self._partial = self.path.with_name(self.path.name + ".partial")
        self._file = h5py.File(self._partial, "w")
        attrs = self._file.attrs
        attrs["trackfit_format"] = self.format_name
        attrs["format_version"] = self.format_version
        attrs["created_by"] = created_by or f"trackfit {__version__}"
        attrs["created_utc"] = created_utc or now_utc()
        return self._file

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            self.close()
        else:
            self.abort()
        return False

    @property
    def closed(self) -> bool:
        return getattr(self, "_file", None) is None

    def close(self) -> Path:
        """Finish the file and give it its final name; returns the path."""
        if self.closed:
            return self.path
        try:
            self._finish()
        except BaseException:
            self.abort()
            raise
        self._file.close()
        self._file = None
        os.replace(self._partial, self.path)
        return self.path

    def _finish(self) -> None:
        """Hook: last writes before the file is closed."""

    def abort(self) -> None:
        """Close and delete the partial file (the final name is never created)."""
        if not self.closed:
            self._file.close()
            self._file = None
        partial = getattr(self, "_partial", None)
        if partial is not None:
            partial.unlink(missing_ok=True)
