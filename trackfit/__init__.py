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
* ``trackfit.pixels`` - pixel pedestals, noise and bad pixels measured from raw files (pixel maps).
* ``trackfit.simulate`` - the photoelectron track simulator (presets, configs, runs, lab-like chips).
* ``trackfit.response_builder`` / ``trackfit.planner`` - the detector response of a design (efficiency, μ(E),
  bytes per event; ``docs/response-format.md``) and the plan of an observation with it (MDP99, exposure for a
  target MDP, data volume; ``docs/planner.md``).
* ``trackfit.tuning`` - sweeps of reconstruction settings and cuts (quality factor, residual modulation).
* ``trackfit.plotting`` - event displays.

Everything loads on first use (``trackfit.analysis.mdp99(...)`` works after ``import trackfit``).
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("trackfit")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0+unknown"

#: public names -> the module that defines them; loaded on first access, so that ``import trackfit`` (and
#: ``trackfit --version``) stays light and numba/h5py load only when used
_EXPORTS = {
    "Event": "events", "EventBatch": "events", "EventBatchError": "events",
    "HexGrid": "hexgrid",
    "RawEventWriter": "io.raw", "RawFormatError": "io.raw", "open_raw": "io.raw", "write_raw": "io.raw",
    "EventTable": "io.table", "TableFormatError": "io.table", "read_table": "io.table", "write_table": "io.table",
    "ReconConfig": "recon", "reconstruct": "recon", "reconstruct_file": "recon",
}
_LAZY_SUBMODULES = ("analysis", "simulate", "tuning", "plotting", "recon", "io", "events", "hexgrid", "pixels")


def __getattr__(name):
    import importlib

    if name in _EXPORTS:
        value = getattr(importlib.import_module(f"{__name__}.{_EXPORTS[name]}"), name)
        globals()[name] = value
        return value
    if name in _LAZY_SUBMODULES:
        return importlib.import_module(f"{__name__}.{name}")
    raise AttributeError(f"module 'trackfit' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_EXPORTS) | set(_LAZY_SUBMODULES))


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
