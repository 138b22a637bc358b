"""Ways to damage a valid HDF5 file, as hypothesis strategies of plain data, and their application with h5py.

A mutation is a tuple ``(operation, target, parameter)``. ``target`` is an integer taken modulo the number of
objects (or attributes) the file holds when the mutation is applied, so every drawn mutation applies to any file,
and shrinking gives short, readable examples. Hand-written examples may name the target instead (an object path,
or ``(path, attribute name)``) and give an attribute value itself as the parameter. :func:`apply_structural`
applies a list of them to a copy of a file; :func:`apply_bytes` damages the bytes of a copy.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import h5py
import numpy as np
from hypothesis import strategies as st

__all__ = ["STRUCTURAL", "structural_mutations", "byte_mutations", "apply_structural", "apply_bytes",
           "ODD_VALUES", "odd_value", "describe"]

#: operations on objects (datasets and groups) and attributes
STRUCTURAL = ("delete_object", "rename_object", "delete_attribute", "set_attribute", "retype", "reshape",
              "revalue", "group_for_dataset", "dataset_for_group", "external_link", "external_storage",
              "virtual_dataset", "soft_link")

#: attributes a reader of each kind looks at, added to the existing ones as targets of ``set_attribute``
KNOWN_ATTRIBUTES = (("/", "format_version"), ("/", "trackfit_format"), ("/", "created_by"), ("/", "created_utc"),
                    ("/geometry", "pitch_mm"), ("/geometry", "n_columns"), ("/geometry", "n_rows"),
                    ("/geometry", "shifted_rows"), ("/events", "pedestal_subtracted"), ("/events", "trigger_mode"),
                    ("/events", "column_order"), ("/events", "n_rows"), ("/run", "nominal_counts_per_kev"),
                    ("/run", "design"))

#: attribute values of odd types and sizes (the forms defect reports met: 1.0, True, [1], numbers as text, bytes
#: that are not UTF-8, arrays, empty values, huge and non-finite numbers)
ODD_VALUES = (
    1.0, True, np.bool_(False), np.array([1]), np.array([1, 1]), "1", b"1", "1.0", -1, 0, 2**40, 2**63 - 1,
    np.uint64(2**64 - 1), np.float64("nan"), np.float64("inf"), -0.0, 1e300, 1e-300, "", "x" * 300,
    b"\xff\xfe\xfd", np.array([[1, 2], [3, 4]]), np.array([], dtype=np.float64), "empty", np.complex64(1 + 2j),
    "string-array", "opaque", "compound", np.float16(32768.0), np.int8(-1), "odd", "even", "raw-events",
    "event-table", "calibration", 0.05, 300, 352, "random", "self", "variable-length-bytes",
)
#: dtypes a dataset can be retyped to
RETYPES = ("int8", "uint8", "int16", "uint16", "int32", "uint32", "int64", "uint64", "float16", "float32", "float64",
           "bool", "complex64", "S8", "str", "compound")
#: reshapes of a dataset
RESHAPES = ("column", "row", "scalar", "empty", "drop_first", "drop_last", "append_zero", "append_extreme", "square")


def odd_value(k: int):
    value = ODD_VALUES[k % len(ODD_VALUES)]
    if isinstance(value, str) and value in ("empty", "string-array", "opaque", "compound", "variable-length-bytes"):
        return {"empty": lambda: h5py.Empty("f8"),
                "string-array": lambda: np.array(["odd", "even"], dtype=h5py.string_dtype()),
                "opaque": lambda: np.void(b"\x00\x01\x02"),
                "compound": lambda: np.array((1, 2.0), dtype=[("a", "i4"), ("b", "f8")]),
                "variable-length-bytes": lambda: np.array([b"\xff\xfe"], dtype=h5py.string_dtype("ascii"))}[value]()
    return value


def structural_mutations(max_size: int = 3):
    """Lists of 1 to ``max_size`` structural mutations."""
    one = st.tuples(st.sampled_from(STRUCTURAL), st.integers(0, 10_000), st.integers(0, 10_000))
    return st.lists(one, min_size=1, max_size=max_size)


def byte_mutations(max_size: int = 4):
    """Lists of byte damage: ``(kind, offset, parameter)``; offsets favour the first 4 kB (superblock, headers)."""
    offset = st.one_of(st.integers(0, 4095), st.integers(0, 2**31))
    one = st.tuples(st.sampled_from(("flip", "zero", "random", "truncate")), offset, st.integers(0, 2**16))
    return st.lists(one, min_size=1, max_size=max_size)


def _objects(f) -> list[str]:
    names = []
    f.visit(lambda name: names.append("/" + name))
    return sorted(names)


def _attributes(f) -> list[tuple[str, str]]:
    pairs = [("/", name) for name in f.attrs]
    for path in _objects(f):
        try:
            pairs += [(path, name) for name in f[path].attrs]
        except (KeyError, OSError):
            pass
    return sorted(set(pairs) | {p for p in KNOWN_ATTRIBUTES if p[0] in f})


def _datasets(f) -> list[str]:
    return [p for p in _objects(f) if isinstance(f.get(p), h5py.Dataset)]


def _replace(f, path, **create):
    del f[path]
    return f.create_dataset(path, **create)


def _retyped(data: np.ndarray, dtype: str):
    if dtype == "str":
        return np.array([str(v) for v in data.ravel()], dtype=h5py.string_dtype()).reshape(data.shape)
    if dtype == "compound":
        out = np.zeros(data.shape, dtype=[("value", "f8"), ("flag", "i1")])
        out["value"] = data.real if data.dtype.kind == "c" else data.astype("f8") if data.dtype.kind in "biuf" else 0
        return out
    if data.dtype.kind not in "biufc":
        return np.zeros(data.shape, dtype=dtype)
    with np.errstate(all="ignore"):
        return data.astype(dtype)


def _reshaped(data: np.ndarray, how: str):
    flat = data.ravel()
    if how == "column":
        return flat.reshape(-1, 1)
    if how == "row":
        return flat.reshape(1, -1)
    if how == "scalar":
        return flat[0] if flat.size else np.zeros((), data.dtype)
    if how == "empty":
        return np.zeros((0,) + data.shape[1:], data.dtype)
    if how == "drop_first":
        return data[1:]
    if how == "drop_last":
        return data[:-1]
    if how in ("append_zero", "append_extreme"):
        extra = np.zeros((1,) + data.shape[1:], data.dtype)
        if how == "append_extreme" and data.dtype.kind in "iu":
            extra[...] = np.iinfo(data.dtype).max
        elif how == "append_extreme" and data.dtype.kind == "f":
            extra[...] = np.inf
        return np.concatenate([data, extra]) if data.ndim else extra
    size = int(np.sqrt(flat.size))  # "square"
    return flat[: size * size].reshape(size, size)


def _revalued(data: np.ndarray, seed: int):
    """The same shape and dtype, values drawn from a mix of ordinary and extreme ones."""
    rng = np.random.default_rng(seed)
    if data.dtype.kind in "iu":
        info = np.iinfo(data.dtype)
        pool = np.array([info.min, info.max, 0, 1, -1 if info.min < 0 else 2, 7, 1000], dtype=np.int64)
        pool = pool.clip(info.min, info.max).astype(data.dtype)
    elif data.dtype.kind == "f":
        pool = np.array([0.0, -0.0, 1.0, np.nan, np.inf, -np.inf, 1e300, -1e-300], dtype=np.float64)
        with np.errstate(over="ignore"):
            pool = pool.astype(data.dtype)
    elif data.dtype.kind == "b":
        pool = np.array([True, False])
    else:
        return data
    out = data.copy()
    if out.size:
        k = rng.integers(1, out.size + 1)
        where = rng.choice(out.size, size=k, replace=False)
        out.reshape(-1)[where] = rng.choice(pool, size=k)
    return out


def apply_structural(source: Path, target: Path, mutations, outside: Path) -> list[str]:
    """Copy ``source`` to ``target`` and apply the mutations; returns what was done, one line each.

    ``outside`` is a file outside the HDF5 file (text) that links, external storage and virtual datasets point
    at; a copy of the source (``<target>.other.h5``) serves as an outside HDF5 file.
    """
    shutil.copyfile(source, target)
    other = target.with_name(target.name + ".other.h5")
    shutil.copyfile(source, other)
    done = []
    with h5py.File(target, "r+") as f:
        for operation, k, parameter in mutations:
            done.append(_apply_one(f, operation, k, parameter, outside, other))
    return done


def _pick(items, k):
    """``items[k % len(items)]``, or ``k`` itself when a hand-written example names it."""
    return k if not isinstance(k, int) else items[k % len(items)]


def _apply_one(f, operation, k, parameter, outside, other) -> str:
    objects = _objects(f)
    datasets = _datasets(f)
    if operation in ("delete_attribute", "set_attribute"):
        path, name = _pick(_attributes(f), k)
        if operation == "delete_attribute":
            if name in f[path].attrs:
                del f[path].attrs[name]
            return f"delete attribute {path}@{name}"
        value = odd_value(parameter) if isinstance(parameter, int) and not isinstance(parameter, bool) else parameter
        f[path].attrs[name] = value
        return f"set attribute {path}@{name} = {value!r}"
    if operation == "dataset_for_group":
        groups = [p for p in objects if isinstance(f.get(p), h5py.Group)]
        if not groups:
            return "no group to replace"
        path = _pick(groups, k)
        del f[path]
        f.create_dataset(path, data=np.arange(3))
        return f"replace group {path} by a dataset"
    if operation in ("delete_object", "rename_object", "soft_link") and objects:
        path = _pick(objects, k)
        if path not in f:  # a parent was removed by an earlier mutation
            return f"{path} already gone"
        if operation == "delete_object":
            del f[path]
            return f"delete {path}"
        if operation == "rename_object":
            new = path + "_renamed"
            f.move(path, new)
            return f"rename {path} -> {new}"
        link = _pick(objects, parameter)
        del f[path]
        f[path] = h5py.SoftLink(link if link != path else path)
        return f"replace {path} by a soft link to {link}"
    if not datasets:
        return f"no dataset for {operation}"
    path = _pick(datasets, k)
    ds = f[path]
    data = ds[()]
    data = np.asarray(data)
    if operation == "retype":
        dtype = RETYPES[parameter % len(RETYPES)]
        _replace(f, path, data=_retyped(data, dtype))
        return f"retype {path} to {dtype}"
    if operation == "reshape":
        how = RESHAPES[parameter % len(RESHAPES)]
        _replace(f, path, data=_reshaped(data, how))
        return f"reshape {path}: {how}"
    if operation == "revalue":
        _replace(f, path, data=_revalued(data, parameter))
        return f"revalue {path} (seed {parameter})"
    if operation == "group_for_dataset":
        del f[path]
        f.create_group(path)
        return f"replace dataset {path} by a group"
    if operation == "external_link":
        del f[path]
        target = (str(other), path) if parameter % 2 else (str(outside), "/data")
        f[path] = h5py.ExternalLink(*target)
        return f"replace {path} by an external link to {target}"
    if operation == "external_storage":
        size = max(data.size, 1) * data.dtype.itemsize if data.dtype.kind in "biuf" else 8
        shape = data.shape if data.dtype.kind in "biuf" else (1,)
        dtype = data.dtype if data.dtype.kind in "biuf" else np.int64
        del f[path]
        f.create_dataset(path, shape=shape, dtype=dtype, external=[(str(outside), 0, size)])
        return f"replace {path} by external storage in {outside.name}"
    if operation == "virtual_dataset":
        with h5py.File(other, "r") as o:
            source = o[path] if path in o else None
            if source is None or source.dtype.kind not in "biuf" or not source.shape:
                return f"no virtual dataset for {path}"
            layout = h5py.VirtualLayout(shape=source.shape, dtype=source.dtype)
            layout[...] = h5py.VirtualSource(source)
        del f[path]
        f.create_virtual_dataset(path, layout)
        return f"replace {path} by a virtual dataset of {other.name}"
    raise AssertionError(f"unknown operation {operation}")


def apply_bytes(source: Path, target: Path, mutations) -> list[str]:
    """Copy ``source`` to ``target`` with its bytes damaged; returns what was done."""
    data = bytearray(Path(source).read_bytes())
    done = []
    for kind, offset, parameter in mutations:
        if not data:
            break
        offset %= len(data)
        if kind == "flip":
            data[offset] ^= 1 << (parameter % 8)
            done.append(f"flip bit {parameter % 8} of byte {offset}")
        elif kind == "zero":
            length = 1 + parameter % 64
            data[offset:offset + length] = bytes(len(data[offset:offset + length]))
            done.append(f"zero {length} bytes at {offset}")
        elif kind == "random":
            length = 1 + parameter % 16
            chunk = np.random.default_rng(parameter).integers(0, 256, length, dtype=np.uint8).tobytes()
            data[offset:offset + length] = chunk[: len(data[offset:offset + length])]
            done.append(f"overwrite {length} bytes at {offset} (seed {parameter})")
        else:
            del data[offset:]
            done.append(f"truncate at {offset}")
    Path(target).write_bytes(bytes(data))
    return done


def describe(done) -> str:
    return "; ".join(done)
