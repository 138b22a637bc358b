"""Content fingerprints of raw event files: a cheap identity check of the events as read.

The reconstruction stores one in the provenance of every event table (``input_fingerprint``) and the pixel map in
its list of source runs, so a table and a map can be matched with the raw file they came from.

A fingerprint is a set of CRC-32 values of the event arrays fed in event order. CRC-32 values of consecutive
pieces combine exactly into the CRC-32 of the whole (:func:`crc32_combine`, the algebra zlib implements), so event
ranges read by different processes or machines give, once combined, the very fingerprint one pass over the file
gives (:meth:`RawFingerprint.combine`).

The CRC-32 itself comes from zlib-ng when its Python binding is installed (``pip install "trackfit[fast]"``;
about ten times as fast as zlib on processors with carry-less multiplication), else from Python's ``zlib``. Both
compute the same CRC (the polynomial of zlib, gzip and PNG), so fingerprints never depend on which one ran.
"""

from __future__ import annotations

import re
import zlib

import numpy as np

from ..events import EventBatch

try:  # the same CRC-32 as zlib's, several times faster (an optional dependency: trackfit[fast])
    from zlib_ng.zlib_ng import crc32 as _fast_crc32
except ImportError:  # pragma: no cover - depends on the installation
    _fast_crc32 = None

__all__ = ["RawFingerprint", "content_fingerprint", "crc32", "crc32_combine", "CRC32_BACKEND"]

#: the library computing :func:`crc32`: ``"zlib-ng"`` or ``"zlib"``
CRC32_BACKEND = "zlib" if _fast_crc32 is None else "zlib-ng"


def crc32(data, value: int = 0) -> int:
    """The CRC-32 of ``data`` (any contiguous buffer, e.g. a numpy array) continuing from ``value``: exactly
    ``zlib.crc32(data, value)``, computed by zlib-ng when it is installed (:data:`CRC32_BACKEND`). Large buffers
    are checksummed without the GIL."""
    if _fast_crc32 is None:
        return zlib.crc32(data, value)
    return _fast_crc32(data, value)

# CRC-32 of zlib (reflected polynomial 0x04C11DB7) as a polynomial over GF(2): multiplication modulo the polynomial
# and the powers x^(2^n), after the CRC-32 code of zlib (the combination of two CRC values is
# crc(A + B) = crc(A) * x^(8 len(B)) mod P  xor  crc(B)).
_POLY = 0xEDB88320


def _multiply_mod_p(a: int, b: int) -> int:
    """``a * b`` modulo the CRC-32 polynomial, both in the reflected bit order of zlib (bit 31 is x^0)."""
    m = 1 << 31
    product = 0
    while a:
        if a & m:
            product ^= b
            a ^= m
        m >>= 1
        b = (b >> 1) ^ _POLY if b & 1 else b >> 1
    return product


def _powers_of_x() -> list[int]:
    powers = []
    p = 1 << 30  # x^1
    for _ in range(64):
        powers.append(p)  # x^(2^n)
        p = _multiply_mod_p(p, p)
    return powers


_X_2N = _powers_of_x()


def _x_to_8n(n_bytes: int) -> int:
    """x^(8 n_bytes) modulo the polynomial."""
    p = 1 << 31  # x^0
    k = 3  # 8 = 2^3
    while n_bytes:
        if n_bytes & 1:
            p = _multiply_mod_p(_X_2N[k % 64], p)
        n_bytes >>= 1
        k += 1
    return p


def crc32_combine(crc_first: int, crc_second: int, n_bytes_second: int) -> int:
    """The CRC-32 of ``A + B`` from ``crc32(A)``, ``crc32(B)`` and ``len(B)``, without the data.

    Equals ``zlib.crc32(A + B)`` (zlib has this function, Python's ``zlib`` module does not expose it).

    Examples
    --------
    >>> import zlib
    >>> a, b = b"photoelectron ", b"tracks"
    >>> crc32_combine(zlib.crc32(a), zlib.crc32(b), len(b)) == zlib.crc32(a + b)
    True
    """
    if n_bytes_second < 0:
        raise ValueError(f"'n_bytes_second' must be >= 0 (got {n_bytes_second})")
    return _multiply_mod_p(_x_to_8n(int(n_bytes_second)), int(crc_first)) ^ int(crc_second)


class RawFingerprint:
    """Checksums of the events' content as read, independent of batch size, chunking and compression.

    One CRC-32 (:func:`crc32`, several GB/s, computed without the GIL) per array - roi (int32), pixels per event
    (int64), signal (int16), time_s (float64), trigger_id (int64), each in little-endian byte order - fed batch by
    batch, written as ``"crc32:roi=<hex>,n_pixels=<hex>,signal=<hex>,time_s=<hex>,trigger_id=<hex>"``. A cheap
    identity check of the input (an accidental change escapes it with probability 2**-32 per array), not a
    cryptographic one.

    The byte count of each array is kept too (:attr:`n_bytes`), so the fingerprints of consecutive event ranges
    combine into the fingerprint of the whole range (:meth:`combine`).
    """

    NAMES = ("roi", "n_pixels", "signal", "time_s", "trigger_id")

    def __init__(self):
        self._crc = [0] * len(self.NAMES)
        self.n_bytes = [0] * len(self.NAMES)

    def update(self, batch: EventBatch) -> None:
        arrays = (batch.roi.astype("<i4", copy=False), np.diff(batch.start).astype("<i8", copy=False),
                  batch.signal[batch.start[0]:batch.start[-1]].astype("<i2", copy=False),
                  batch.time_s.astype("<f8", copy=False), batch.trigger_id.astype("<i8", copy=False))
        for k, arr in enumerate(arrays):
            arr = np.ascontiguousarray(arr)
            self._crc[k] = crc32(arr, self._crc[k])
            self.n_bytes[k] += arr.nbytes

    def hexdigest(self) -> str:
        return "crc32:" + ",".join(f"{name}={crc:08x}" for name, crc in zip(self.NAMES, self._crc, strict=True))

    @classmethod
    def from_hexdigest(cls, text: str, n_bytes) -> RawFingerprint:
        """The fingerprint written as ``text`` (:meth:`hexdigest`) of arrays of ``n_bytes`` bytes (in
        :data:`NAMES` order), e.g. read back from the provenance of a part of a table."""
        match = re.fullmatch("crc32:" + ",".join(f"{name}=([0-9a-f]{{8}})" for name in cls.NAMES), str(text))
        n_bytes = [int(v) for v in np.asarray(n_bytes).ravel()]
        if match is None or len(n_bytes) != len(cls.NAMES) or min(n_bytes) < 0:
            raise ValueError(f"not a fingerprint of {len(cls.NAMES)} arrays: {text!r} with byte counts {n_bytes}")
        fingerprint = cls()
        fingerprint._crc = [int(v, 16) for v in match.groups()]
        fingerprint.n_bytes = n_bytes
        return fingerprint

    def combine(self, following: RawFingerprint) -> RawFingerprint:
        """The fingerprint of this range followed by ``following`` (exactly what one pass over both gives)."""
        out = RawFingerprint()
        out._crc = [crc32_combine(a, b, n) for a, b, n in zip(self._crc, following._crc, following.n_bytes,
                                                               strict=True)]
        out.n_bytes = [a + b for a, b in zip(self.n_bytes, following.n_bytes, strict=True)]
        return out


def content_fingerprint(raw_path, *, batch_size: int = 32_768, strict: bool = False) -> str:
    """The content fingerprint of a raw event file, as stored in the provenance of its event tables."""
    from .raw import open_raw

    fingerprint = RawFingerprint()
    with open_raw(raw_path, strict=strict) as reader:
        for batch in reader.iter_batches(batch_size, with_truth=False):
            fingerprint.update(batch)
    return fingerprint.hexdigest()
