"""trackfit: from raw track images of a photoelectric X-ray polarimeter to calibrated polarimetry.

What to use when
----------------
* :class:`HexGrid` - geometry of the hexagonal pixel chip (pixel centres, nearest pixel, neighbours).
* :func:`open_raw` / :class:`RawEventWriter` - raw event files (``docs/raw-format.md``).
* :class:`EventBatch` - events in memory; wrap the arrays of any other acquisition format in it.
* :func:`reconstruct` / :func:`reconstruct_file` - events to energy, conversion point and emission angle
  (an :class:`EventTable`, or an event-table file read back with :func:`read_table`); settings in
  :class:`ReconConfig`.
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
from .io.table import EventTable, TableFormatError, read_table, write_table
from .recon import ReconConfig, reconstruct, reconstruct_file

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
    "EventTable",
    "TableFormatError",
    "read_table",
    "write_table",
    "ReconConfig",
    "reconstruct",
    "reconstruct_file",
]
