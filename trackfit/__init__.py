"""trackfit: from raw track images of a photoelectric X-ray polarimeter to calibrated polarimetry.

What to use when
----------------
* :class:`HexGrid` - geometry of the hexagonal pixel chip (pixel centres, nearest pixel, neighbours).
* :func:`open_raw` / :class:`RawEventWriter` - raw event files (``docs/raw-format.md``).
* :class:`EventBatch` - events in memory; wrap the arrays of any other acquisition format in it.
* :func:`reconstruct` / :func:`reconstruct_file` - events to energy, conversion point and emission angle
  (an :class:`EventTable`, or an event-table file read back with :func:`read_table`); settings in
  :class:`ReconConfig`.
* ``trackfit.analysis`` - selections, line fits, gain maps, Stokes parameters, MDP, modulation factor, spurious
  modulation, calibration files.
* ``trackfit.simulate`` - the photoelectron track simulator (presets, configs, runs).
* ``trackfit.tuning`` - sweeps of reconstruction settings and cuts (quality factor, residual modulation).
* ``trackfit.plotting`` - event displays.

The four subpackages above load on first use (``trackfit.analysis.mdp99(...)`` works after ``import trackfit``).
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

_LAZY_SUBMODULES = ("analysis", "simulate", "tuning", "plotting")


def __getattr__(name):
    if name in _LAZY_SUBMODULES:
        import importlib

        return importlib.import_module(f"{__name__}.{name}")
    raise AttributeError(f"module 'trackfit' has no attribute {name!r}")


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
