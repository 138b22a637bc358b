"""Content fingerprints of raw event files: a cheap identity check of the events as read.

The reconstruction stores one in the provenance of every event table (``input_fingerprint``) and the pixel map in
its list of source runs, so a table and a map can be matched with the raw file they came from.
"""

from __future__ import annotations

import zlib

import numpy as np

from ..events import EventBatch

__all__ = ["RawFingerprint", "content_fingerprint"]


class RawFingerprint:
    """Checksums of the events' content as read, independent of batch size, chunking and compression.

    One CRC-32 (``zlib.crc32``, several GB/s, computed without the GIL) per array - roi (int32), pixels per event
    (int64), signal (int16), time_s (float64), trigger_id (int64), each in little-endian byte order - fed batch by
    batch, written as ``"crc32:roi=<hex>,n_pixels=<hex>,signal=<hex>,time_s=<hex>,trigger_id=<hex>"``. A cheap
    identity check of the input (an accidental change escapes it with probability 2**-32 per array), not a
    cryptographic one.
    """

    NAMES = ("roi", "n_pixels", "signal", "time_s", "trigger_id")

    def __init__(self):
        self._crc = [0] * len(self.NAMES)

    def update(self, batch: EventBatch) -> None:
        arrays = (batch.roi.astype("<i4", copy=False), np.diff(batch.start).astype("<i8", copy=False),
                  batch.signal[batch.start[0]:batch.start[-1]].astype("<i2", copy=False),
                  batch.time_s.astype("<f8", copy=False), batch.trigger_id.astype("<i8", copy=False))
        for k, arr in enumerate(arrays):
            self._crc[k] = zlib.crc32(np.ascontiguousarray(arr), self._crc[k])

    def hexdigest(self) -> str:
        return "crc32:" + ",".join(f"{name}={crc:08x}" for name, crc in zip(self.NAMES, self._crc, strict=True))


def content_fingerprint(raw_path, *, batch_size: int = 32_768, strict: bool = False) -> str:
    """The content fingerprint of a raw event file, as stored in the provenance of its event tables."""
    from .raw import open_raw

    fingerprint = RawFingerprint()
    with open_raw(raw_path, strict=strict) as reader:
        for batch in reader.iter_batches(batch_size, with_truth=False):
            fingerprint.update(batch)
    return fingerprint.hexdigest()
