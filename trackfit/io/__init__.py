"""Reading and writing trackfit files (HDF5).

What to use when: :func:`open_raw` to stream a raw event file in batches, or to look at single events;
:class:`RawEventWriter` to write one (a data-acquisition converter, the simulator); :func:`write_raw` for a
single in-memory batch; :func:`read_table` / :func:`write_table` / :class:`TableWriter` for event tables
(one row per event, ``docs/table-format.md``).
"""

from .compression import available_compressions
from .raw import RawEventReader, RawEventWriter, RawFormatError, open_raw, write_raw
from .table import EventTable, TableFormatError, TableWriter, read_table, write_table

__all__ = ["RawEventReader", "RawEventWriter", "RawFormatError", "open_raw", "write_raw", "available_compressions",
           "EventTable", "TableFormatError", "TableWriter", "read_table", "write_table"]
