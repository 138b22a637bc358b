"""Small valid files of every trackfit kind, and named ways of damaging them (the reader tests' catalogue).

Each ``make_*`` function writes a small valid file; :func:`structural_damages` lists, for an existing file, named
malformations (delete, retype or reshape a dataset; delete or retype an attribute; put a group, a scalar, strings,
variable-length or compound data where an array is expected; point a dataset at another file) and
:func:`byte_damages` seeded byte damage. Applying one to a copy of the file gives a damaged file every reader must
refuse with its own error (or accept, for damage that does not matter to it).
"""

from __future__ import annotations

import shutil
from pathlib import Path

import h5py
import numpy as np

from trackfit import HexGrid

GRID = HexGrid(n_columns=24, n_rows=20)


# ---------------------------------------------------------------------------------------------- valid files
def make_raw(path, n_events: int = 12) -> Path:
    from trackfit import RawEventWriter
    from trackfit.recon._synthetic import toy_tracks

    batch = toy_tracks(n_events, 3, grid=GRID, roi_shape=(6, 5), n_electrons=80, centre_region_mm=0.5)
    truth = {"energy_kev": np.linspace(2.0, 8.0, n_events)}
    batch = batch.__class__(roi=batch.roi, start=batch.start, signal=batch.signal, time_s=batch.time_s,
                            trigger_id=batch.trigger_id, grid=batch.grid, truth=truth)
    with RawEventWriter(path, GRID, run_info={"source": "toy", "counts_per_kev_nominal": 100.0},
                        created_utc="2026-01-01T00:00:00Z") as writer:
        writer.append(batch)
    return Path(path)


def make_table(path, n_rows: int = 10) -> Path:
    from trackfit.io.table import write_table

    rng = np.random.default_rng(5)
    columns = {"event_index": np.arange(n_rows, dtype=np.int64), "status": np.zeros(n_rows, np.uint16),
               "energy_kev": rng.uniform(2, 8, n_rows).astype(np.float32),
               "emission_rad": rng.uniform(-np.pi, np.pi, n_rows).astype(np.float32)}
    return write_table(path, columns, provenance={"note": "toy", "config_toml": "x = 1\n" * 2000})


def make_calibration(path) -> Path:
    from trackfit.analysis import Calibration, EnergyScale, GainMap, ModulationFactorCurve

    edges = np.array([-2.0, 0.0, 2.0])
    gain = GainMap(x_edges_mm=edges, y_edges_mm=edges, relative_gain=np.array([[0.9, 1.1], [1.0, 1.0]]),
                   relative_gain_err=np.full((2, 2), 0.01), counts=np.array([[500, 600], [400, 700]]),
                   reference_peak=5000.0, min_counts=300)
    scale = EnergyScale(coefficients=(0.0, 5.895 / 5000.0), line_pulse_heights=(5000.0,), line_energies_kev=(5.895,))
    curve = ModulationFactorCurve(coefficients=(0.1, 0.2), energy_range_kev=(2.0, 8.0), points_energy_kev=(2.0, 8.0),
                                  points_value=(0.24, 0.52), points_error=(0.01, 0.01))
    return Calibration(energy_scale=scale, gain_map=gain, modulation_factor=curve).save(path)


def make_pixel_map(path) -> Path:
    from trackfit.io.pixelmap import PixelMap, SourceRun, write_pixel_map

    rng = np.random.default_rng(1)
    shape = GRID.shape
    pixel_map = PixelMap(grid=GRID, pedestal_adc=rng.normal(400, 20, shape), pedestal_error_adc=np.full(shape, 0.1),
                         noise_adc=rng.uniform(1.5, 2.5, shape), noise_error_adc=np.full(shape, 0.08),
                         occupancy=np.zeros(shape), n_samples=np.full(shape, 400), n_above=np.zeros(shape, int),
                         code=np.zeros(shape, np.uint8), settings={"min_samples": 50},
                         statistics={"noise_median_adc": 2.0},
                         sources=(SourceRun(name="ped.h5", fingerprint="crc32:roi=1", n_events=400,
                                            trigger_mode="random", pedestal_subtracted=False),))
    return write_pixel_map(path, pixel_map)


def make_response(path) -> Path:
    from trackfit.response import ABSORPTION_COLUMNS, PER_ENERGY_COLUMNS, DetectorResponse
    from trackfit.simulate import load_preset

    energy = np.array([2.0, 4.0, 8.0])
    per_energy = {name: np.full(3, 0.5) for name in PER_ENERGY_COLUMNS}
    per_energy["energy_kev"] = energy
    absorption = {name: np.full(5, 0.5) for name in ABSORPTION_COLUMNS}
    absorption["energy_kev"] = np.linspace(2.0, 8.0, 5)
    response = DetectorResponse(name="toy", design=load_preset("hedme-1atm-1cm"), per_energy=per_energy,
                                absorption=absorption, chip_area_cm2=2.0)
    return response.save(path)


MAKERS = {"raw": make_raw, "table": make_table, "calibration": make_calibration, "pixel_map": make_pixel_map,
          "response": make_response}


# ---------------------------------------------------------------------------------------------- the readers
def read_raw(path):
    from trackfit import open_raw

    with open_raw(path) as reader:
        for _ in reader.iter_batches(5):
            pass
    with open_raw(path, strict=False) as reader:
        reader.validate()


def summarize(path):
    from trackfit.io.summary import summarize_raw

    return summarize_raw(path).as_text()


def read_table(path):
    from trackfit.io.table import read_table

    return read_table(path)


def read_calibration(path):
    from trackfit.analysis import Calibration

    return Calibration.load(path)


def read_pixel_map(path):
    from trackfit.io.pixelmap import read_pixel_map

    return read_pixel_map(path)


def read_response(path):
    from trackfit.response import DetectorResponse

    return DetectorResponse.load(path)


#: kind -> the reader calls that must either succeed or raise our own error
READERS = {"raw": (read_raw, summarize), "table": (read_table,), "calibration": (read_calibration,),
           "pixel_map": (read_pixel_map,), "response": (read_response,)}


# ---------------------------------------------------------------------------------------------- damage
def _objects(path):
    """(datasets, groups, attributes) of a file: names, and (owner, attribute name) pairs."""
    datasets, groups, attributes = [], ["/"], [("/", k) for k in h5py.File(path, "r").attrs]
    with h5py.File(path, "r") as f:
        def visit(name, obj):
            (datasets if isinstance(obj, h5py.Dataset) else groups).append("/" + name)
            attributes.extend(("/" + name, k) for k in obj.attrs)
        f.visititems(visit)
    return datasets, groups, attributes


def _replace_dataset(f, name, make):
    del f[name]
    make(f, name)


_VLEN_INT = h5py.vlen_dtype(np.int32)
_COMPOUND = np.dtype([("a", np.int16), ("b", np.float32)])

#: what can take the place of a dataset: name -> function(file, name)
DATASET_REPLACEMENTS = {
    "deleted": lambda f, n: None,
    "group": lambda f, n: f.create_group(n),
    "scalar": lambda f, n: f.create_dataset(n, data=7),
    "empty": lambda f, n: f.create_dataset(n, shape=(0,), dtype=np.int16),
    "null": lambda f, n: f.create_dataset(n, data=h5py.Empty("f8")),
    "2-d": lambda f, n: f.create_dataset(n, data=np.zeros((3, 2, 2), np.int64)),
    "strings": lambda f, n: f.create_dataset(n, data=np.array([b"1", b"2"] * 8, dtype="S1")),
    "vlen-strings": lambda f, n: f.create_dataset(n, data=np.array(["a"] * 8, dtype=object),
                                                  dtype=h5py.string_dtype()),
    "vlen-ints": lambda f, n: f.create_dataset(n, shape=(4,), dtype=_VLEN_INT),
    "compound": lambda f, n: f.create_dataset(n, shape=(16,), dtype=_COMPOUND),
    "float16": lambda f, n: f.create_dataset(n, data=np.full(16, 3.0, np.float16)),
    "bool": lambda f, n: f.create_dataset(n, data=np.ones(16, bool)),
    "big-endian": lambda f, n: f.create_dataset(n, data=np.arange(16, dtype=">i8")),
    "huge-shape": lambda f, n: f.create_dataset(n, shape=(2**40,), dtype=np.int8, chunks=(1024,)),
    "soft-link-loop": lambda f, n: f.__setitem__(n, h5py.SoftLink(n)),
    "dangling-soft-link": lambda f, n: f.__setitem__(n, h5py.SoftLink("/nowhere")),
}


def _bad_utf8(f, owner, key):
    tid = h5py.h5t.C_S1.copy()
    tid.set_size(4)
    tid.set_cset(h5py.h5t.CSET_UTF8)
    space = h5py.h5s.create(h5py.h5s.SCALAR)
    obj = f[owner]
    if key in obj.attrs:
        del obj.attrs[key]
    attr = h5py.h5a.create(obj.id, key.encode(), tid, space)
    attr.write(np.array(b"\xff\xfe\xfa\x80", dtype="S4"), mtype=tid)


#: what can take the place of an attribute: name -> function(file, owner, key)
ATTRIBUTE_REPLACEMENTS = {
    "deleted": lambda f, o, k: f[o].attrs.__delitem__(k),
    "string-number": lambda f, o, k: f[o].attrs.__setitem__(k, "1"),
    "float": lambda f, o, k: f[o].attrs.__setitem__(k, 1.0),
    "bool": lambda f, o, k: f[o].attrs.__setitem__(k, True),
    "array": lambda f, o, k: f[o].attrs.__setitem__(k, np.array([1, 2])),
    "empty-array": lambda f, o, k: f[o].attrs.__setitem__(k, np.zeros(0)),
    "huge-float": lambda f, o, k: f[o].attrs.__setitem__(k, 1e300),
    "nan": lambda f, o, k: f[o].attrs.__setitem__(k, np.nan),
    "negative": lambda f, o, k: f[o].attrs.__setitem__(k, -5),
    "huge-int": lambda f, o, k: f[o].attrs.__setitem__(k, np.uint64(2**64 - 1)),
    "null": lambda f, o, k: f[o].attrs.__setitem__(k, h5py.Empty("f8")),
    "compound": lambda f, o, k: f[o].attrs.__setitem__(k, np.zeros(2, _COMPOUND)),
    "bad-utf8": _bad_utf8,
    "text": lambda f, o, k: f[o].attrs.__setitem__(k, "not what was expected"),
}


def structural_damages(path):
    """Named malformations of a file: list of (name, function(h5py.File))."""
    datasets, groups, attributes = _objects(path)
    out = []
    for name in datasets:
        for what, make in DATASET_REPLACEMENTS.items():
            out.append((f"dataset {name} -> {what}", lambda f, n=name, m=make: _replace_dataset(f, n, m)))
        out.append((f"dataset {name} -> external link",
                    lambda f, n=name: (f.__delitem__(n), f.__setitem__(n, h5py.ExternalLink("other.h5", "/x")))))
    for name in groups[1:]:
        out.append((f"group {name} -> deleted", lambda f, n=name: f.__delitem__(n)))
        out.append((f"group {name} -> dataset",
                    lambda f, n=name: _replace_dataset(f, n, DATASET_REPLACEMENTS["scalar"])))
    for owner, key in attributes:
        for what, make in ATTRIBUTE_REPLACEMENTS.items():
            out.append((f"attribute {owner}:{key} -> {what}", lambda f, o=owner, k=key, m=make: m(f, o, k)))
    return out


def apply_damage(source, target, damage) -> Path:
    """Copy ``source`` to ``target`` and apply ``damage(h5py.File)`` to the copy."""
    shutil.copyfile(source, target)
    with h5py.File(target, "a") as f:
        damage(f)
    return Path(target)


def byte_damages(path, n: int, seed: int):
    """``n`` seeded byte damages of a file: list of (name, bytes of the damaged file)."""
    data = Path(path).read_bytes()
    rng = np.random.default_rng(seed)
    out = []
    for k in range(n):
        buf = bytearray(data)
        mode = k % 4
        if mode == 0:  # a few random bytes anywhere
            where = rng.integers(0, len(buf), rng.integers(1, 9))
            for i in where:
                buf[i] = int(rng.integers(0, 256))
            name = f"bytes {sorted(where.tolist())}"
        elif mode == 1:  # a run of bytes in the metadata at the start of the file
            i = int(rng.integers(0, min(len(buf), 4096)))
            length = int(rng.integers(1, 32))
            buf[i:i + length] = rng.integers(0, 256, len(buf[i:i + length]), dtype=np.uint8).tobytes()
            name = f"run of {length} at {i}"
        elif mode == 2:  # one bit
            i = int(rng.integers(0, len(buf)))
            buf[i] ^= 1 << int(rng.integers(0, 8))
            name = f"bit at {i}"
        else:  # truncated
            cut = int(rng.integers(0, len(buf)))
            buf = buf[:cut]
            name = f"truncated at {cut}"
        out.append((name, bytes(buf)))
    return out
