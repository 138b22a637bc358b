"""The CRC-32 of the content fingerprints: the same values whichever library computes them."""

import zlib

import numpy as np
import pytest

from trackfit.events import EventBatch
from trackfit.io import fingerprint
from trackfit.io.fingerprint import CRC32_BACKEND, RawFingerprint, crc32


def _pieces():
    rng = np.random.default_rng(7)
    yield b""
    yield b"\x00"
    yield b"photoelectron tracks"
    for n in (1, 3, 15, 16, 17, 63, 64, 65, 4095, 4096, 4097, 100_003):  # around the widths fast CRCs fold
        yield rng.integers(0, 256, n, dtype=np.uint8).tobytes()
    yield rng.integers(-2000, 2000, 250_001, dtype=np.int16)  # a numpy array, as the fingerprints pass them
    yield rng.integers(-2000, 2000, 40_000, dtype=np.int16)[::2].copy()


@pytest.mark.parametrize("seed", [0, 1, 0xFFFFFFFF, 0x1234ABCD])
def test_crc32_equals_the_crc32_of_zlib(seed):
    # Python's zlib.crc32 is the outside reference (the polynomial of zlib, gzip and PNG)
    for data in _pieces():
        assert crc32(data, seed) == zlib.crc32(data, seed)
    assert crc32(b"123456789") == 0xCBF43926  # the standard check value of CRC-32 (published CRC catalogues)


def test_crc32_of_pieces_continues_like_one_pass():
    data = np.random.default_rng(3).integers(0, 256, 1_000_003, dtype=np.uint8).tobytes()
    value = 0
    for a in range(0, len(data), 65_537):
        value = crc32(data[a:a + 65_537], value)
    assert value == zlib.crc32(data)


def test_the_backend_is_named_and_zlib_is_the_fallback(monkeypatch):
    assert CRC32_BACKEND in ("zlib-ng", "zlib")
    calls = []
    monkeypatch.setattr(fingerprint, "_fast_crc32", None)
    monkeypatch.setattr(fingerprint.zlib, "crc32", lambda data, value=0: calls.append(len(data)) or 5)
    assert crc32(b"abc", 0) == 5 and calls == [3]


def test_fingerprints_do_not_depend_on_the_backend(monkeypatch):
    pytest.importorskip("zlib_ng")  # part of the dev extras; without it both runs below use zlib
    rng = np.random.default_rng(11)
    n = 300
    roi = np.tile(np.array([[0, 0, 9, 8]], np.int32), (n, 1))
    start = np.arange(n + 1, dtype=np.int64) * 72
    batch = EventBatch(roi=roi, start=start, signal=rng.integers(-50, 900, 72 * n).astype(np.int16),
                       time_s=np.arange(n) * 1e-3, trigger_id=np.arange(n, dtype=np.int64))
    fast = RawFingerprint()
    fast.update(batch)
    monkeypatch.setattr(fingerprint, "_fast_crc32", None)
    plain = RawFingerprint()
    plain.update(batch)
    assert fast.hexdigest() == plain.hexdigest()
