"""Track reconstruction: cleaning and the two-stage moment analysis of raw events (``docs/methods.md`` §2), and by
default the adaptive emission estimate beside it (:mod:`trackfit.recon.estimators`, ``docs/methods.md`` §11).

What to use when
----------------
* :func:`reconstruct` - an :class:`~trackfit.events.EventBatch` in memory to an :class:`~trackfit.io.table.EventTable`.
* :func:`reconstruct_file` - a raw event file to an event-table file, streaming (also ``trackfit reconstruct``).
* :class:`ReconConfig` - the settings (threshold, start-point search radii, second-pass length,
  gain, bad pixels), TOML in and out.
* :class:`Status` / :func:`explain_status` - the meaning of the ``status`` column.
"""

from .config import ReconConfig
from .pipeline import DEFAULT_BATCH_SIZE, TABLE_COLUMNS, content_fingerprint, reconstruct, reconstruct_file
from .status import STATUS_DOCS, Status, explain_status, status_counts

__all__ = ["ReconConfig", "reconstruct", "reconstruct_file", "content_fingerprint", "Status", "explain_status",
           "status_counts", "STATUS_DOCS", "TABLE_COLUMNS", "DEFAULT_BATCH_SIZE"]
