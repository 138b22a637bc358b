"""Reading and writing trackfit files (HDF5).

What to use when: :func:`open_raw` to stream a raw event file in batches, or to look at single events;
:class:`RawEventWriter` to write one (a data-acquisition converter, the simulator); :func:`write_raw` for a
single in-memory batch.
"""

from .compression import available_compressions
from .raw import RawEventReader, RawEventWriter, RawFormatError, open_raw, write_raw

__all__ = ["RawEventReader", "RawEventWriter", "RawFormatError", "open_raw", "write_raw", "available_compressions"]
