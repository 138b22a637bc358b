"""HDF5 filter choices shared by the writers of trackfit files.

Measured on the project's reference machine (2 cores; ``benchmarks/bench_io.py``), reading the int16 signal of a
simulated run: see ``docs/raw-format.md`` for the table behind the default.
"""

from __future__ import annotations

__all__ = ["COMPRESSIONS", "DEFAULT_COMPRESSION", "dataset_filter_options", "available_compressions"]

#: the filters every installation can read and write
COMPRESSIONS = ("lzf", "gzip", "none")
#: filters that need the optional ``hdf5plugin`` package (to write and to read)
PLUGIN_COMPRESSIONS = ("blosc-lz4", "zstd")
DEFAULT_COMPRESSION = "none"


def _plugin():
    try:
        import hdf5plugin
    except ImportError:
        return None
    return hdf5plugin


def available_compressions() -> tuple[str, ...]:
    """Names accepted by the writers on this installation."""
    return COMPRESSIONS + (PLUGIN_COMPRESSIONS if _plugin() is not None else ())


def dataset_filter_options(name: str) -> dict:
    """Keyword arguments for ``h5py.Group.create_dataset`` that select a filter by our name for it.

    Parameters
    ----------
    name : str
        One of :data:`COMPRESSIONS`, or of ``PLUGIN_COMPRESSIONS`` when ``hdf5plugin`` is installed.
    """
    if name == "none":
        return {}
    if name == "lzf":
        return {"compression": "lzf", "shuffle": True}
    if name == "gzip":
        return {"compression": "gzip", "compression_opts": 4, "shuffle": True}
    if name in PLUGIN_COMPRESSIONS:
        plugin = _plugin()
        if plugin is None:
            raise ImportError(f"compression '{name}' needs the optional package hdf5plugin: "
                              "pip install hdf5plugin")
        if name == "blosc-lz4":
            return dict(plugin.Blosc(cname="lz4", clevel=5, shuffle=plugin.Blosc.SHUFFLE))
        return dict(plugin.Zstd(clevel=3))
    raise ValueError(f"unknown compression {name!r}; expected one of {available_compressions()}")
