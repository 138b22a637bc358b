"""Ranges of an uncompressed 1-D dataset read straight from the file's bytes: viewed through a memory map without a
copy, or copied with one system call per run of consecutive bytes.

Reading a range of a dataset through HDF5 copies its bytes from the operating system's file cache into memory of
the process. For the signal of a raw event file (tens of MB per 10^5 events, read once and checked once) that copy
is a sizeable part of the work around the reconstruction kernel. When the dataset is stored uncompressed, as little
endian int16, either contiguous or in chunks laid out one after the other in the file, a range of it is a range of
bytes of the file: :class:`MappedRanges` maps those bytes (copy-on-write: writing into the array never changes the
file) and returns an array over them. When the chunks of a range do not follow each other in the file (a file
written by many appends interleaves the chunks of its datasets), :meth:`MappedRanges.read_into` copies the range
run by run into the caller's array: one copy, where HDF5 makes two (through its chunk cache). Anything else -
filters, another byte order, chunks not yet written, bytes beyond the end of the file - gives None or False, and
the caller reads through HDF5 as usual.

Each range has a mapping of its own, released when the last array over it is freed, so the memory a stream of
batches keeps mapped is bounded by the batches alive, not by the file size.

A file shortened by another process while one of its ranges is mapped makes the operating system stop this one
(SIGBUS) when the missing bytes are touched: do not truncate or rewrite a raw file while it is being read.
"""

from __future__ import annotations

import mmap
import os

import h5py
import numpy as np

__all__ = ["MappedRanges"]


class MappedRanges:
    """Zero-copy views of element ranges of one uncompressed 1-D HDF5 dataset.

    Parameters
    ----------
    path : str or Path
        The file holding the dataset (opened again, read-only, for the mappings).
    dataset : h5py.Dataset
        Open 1-D dataset of that file.
    dtype : numpy dtype
        The in-memory dtype the caller wants; views are given only when the stored type is exactly this one.
    """

    def __init__(self, path, dataset: h5py.Dataset, dtype):
        self._fd: int | None = None
        self._dtype = np.dtype(dtype)
        self._contiguous_offset: int | None = None
        self._chunk: int | None = None
        self._dataset = dataset
        self.usable = self._examine(dataset)
        if self.usable:
            try:
                self._fd = os.open(path, os.O_RDONLY)
            except OSError:
                self.usable = False

    def _examine(self, dataset: h5py.Dataset) -> bool:
        try:
            if dataset.ndim != 1 or dataset.dtype != self._dtype or self._dtype.byteorder == ">":
                return False
            plist = dataset.id.get_create_plist()
            if plist.get_nfilters() != 0 or plist.get_external_count() != 0:
                return False
            layout = plist.get_layout()
            if layout == h5py.h5d.CONTIGUOUS:
                self._contiguous_offset = dataset.id.get_offset()
                return self._contiguous_offset is not None
            if layout == h5py.h5d.CHUNKED:
                self._chunk = int(plist.get_chunk()[0])
                return self._chunk > 0
        except (OSError, RuntimeError, ValueError, KeyError, TypeError):
            pass  # whatever HDF5 cannot tell: read through it instead
        return False

    def _runs(self, start: int, stop: int) -> list[tuple[int, int, int]] | None:
        """Elements ``start <= i < stop`` as runs of consecutive bytes of the file: list of (file offset, first
        element, number of elements), in element order; None when some chunk is not stored plainly."""
        size = self._dtype.itemsize
        if self._contiguous_offset is not None:
            return [(self._contiguous_offset + start * size, start, stop - start)]
        chunk = self._chunk
        runs: list[list[int]] = []
        for k in range(start // chunk, (stop - 1) // chunk + 1):
            info = self._dataset.id.get_chunk_info_by_coord((k * chunk,))
            if info.byte_offset is None or info.filter_mask != 0 or info.size != chunk * size:
                return None  # not written yet, or stored through a filter
            a, b = max(start, k * chunk), min(stop, (k + 1) * chunk)
            offset = info.byte_offset + (a - k * chunk) * size
            if runs and runs[-1][0] + runs[-1][2] * size == offset:
                runs[-1][2] += b - a  # the next chunk follows in the file
            else:
                runs.append([offset, a, b - a])
        return [(offset, a, n) for offset, a, n in runs]

    def view(self, start: int, stop: int) -> np.ndarray | None:
        """Elements ``start <= i < stop`` as an array over a private memory map of the file (writable: writes
        stay in this process), or None when they cannot be mapped (read them through HDF5)."""
        if not self.usable or stop <= start or self._fd is None:
            return None
        try:
            runs = self._runs(int(start), int(stop))
            if runs is None or len(runs) != 1:
                return None  # not one run of bytes (or not stored plainly): see read_into
            offset = runs[0][0]
            n_bytes = (stop - start) * self._dtype.itemsize
            if offset < 0 or offset + n_bytes > os.fstat(self._fd).st_size:
                return None  # a damaged file: HDF5 reports it
            aligned = offset - offset % mmap.ALLOCATIONGRANULARITY
            mapping = mmap.mmap(self._fd, offset + n_bytes - aligned, offset=aligned, access=mmap.ACCESS_COPY)
        except (OSError, RuntimeError, ValueError, KeyError, TypeError, OverflowError):
            return None
        # the array keeps the mapping alive; it is unmapped when the last array over it is freed
        return np.frombuffer(mapping, dtype=self._dtype, count=stop - start, offset=offset - aligned)

    def read_into(self, start: int, stop: int, out: np.ndarray) -> bool:
        """Copy elements ``start <= i < stop`` into ``out`` (contiguous, of the dtype, ``stop - start`` long) with
        one system call per run of consecutive bytes of the file: one copy, where HDF5 copies a chunked dataset
        through its chunk cache. False (``out`` then holds nothing useful) when they cannot be read this way, or
        the file ends early: read them through HDF5, which reports what is wrong."""
        if not self.usable or self._fd is None or not hasattr(os, "preadv"):
            return False
        if stop <= start:
            return True
        size = self._dtype.itemsize
        try:
            runs = self._runs(int(start), int(stop))
            if runs is None:
                return False
            whole = memoryview(out).cast("B")
            for offset, a, n in runs:
                target = whole[(a - start) * size:(a - start + n) * size]
                while len(target):
                    done = os.preadv(self._fd, [target], offset)
                    if done <= 0:
                        return False  # the file ends before the data
                    target, offset = target[done:], offset + done
        except (OSError, RuntimeError, ValueError, KeyError, TypeError, OverflowError):
            return False
        return True

    def close(self) -> None:
        """Close the file descriptor (arrays already given stay valid: each mapping holds the file open)."""
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None
