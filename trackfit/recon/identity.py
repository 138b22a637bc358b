"""What makes two reconstructions the same: the settings hash, the identity of an input file, compatible versions.

Used to decide what may be reused instead of redone: the parts of a file split over processes or cluster workers
(:mod:`trackfit.recon.parts`) and the tables of a resumed campaign (:mod:`trackfit.recon.campaign`).

* :func:`settings_hash` - one short text for everything that decides the values of a table besides the input
  events: the reconstruction settings (with the pixel map by its content fingerprint, not its path), the energy
  scale and its source, whether truth columns are copied and whether malformed events stop the run. The batch
  size, the threads and the table's compression do not change a value and are left out.
* :func:`input_identity` - the cheap identity of a raw file (resolved path, size, modification time, number of
  events); the content fingerprint (:func:`trackfit.recon.content_fingerprint`) is the exact one.
* :func:`compatible_version` - tables made by the same ``major.minor`` release are compatible (a release that
  changes reconstructed values bumps at least the minor version; ``DEVELOPERS.md``).
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

from .config import ReconConfig

__all__ = ["settings_hash", "file_settings_hash", "input_identity", "compatible_version", "SETTINGS_HASH_KEY"]

#: provenance entry of an event table that holds its settings hash
SETTINGS_HASH_KEY = "settings_hash"


def settings_hash(config: ReconConfig, *, pixel_map_fingerprint: str | None, energy_scale: tuple[float, str],
                  with_truth: bool, strict: bool) -> str:
    """``"sha256:<16 hex digits>"`` of the settings that decide a table's values (see the module docstring).

    Parameters
    ----------
    config : ReconConfig
    pixel_map_fingerprint : str or None
        ``content_fingerprint`` of the pixel map the config names (None without a map).
    energy_scale : (float, str)
        ADC counts per keV and its source, as :meth:`ReconConfig.energy_scale` gives them for the input file.
    with_truth, strict : bool
        As passed to :func:`trackfit.reconstruct_file`.

    Examples
    --------
    >>> a = settings_hash(ReconConfig(), pixel_map_fingerprint=None, energy_scale=(3333.3, "none"),
    ...                   with_truth=True, strict=False)
    >>> b = settings_hash(ReconConfig(threshold_adc=12), pixel_map_fingerprint=None, energy_scale=(3333.3, "none"),
    ...                   with_truth=True, strict=False)
    >>> a.startswith("sha256:"), a == b
    (True, False)
    """
    values = config.to_dict()
    values["pixel_map"] = pixel_map_fingerprint or ""  # the map's content, wherever it lies
    text = json.dumps({"settings": values, "counts_per_kev": float(energy_scale[0]),
                       "energy_scale_source": str(energy_scale[1]), "with_truth": bool(with_truth),
                       "strict": bool(strict)}, sort_keys=True, default=str)
    return "sha256:" + hashlib.sha256(text.encode()).hexdigest()[:16]


def file_settings_hash(config: ReconConfig, raw_path, *, with_truth: bool, strict: bool,
                       pixel_map_fingerprint: str | None = None) -> str:
    """:func:`settings_hash` of a run of ``config`` on the raw file ``raw_path`` (its energy scale comes from the
    file when the config sets none); the pixel map is read for its fingerprint unless it is given."""
    from ..io.pixelmap import read_pixel_map
    from ..io.raw import open_raw

    with open_raw(raw_path, strict=False) as reader:
        scale = config.energy_scale(reader.run_info, path=raw_path)
    if config.pixel_map and pixel_map_fingerprint is None:
        pixel_map_fingerprint = read_pixel_map(config.pixel_map).fingerprint
    return settings_hash(config, pixel_map_fingerprint=pixel_map_fingerprint, energy_scale=scale,
                         with_truth=with_truth, strict=strict)


def input_identity(raw_path, n_events: int) -> dict:
    """Resolved path, size in bytes, modification time (ns) and number of events of a raw file."""
    path = Path(raw_path)
    stat = path.stat()
    return {"input_path": str(path.resolve()), "input_size_bytes": int(stat.st_size),
            "input_mtime_ns": int(stat.st_mtime_ns), "input_n_events": int(n_events)}


def compatible_version(version: str, current: str | None = None) -> bool:
    """True when a table written by trackfit ``version`` may be reused by ``current`` (default: this version):
    the same ``major.minor``.

    Examples
    --------
    >>> compatible_version("0.1.0", "0.1.3"), compatible_version("0.1.0", "0.2.0"), compatible_version("", "0.1.0")
    (True, False, False)
    """
    if current is None:
        from .. import __version__ as current
    head = str(version).split(".")[:2]
    return len(head) == 2 and head == str(current).split(".")[:2]
