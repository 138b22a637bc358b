"""Checked access to the structure of an HDF5 file: what every reader checks before it uses an object.

Files come from anywhere (other programs, damaged disks, people), so a reader never trusts that an object is what
the format says. :class:`CheckedFile` looks a name up without following odd links blindly (a dangling or looping
soft link, an external link), checks that the object is a dataset or a group, its dtype kind, rank and shape, and
reads it; the typed attribute getters (:func:`integer_attribute`, :func:`real_attribute`, :func:`text_attribute`,
:func:`flag_attribute`) refuse a number stored as text, a boolean where a count is expected and arrays where one
value is expected. Every problem becomes the reader's own error (a :class:`~trackfit.io.errors.FileFormatError`
subclass) naming the file and the dataset or attribute; h5py's own exceptions for damaged storage are converted
only around the h5py calls themselves, so a programming error of ours is never disguised as a damaged file.

:func:`find_external_data` lists the objects whose data would come from another file (external links, datasets
with external storage, virtual datasets with sources in other files); readers refuse such files unless the caller
allows it explicitly (``allow_external=True``; on the command line ``--allow-external-storage``).
"""

from __future__ import annotations

import contextlib
import math
import numbers

import h5py
import numpy as np

from ..hexgrid import MAX_CHIP_SIDE, PITCH_RANGE_MM

__all__ = ["CheckedFile", "H5PY_ERRORS", "find_external_data", "external_data_message", "integer_attribute",
           "real_attribute", "text_attribute", "flag_attribute", "plain_value", "grid_from_attributes",
           "MAX_PIXELS_PER_SIDE", "MAX_PITCH_MM", "EXTERNAL_VARIABLE", "external_allowed"]

#: what h5py (and the HDF5 library under it) raises for a damaged or unusual file: converted into the reader's
#: error around h5py calls only
H5PY_ERRORS = (OSError, RuntimeError, KeyError, TypeError, ValueError, UnicodeDecodeError, OverflowError,
               MemoryError, SystemError, AttributeError, IndexError)

#: environment variable that allows data in other files for every reader, like ``allow_external=True`` (the
#: global command-line flag ``trackfit --allow-external-storage COMMAND`` sets it, so worker processes inherit it)
EXTERNAL_VARIABLE = "TRACKFIT_ALLOW_EXTERNAL_STORAGE"

ALLOW_EXTERNAL_HINT = ("trackfit reads only data stored in the file itself, so that a file cannot make it read "
                       "another one unnoticed; pass allow_external=True (on the command line "
                       f"trackfit --allow-external-storage COMMAND ..., or {EXTERNAL_VARIABLE}=1 in the environment) "
                       "if this file is meant to use data of other files")


def external_allowed(allow_external: bool = False) -> bool:
    """True when data in other files may be read: ``allow_external``, or :data:`EXTERNAL_VARIABLE` set to a true
    value (``1``, ``yes``, ``true``) in the environment."""
    import os

    return bool(allow_external) or os.environ.get(EXTERNAL_VARIABLE, "").strip().lower() in ("1", "yes", "true")


def plain_value(value):
    """An HDF5 attribute or scalar value as plain Python: text for bytes, lists for arrays, Python numbers for numpy
    ones. Raises ``UnicodeDecodeError`` for bytes that are not UTF-8 (callers guard it)."""
    if isinstance(value, bytes):
        return value.decode()
    if isinstance(value, h5py.Empty):
        return None
    if isinstance(value, np.ndarray):
        if value.dtype.names is not None:
            return [tuple(plain_value(v) for v in row) for row in value.tolist()] if value.ndim else \
                tuple(plain_value(v) for v in value.tolist())
        return [plain_value(v) for v in value.tolist()] if value.ndim else plain_value(value.item())
    if isinstance(value, np.void):
        return tuple(plain_value(v) for v in value.tolist()) if value.dtype.names else bytes(value)
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, list | tuple):
        return [plain_value(v) for v in value]
    return value


def _describe(value) -> str:
    text = repr(value)
    return text if len(text) <= 80 else text[:76] + " ..."


def _kind_name(value) -> str:
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, str):
        return "text"
    if isinstance(value, list | tuple):
        return "an array"
    if value is None:
        return "an empty (null) value"
    if isinstance(value, numbers.Integral):
        return "an integer"
    if isinstance(value, numbers.Real):
        return "a floating-point number"
    return f"a {type(value).__name__}"


def integer_attribute(attrs, key, fail, *, minimum=None, maximum=None) -> int:
    """``attrs[key]`` as an int: an integer value (not a boolean, float, text or array) within the bounds.

    ``fail(message)`` must raise; it is called with what was expected and what was found.
    """
    if key not in attrs:
        fail(f"missing attribute '{key}'")
    value = attrs[key]
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        fail(f"attribute '{key}' must be an integer, stored as one (got {_kind_name(value)}: {_describe(value)})")
    value = int(value)
    if (minimum is not None and value < minimum) or (maximum is not None and value > maximum):
        bounds = f"from {minimum} to {maximum}" if maximum is not None else f">= {minimum}"
        fail(f"attribute '{key}' must be an integer {bounds} (got {value})")
    return value


def real_attribute(attrs, key, fail, *, positive=False, maximum=None, required=True) -> float | None:
    """``attrs[key]`` as a finite float: a number (integer or floating point; not a boolean, text or array)."""
    if key not in attrs:
        if required:
            fail(f"missing attribute '{key}'")
        return None
    value = attrs[key]
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        fail(f"attribute '{key}' must be a number, stored as one (got {_kind_name(value)}: {_describe(value)})")
    number = float(value)
    if not math.isfinite(number) or (positive and number <= 0) or (maximum is not None and number > maximum):
        wanted = "a finite number" + (" > 0" if positive else "") + (f" up to {maximum:g}" if maximum else "")
        fail(f"attribute '{key}' must be {wanted} (got {value!r})")
    return number


def text_attribute(attrs, key, fail, *, required=True, default=None) -> str | None:
    """``attrs[key]`` as text (stored as a string, not a number or an array)."""
    if key not in attrs:
        if required:
            fail(f"missing attribute '{key}'")
        return default
    value = attrs[key]
    if not isinstance(value, str):
        fail(f"attribute '{key}' must be text (got {_kind_name(value)}: {_describe(value)})")
    return value


def flag_attribute(attrs, key, fail, *, default=None) -> bool | None:
    """``attrs[key]`` as a bool: true or false (or the integers 1 and 0)."""
    if key not in attrs:
        return default
    value = attrs[key]
    if isinstance(value, bool):
        return value
    if isinstance(value, numbers.Integral) and value in (0, 1):
        return bool(value)
    fail(f"attribute '{key}' must be true or false (1 or 0) (got {_kind_name(value)}: {_describe(value)})")
    return None  # pragma: no cover - fail raises


def external_data_message(what: str) -> str:
    return f"the data would come from another file: {what}; {ALLOW_EXTERNAL_HINT}"


def find_external_data(f: h5py.File) -> list[tuple[str, str]]:
    """Objects of an open file whose data live in another file: list of (object name, what points where).

    External links, datasets with external (raw) storage, virtual datasets with a source in another file. Soft
    links are not followed (their targets are visited through their own hard links). h5py errors pass unchanged
    (the caller guards them).
    """
    found: list[tuple[str, str]] = []
    root = f.id

    # the low-level API: a tenth of the cost of h5py's objects (this runs every time a file is opened)
    def visit(name: bytes, info):
        where = "/" + _text(name)
        if info.type == h5py.h5l.TYPE_EXTERNAL:
            filename, path = root.links.get_val(name)
            found.append((where, f"'{_text(filename)}' (an external link to its object '{_text(path)}')"))
        elif info.type == h5py.h5l.TYPE_HARD and h5py.h5o.get_info(root, name).type == h5py.h5o.TYPE_DATASET:
            plist = h5py.h5d.open(root, name).get_create_plist()
            n_external = plist.get_external_count()
            if n_external:
                files = sorted({_text(plist.get_external(i)[0]) for i in range(n_external)})
                found.append((where, f"{', '.join(repr(x) for x in files)} (external storage of the dataset)"))
            if plist.get_layout() == h5py.h5d.VIRTUAL:
                files = sorted({_text(plist.get_virtual_filename(i)) for i in range(plist.get_virtual_count())} - {"."})
                if files:
                    found.append((where, f"{', '.join(repr(x) for x in files)} (a virtual dataset mapping data of "
                                         "other files)"))

    root.links.visit(visit, info=True)
    return found


def _by_hard_link(group: h5py.Group, leaf: str, readonly: bool):
    """The dataset or group a hard link ``leaf`` of ``group`` names, through the low-level API (less than half the
    cost of h5py's lookups; a reader opens tens of datasets); None for any other link, a missing one, another kind of
    object or any error (the general lookup then decides and words the error). ``readonly``: the file is open for
    reading only (h5py then caches a dataset's shape and selection machinery, as for ``group[name]``)."""
    try:
        name = leaf.encode()
        if group.id.links.get_info(name).type != h5py.h5l.TYPE_HARD:
            return None
        oid = h5py.h5o.open(group.id, name)
    except Exception:  # noqa: BLE001 - the general lookup reports it
        return None
    if isinstance(oid, h5py.h5d.DatasetID):
        return h5py.Dataset(oid, readonly=readonly)
    if isinstance(oid, h5py.h5g.GroupID):
        return h5py.Group(oid)
    return None


def _text(value) -> str:
    return value.decode(errors="replace") if isinstance(value, bytes) else str(value)


class CheckedFile:
    """An open HDF5 file whose objects a reader gets through checks that raise the reader's own error.

    Parameters
    ----------
    f : h5py.File
        Open for reading (the caller closes it).
    path : Path or str
        How errors name the file.
    error : type
        The reader's error class, called as ``error(path, message, dataset=name)``.
    allow_external : bool
        Follow external links (refused by default, like every object with data in another file; see
        :func:`external_allowed`).
    """

    def __init__(self, f: h5py.File, path, error, *, allow_external: bool = False):
        self.file = f
        self.path = path
        self.error = error
        self.allow_external = external_allowed(allow_external)
        self._groups: dict[str, h5py.Group] = {}  # groups already checked, by absolute name (a read-only file)
        self._readonly = f.mode == "r"

    def fail(self, message, where="/", **extra):
        raise self.error(self.path, message, dataset=where, **extra)

    def failer(self, where):
        """A ``fail(message)`` function for the typed attribute getters, naming ``where``."""
        def fail(message):
            self.fail(message, where)
        return fail

    @contextlib.contextmanager
    def guard(self, where, doing="cannot be read"):
        """Inside the block, an exception of h5py (damaged or unusual storage) becomes the reader's error naming
        ``where``. Use it around h5py calls only."""
        try:
            yield
        except self.error:
            raise
        except MemoryError:
            self.fail(f"{doing}: too large for the memory of this computer", where)
        except H5PY_ERRORS as err:
            self.fail(f"{doing} ({type(err).__name__}: {err})", where)

    # ------------------------------------------------------------------ objects
    def get(self, name: str, kind, *, required: bool = True):
        """The object ``name`` (absolute) if it is a ``kind`` (``h5py.Dataset`` or ``h5py.Group``); None when absent
        and not required. Links that point nowhere, loop, or lead into another file are refused."""
        where = "/" + name.strip("/")
        if kind is h5py.Group and where in self._groups:
            return self._groups[where]
        parent, _, leaf = where.rpartition("/")
        parent = parent or "/"
        what = "dataset" if kind is h5py.Dataset else "group"
        with self.guard(where):
            if parent != "/":
                group = self.get(parent, h5py.Group, required=required)
                if group is None:
                    return None
            else:
                group = self.file
            obj = _by_hard_link(group, leaf, self._readonly)
        if obj is None:
            obj = self._through_link(group, leaf, where, what, required)
            if obj is None:
                return None
        if not isinstance(obj, kind):
            found = "a dataset" if isinstance(obj, h5py.Dataset) else "a group" if isinstance(obj, h5py.Group) \
                else f"a {type(obj).__name__}"
            self.fail(f"expected a {what}, found {found}", where)
        if kind is h5py.Group:
            self._groups[where] = obj
        return obj

    def _through_link(self, group, leaf: str, where: str, what: str, required: bool):
        """The object ``leaf`` of ``group`` through h5py's lookups, which tell every kind of link apart; None when
        absent and not required."""
        with self.guard(where):
            link = group.get(leaf, getlink=True)
            if link is None:
                if required:
                    self.fail(f"missing {what}", where)
                return None
            if isinstance(link, h5py.ExternalLink) and not self.allow_external:
                self.fail(external_data_message(f"'{link.filename}' (an external link to its object "
                                                f"'{link.path}')"), where)
            if isinstance(link, h5py.SoftLink):
                target = group.get(leaf)
                if target is None:
                    self.fail(f"expected a {what}, found a soft link to '{link.path}', which does not exist", where)
            return group[leaf]

    def group(self, name: str, *, required: bool = True) -> h5py.Group | None:
        return self.get(name, h5py.Group, required=required)

    def dataset(self, name: str, *, kinds: str | None = None, dtype=None, ndim: int | None = None, shape=None,
                max_size: int | None = None, required: bool = True) -> h5py.Dataset | None:
        """The dataset ``name``, checked: dtype kind (numpy kind letters, e.g. ``"iu"``) or exact dtype, rank, shape
        (``None`` entries match any length), number of elements."""
        ds = self.get(name, h5py.Dataset, required=required)
        if ds is None:
            return None
        where = ds.name
        with self.guard(where):
            found_dtype, found_shape = ds.dtype, ds.shape
        if found_shape is None:
            self.fail("expected an array, found a null (empty) dataspace", where)
        if dtype is not None and found_dtype != np.dtype(dtype):
            self.fail(f"expected dtype {np.dtype(dtype).name}, found {found_dtype}", where)
        if kinds is not None and (found_dtype.kind not in kinds or found_dtype.names is not None
                                  or h5py.check_vlen_dtype(found_dtype) is not None):
            self.fail(f"expected {_kinds_text(kinds)}, found dtype {found_dtype}", where)
        if ndim is not None and len(found_shape) != ndim:
            rank = {0: "a scalar", 1: "a 1-D array"}.get(ndim, f"a {ndim}-D array")
            self.fail(f"expected {rank}, found shape {found_shape}", where)
        if shape is not None and (len(shape) != len(found_shape)
                                  or any(s is not None and s != t for s, t in zip(shape, found_shape, strict=True))):
            expected = "(" + ", ".join("N" if s is None else str(s) for s in shape) + ("," if len(shape) == 1 else "") \
                + ")"
            self.fail(f"expected shape {expected}, found {found_shape}", where)
        if max_size is not None and int(np.prod(found_shape, dtype=np.float64)) > max_size:
            self.fail(f"expected at most {max_size} values, found shape {found_shape}", where)
        return ds

    def read(self, ds: h5py.Dataset, selection=()):
        """``ds[selection]`` with h5py's errors converted (damaged chunks, failing filters, memory)."""
        with self.guard(ds.name):
            return ds[selection]

    def attributes(self, obj) -> dict:
        """The attributes of ``obj`` (a name or an object) as plain Python values; unreadable ones are refused."""
        if isinstance(obj, str):
            where = obj
            obj = self.file if obj == "/" else self.get(obj, h5py.Group)
        else:
            where = obj.name
        out = {}
        with self.guard(where, "attributes cannot be read"):
            keys = list(obj.attrs.keys())
        for key in keys:
            with self.guard(where, f"attribute '{key}' cannot be read"):
                out[key] = plain_value(obj.attrs[key])
        return out


def _kinds_text(kinds: str) -> str:
    names = {"b": "boolean", "i": "signed integer", "u": "unsigned integer", "f": "floating-point"}
    return "a " + " or ".join(names[k] for k in kinds if k in names) + " dtype"


#: the largest chip the readers accept, in pixels per side, and the largest pixel pitch (mm): the limits of
#: :class:`~trackfit.hexgrid.HexGrid` itself, so that every file a writer can write is read back
MAX_PIXELS_PER_SIDE = MAX_CHIP_SIDE
MAX_PITCH_MM = PITCH_RANGE_MM[1]


def grid_from_attributes(attrs: dict, fail):
    """The :class:`~trackfit.hexgrid.HexGrid` of a ``/geometry`` group's attributes (plain values), each checked
    for its type and a sane range first; ``fail(message)`` raises the reader's error."""
    from ..hexgrid import HexGrid

    pitch_mm = real_attribute(attrs, "pitch_mm", fail, positive=True, maximum=MAX_PITCH_MM)
    if pitch_mm < PITCH_RANGE_MM[0]:
        fail(f"attribute 'pitch_mm' must be at least {PITCH_RANGE_MM[0]:g} mm (got {pitch_mm!r})")
    n_columns = integer_attribute(attrs, "n_columns", fail, minimum=1, maximum=MAX_PIXELS_PER_SIDE)
    n_rows = integer_attribute(attrs, "n_rows", fail, minimum=1, maximum=MAX_PIXELS_PER_SIDE)
    shifted_rows = text_attribute(attrs, "shifted_rows", fail)
    if shifted_rows not in ("odd", "even"):
        fail(f"attribute 'shifted_rows' must be 'odd' or 'even' (got {shifted_rows!r})")
    try:
        return HexGrid(pitch_mm=pitch_mm, n_columns=n_columns, n_rows=n_rows, shifted_rows=shifted_rows)
    except ValueError as err:
        fail(f"not a usable chip geometry ({err})")
