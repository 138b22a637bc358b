"""The kinds of trackfit HDF5 files, and the one way every reader opens a file and checks its kind.

Every file trackfit writes carries the root attributes ``trackfit_format`` (its kind, below) and ``format_version``.
A reader calls :func:`open_kind`: the file must exist, be HDF5 and be of the expected kind; a file of another
trackfit kind gets an error that says what it is and what to do with it. Each reader then checks the version and
layout of its own format.
"""

from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np

__all__ = ["KINDS", "open_file", "open_kind", "plain_attribute", "wrong_kind_hint"]

#: ``trackfit_format`` value -> (what the file is, what to do with it)
KINDS: dict[str, tuple[str, str]] = {
    "raw-events": ("a raw event file", "reconstruct it into an event table first: trackfit reconstruct RAW.h5 -o "
                                       "TABLE.h5 (trackfit.reconstruct_file in Python)"),
    "event-table": ("an event table, already reconstructed", "summarise it with trackfit info, read it with "
                                                             "trackfit.read_table"),
    "calibration": ("a calibration file", "made by trackfit calibrate, it goes to trackfit polarization "
                                          "--calibration"),
    "pixel-map": ("a pixel map", "made by trackfit pixel-map, it goes to trackfit reconstruct --pixel-map"),
    "response": ("a detector response file", "made by trackfit response, it goes to trackfit plan"),
}
#: (found kind, expected kind) -> what to do, where it differs from the general advice above
_USE_INSTEAD = {("raw-events", "pixel-map"): "make a map from it with `trackfit pixel-map`"}


def plain_attribute(value):
    """An HDF5 attribute value as plain Python: text for bytes, lists for arrays, Python numbers for numpy ones."""
    if isinstance(value, bytes):
        return value.decode()
    if isinstance(value, np.ndarray):
        return [plain_attribute(v) for v in value.tolist()]
    if isinstance(value, np.generic):
        return value.item()
    return value


def wrong_kind_hint(found, expected: str = "") -> str:
    """``": this is <a kind>; <what to do with it>"`` for a file of another trackfit kind, else ``""``."""
    if found not in KINDS:
        return ""
    what, use = KINDS[found]
    return f": this is {what}; {_USE_INSTEAD.get((found, expected), use)}"


def open_file(path, *, what: str, error) -> tuple[h5py.File, dict]:
    """Open a file for reading as HDF5; returns it (the caller closes it) and its root attributes as plain values.

    Raises ``FileNotFoundError("<what> '<path>' does not exist")``, or ``error(path, "not a readable HDF5 file
    (...)")`` (see :func:`open_kind`).
    """
    path = Path(path)
    if not path.exists():
        raise FileNotFoundError(f"{what} '{path}' does not exist")
    try:
        f = h5py.File(path, "r")
    except OSError as err:
        raise error(path, f"not a readable HDF5 file ({err})") from None
    try:
        return f, {k: plain_attribute(v) for k, v in f.attrs.items()}
    except BaseException:
        f.close()
        raise


def open_kind(path, kind: str, *, what: str, error) -> tuple[h5py.File, dict]:
    """Open a trackfit file for reading and check that it is of the expected kind.

    Parameters
    ----------
    path : str or Path
    kind : str
        The expected ``trackfit_format`` (a key of :data:`KINDS`).
    what : str
        How errors name the file (``"pixel map"`` gives ``pixel map '<path>' does not exist``).
    error : type
        The exception class of the reader's format (a ``ValueError`` taking ``(path, message, dataset=None)``),
        raised for a file that is not HDF5, or of another kind (``dataset="/"``).

    Returns
    -------
    (h5py.File, dict)
        The open file (the caller closes it) and its root attributes as plain Python values.

    Raises
    ------
    FileNotFoundError
        ``"<what> '<path>' does not exist"``.
    """
    f, attrs = open_file(path, what=what, error=error)
    found = attrs.get("trackfit_format")
    if found != kind:
        f.close()
        hint = wrong_kind_hint(found, kind)
        raise error(path, f"attribute 'trackfit_format' must be '{kind}' (got {found!r}){hint}", dataset="/")
    return f, attrs
