"""trackfit: from raw track images of a photoelectric X-ray polarimeter to calibrated polarimetry.

What to use when
----------------
* :class:`HexGrid` - geometry of the hexagonal pixel chip (pixel centres, nearest pixel, neighbours).
* :func:`open_raw` / :class:`RawEventWriter` - raw event files (``docs/raw-format.md``).
* :class:`EventBatch` - events in memory; wrap the arrays of any other acquisition format in it.
* ``trackfit.plotting`` - event displays (imported lazily, needs matplotlib).
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("trackfit")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0+unknown"

from .events import Event, EventBatch, EventBatchError
from .hexgrid import HexGrid
from .io import RawEventWriter, RawFormatError, open_raw, write_raw

__all__ = [
    "__version__",
    "Event",
    "EventBatch",
    "EventBatchError",
    "HexGrid",
    "RawEventWriter",
    "RawFormatError",
    "open_raw",
    "write_raw",
]
