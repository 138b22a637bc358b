"""The one place that sets numba options for every kernel of trackfit.

``cache=True`` writes compiled code next to the package or into ``NUMBA_CACHE_DIR``; when neither is writable
numba fails at import time, so caching is switched on only when a cache folder can be written. CI points
``NUMBA_CACHE_DIR`` at a fresh temporary folder so a stale cache never hides a change.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

import numba

__all__ = ["jit", "JIT_OPTIONS"]


def _cache_is_writable() -> bool:
    if os.environ.get("TRACKFIT_NO_NUMBA_CACHE"):
        return False
    folder = os.environ.get("NUMBA_CACHE_DIR") or str(Path(__file__).parent)
    try:
        Path(folder).mkdir(parents=True, exist_ok=True)
        with tempfile.NamedTemporaryFile(dir=folder):
            pass
    except OSError:
        return False
    return True


#: Options shared by all kernels: no Python objects, release the GIL so threads overlap I/O and compute,
#: numpy error model (division by zero gives inf/nan instead of raising inside a kernel).
JIT_OPTIONS = dict(nopython=True, nogil=True, cache=_cache_is_writable(), error_model="numpy", fastmath=False)


def jit(*args, **overrides):
    """``numba.jit`` with the project's options; use as ``@jit`` or ``@jit(parallel=True)``."""
    options = {**JIT_OPTIONS, **overrides}
    if args and callable(args[0]):
        return numba.jit(**options)(args[0])
    return numba.jit(*args, **options)
