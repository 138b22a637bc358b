"""A cheap check of HDF5 global heap collections before the HDF5 library reads them.

Variable-length strings (every text attribute trackfit writes) live in *global heap collections* of the file. The
HDF5 library trusts the sizes written there: a damaged object size sends it into an endless loop the first time it
reads any string of that collection (reproduced with a one-byte change of a 14-byte object's size to 142), and no
timeout inside the process can stop it. This module walks the collections itself, as the file format specification
lays them out (HDF5 File Format Specification version 3, section III.E "Global Heap": signature ``GCOL``, version
1, three reserved bytes, the collection size; then objects of heap index (2 bytes), reference count (2), reserved
(4), object size (8) and the data padded to a multiple of 8 bytes; heap index 0 is the free space that ends the
list), and reports a collection whose objects do not tile it.

Collections are searched for where trackfit's writers put them: the first and the last :data:`SCAN_BYTES` of the
file (the root attributes are written when a file is created, the closing attributes at its end), so the check
reads at most twice that, whatever the file size. A damaged collection elsewhere is not seen.
"""

from __future__ import annotations

import mmap
import os

__all__ = ["SCAN_BYTES", "damaged_global_heaps"]

#: bytes searched at each end of a file
SCAN_BYTES = 1 << 20
_SIGNATURE = b"GCOL"
#: the smallest collection the library makes (H5HG_MINSIZE of the HDF5 sources), and an upper bound against
#: signatures found by chance in data
_MIN_COLLECTION = 4096
_MAX_COLLECTION = 1 << 32
_OBJECT_HEADER = 16


def _problem(block: bytes, offset: int, base: int = 0) -> str | None:
    """What is wrong with the collection whose signature is at ``block[offset]``; None when it is sound or when
    the bytes there do not look like a collection header at all (a chance match in data). ``base``: the file
    offset of ``block``, for the byte positions the text gives."""
    if len(block) < offset + 16 or block[offset + 4] != 1:
        return None
    size = int.from_bytes(block[offset + 8:offset + 16], "little")
    if not _MIN_COLLECTION <= size <= _MAX_COLLECTION:
        return None
    end = offset + size
    if end > len(block):
        return None  # runs past what was read: not judged here
    position = offset + 16
    seen = set()
    while end - position >= _OBJECT_HEADER:
        index = int.from_bytes(block[position:position + 2], "little")
        object_size = int.from_bytes(block[position + 8:position + 16], "little")
        if index == 0:  # free space, header included: exactly the rest of the collection
            if position + object_size != end:
                return (f"its free space at byte {base + position} declares {object_size} bytes where {end - position} "
                        "are left: an object before it has a wrong size")
            return None
        if index in seen:
            return f"object {index} appears twice: an object before it has a wrong size"
        seen.add(index)
        padded = (object_size + 7) // 8 * 8
        if position + _OBJECT_HEADER + padded > end:
            return (f"object {index} declares {object_size} bytes, more than the {end - position - _OBJECT_HEADER} "
                    "left in the collection")
        position += _OBJECT_HEADER + padded
    return None


def damaged_global_heaps(path) -> list[tuple[int, str]]:
    """Damaged global heap collections near the start and the end of a file: list of (byte offset, problem).

    Looks at most at ``2 * SCAN_BYTES`` bytes, through a read-only memory map (no copy: this runs every time a
    file is opened). OSError passes to the caller.
    """
    size = os.path.getsize(path)
    ranges = [(0, min(size, SCAN_BYTES))]
    if size > SCAN_BYTES:
        ranges.append((max(SCAN_BYTES, size - SCAN_BYTES), size))
    found = []
    with open(path, "rb") as f:
        if size == 0:
            return found
        try:
            mapped = mmap.mmap(f.fileno(), 0, access=mmap.ACCESS_READ)
        except (OSError, ValueError):  # a file system without memory maps: read the two ends
            mapped = None
        for start, stop in ranges:
            if mapped is None:
                f.seek(start)
                block = f.read(stop - start)
                _scan(block, start, found, lambda offset, block=block: block.find(_SIGNATURE, offset))
            else:
                with memoryview(mapped) as whole, whole[start:stop] as block:
                    _scan(block, start, found, lambda offset, start=start, stop=stop:
                          max(mapped.find(_SIGNATURE, start + offset, stop) - start, -1))
        if mapped is not None:
            mapped.close()
    return found


def _scan(block, start: int, found: list, find) -> None:
    """Append ``(start + offset, problem)`` for every damaged collection whose signature is in ``block`` (the bytes
    of the file from ``start``, or a view of them); ``find(offset)`` gives the next signature in ``block`` at or
    after ``offset``, or -1."""
    offset = find(0)
    while offset >= 0:
        problem = _problem(block, offset, start)
        if problem is not None:
            found.append((start + offset, problem))
        offset = find(offset + 1)
