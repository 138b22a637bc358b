"""The kinds of trackfit HDF5 files, and the one way every reader opens a file and checks its kind.

Every file trackfit writes carries the root attributes ``trackfit_format`` (its kind, below) and ``format_version``.
A reader calls :func:`open_kind`: the file must exist, be a regular file (not a pipe, device or directory), be
HDF5, keep all its data in itself (no external links or storage, unless allowed) and be of the expected kind; a
file of another trackfit kind gets an error that says what it is and what to do with it. Each reader then
checks the layout of its own format.
"""

from __future__ import annotations

import stat
from pathlib import Path

import h5py

from .heapcheck import damaged_global_heaps
from .structure import (
    H5PY_ERRORS,
    CheckedFile,
    external_allowed,
    external_data_message,
    find_external_data,
    integer_attribute,
    plain_value,
)

__all__ = ["KINDS", "check_before_open", "check_format_version", "check_regular_file", "open_file", "open_kind",
           "plain_attribute", "wrong_kind_hint"]

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
    return plain_value(value)


def wrong_kind_hint(found, expected: str = "") -> str:
    """``": this is <a kind>; <what to do with it>"`` for a file of another trackfit kind, else ``""``."""
    if not isinstance(found, str) or found not in KINDS:
        return ""
    what, use = KINDS[found]
    return f": this is {what}; {_USE_INSTEAD.get((found, expected), use)}"


def check_regular_file(path, *, what: str, error) -> Path:
    """Refuse, before any HDF5 call, a path that is not an existing regular file (a directory, a named pipe, a
    device, a socket): HDF5 would block on a pipe forever or fail obscurely on the others.

    Raises ``FileNotFoundError("<what> '<path>' does not exist")`` or ``error(path, "<what it is>, not a regular
    file ...", dataset=None)``.
    """
    path = Path(path)
    try:
        mode = path.stat().st_mode
    except FileNotFoundError:
        raise FileNotFoundError(f"{what} '{path}' does not exist") from None
    except OSError as err:
        raise error(path, f"cannot be examined ({err.strerror or err})") from None
    if stat.S_ISREG(mode):
        return path
    kind = ("a directory" if stat.S_ISDIR(mode) else "a named pipe (FIFO)" if stat.S_ISFIFO(mode)
            else "a character device" if stat.S_ISCHR(mode) else "a block device" if stat.S_ISBLK(mode)
            else "a socket" if stat.S_ISSOCK(mode) else "not a regular file")
    raise error(path, f"is {kind}, not a regular file: a {what} must be an HDF5 file on a disk, not a pipe, device "
                      "or folder (copy streamed data into a file first)")


def check_before_open(path, *, what: str, error) -> Path:
    """The checks made before the HDF5 library sees a file: a regular file (:func:`check_regular_file`) whose global
    heap collections are sound (:func:`~trackfit.io.heapcheck.damaged_global_heaps`). Returns the path."""
    path = check_regular_file(path, what=what, error=error)
    try:
        damaged = damaged_global_heaps(path)
    except OSError as err:
        raise error(path, f"cannot be read ({err.strerror or err})") from None
    if damaged:
        offset, problem = damaged[0]
        raise error(path, f"damaged HDF5 file: the global heap collection at byte {offset} (where its text values "
                          f"are stored) is inconsistent: {problem}; the HDF5 library could loop forever on it")
    return path


def open_file(path, *, what: str, error, allow_external: bool = False) -> tuple[h5py.File, dict]:
    """Open a file for reading as HDF5; returns it (the caller closes it) and its root attributes as plain values.

    The path must be a regular file (:func:`check_regular_file`) without damaged global heap collections
    (:func:`~trackfit.io.heapcheck.damaged_global_heaps`), the file HDF5 with readable root attributes, and
    no object may take its data from another file (:func:`~trackfit.io.structure.find_external_data`) unless
    ``allow_external`` is True (or the environment allows it: :func:`~trackfit.io.structure.external_allowed`).

    Raises ``FileNotFoundError("<what> '<path>' does not exist")``, or ``error(path, "not a readable HDF5 file
    (...)")`` and ``error(path, message, dataset=name)`` (see :func:`open_kind`).
    """
    path = check_before_open(path, what=what, error=error)
    try:
        f = h5py.File(path, "r")
    except H5PY_ERRORS as err:
        raise error(path, f"not a readable HDF5 file ({err})") from None
    try:
        checked = CheckedFile(f, path, error)
        attrs = checked.attributes("/")
        if not external_allowed(allow_external):
            with checked.guard("/", "the objects of the file cannot be listed"):
                external = find_external_data(f)
            if external:
                name, where = external[0]
                more = f" ({len(external) - 1} more such objects)" if len(external) > 1 else ""
                raise error(path, external_data_message(where) + more, dataset=name)
        return f, attrs
    except BaseException:
        f.close()
        raise


def check_format_version(path, attrs: dict, versions, *, error) -> int:
    """The root attribute ``format_version``: an integer (numpy or Python; not a boolean, float, text or array)
    among ``versions``."""
    def fail(message):
        raise error(path, message, dataset="/")

    if "format_version" not in attrs:
        fail("missing root attribute 'format_version'")
    version = integer_attribute(attrs, "format_version", fail)
    if version not in versions:
        readable = f"version {versions[0]}" if len(versions) == 1 else f"versions {list(versions)}"
        fail(f"unknown format_version {version}; this trackfit reads {readable}")
    return version


def open_kind(path, kind: str, *, what: str, error, versions=None,
              allow_external: bool = False) -> tuple[h5py.File, dict]:
    """Open a trackfit file for reading and check that it is of the expected kind.

    Parameters
    ----------
    path : str or Path
    kind : str
        The expected ``trackfit_format`` (a key of :data:`KINDS`).
    what : str
        How errors name the file (``"pixel map"`` gives ``pixel map '<path>' does not exist``).
    error : type
        The exception class of the reader's format (a :class:`~trackfit.io.errors.FileFormatError` taking
        ``(path, message, dataset=None)``), raised for a file that is not a regular file, not HDF5, of another
        kind (``dataset="/"``) or of an unknown version, or with data in other files.
    versions : sequence of int, optional
        The ``format_version`` values the reader reads (checked strictly: :func:`check_format_version`).
    allow_external : bool
        Accept objects whose data come from other files (external links, external storage, virtual datasets).

    Returns
    -------
    (h5py.File, dict)
        The open file (the caller closes it) and its root attributes as plain Python values.

    Raises
    ------
    FileNotFoundError
        ``"<what> '<path>' does not exist"``.
    """
    f, attrs = open_file(path, what=what, error=error, allow_external=allow_external)
    try:
        found = attrs.get("trackfit_format")
        if found != kind:
            hint = wrong_kind_hint(found, kind)
            raise error(path, f"attribute 'trackfit_format' must be '{kind}' (got {found!r}){hint}", dataset="/")
        if versions is not None:
            check_format_version(path, attrs, tuple(versions), error=error)
    except BaseException:
        f.close()
        raise
    return f, attrs
