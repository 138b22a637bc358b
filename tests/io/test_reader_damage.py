"""Damaged, unusual and hostile files: every reader either reads them or refuses them with its own error naming the
file and the dataset; never another exception, never a hang (docs/raw-format.md, docs/table-format.md,
docs/calibration-format.md, docs/pixel-map-format.md, docs/response-format.md).

The malformations come from ``file_damage.py`` (a named catalogue and seeded samples of it). The expected outcome
of each named case is the format specification itself (the page of each format says what every object must be);
the external-storage cases compare what an allowed read returns with the bytes numpy reads from the other file.
"""

import json
import os
import pickle
import re
import shutil
import subprocess
import sys
import textwrap

import file_damage as damage
import h5py
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from trackfit.analysis.calfile import CalibrationFormatError
from trackfit.cli import main
from trackfit.io.errors import FileFormatError
from trackfit.io.heapcheck import damaged_global_heaps
from trackfit.io.pixelmap import PixelMapFormatError
from trackfit.io.raw import RawFormatError, open_raw
from trackfit.io.structure import EXTERNAL_VARIABLE
from trackfit.io.table import TableFormatError
from trackfit.response import ResponseFormatError

ERRORS = {"raw": RawFormatError, "table": TableFormatError, "calibration": CalibrationFormatError,
          "pixel_map": PixelMapFormatError, "response": ResponseFormatError}


@pytest.fixture(scope="module")
def valid(tmp_path_factory):
    folder = tmp_path_factory.mktemp("valid")
    return {kind: make(folder / f"{kind}.h5") for kind, make in damage.MAKERS.items()}


def outcome(kind, path):
    """Run every reader of ``kind`` on ``path``: "accepted", or the error (ours), else the test fails."""
    for read in damage.READERS[kind]:
        try:
            read(path)
        except ERRORS[kind] as err:
            assert str(path) in str(err) and err.path == str(path), str(err)
            return err
        except Exception as err:  # noqa: BLE001 - the assertion is the point
            pytest.fail(f"{read.__name__} raised {type(err).__name__} (not {ERRORS[kind].__name__}): {err}")
    return "accepted"


def apply_named(valid, kind, name, tmp_path):
    damages = dict(damage.structural_damages(valid[kind]))
    return damage.apply_damage(valid[kind], tmp_path / f"{kind}.h5", damages[name])


# ------------------------------------------------------------------------------------------------ named catalogue
#: (kind, malformation, dataset the error must name, text in the message)
CATALOGUE = [
    ("raw", "dataset /events/signal -> deleted", "/events/signal", "missing dataset"),
    ("raw", "dataset /events/signal -> strings", "/events/signal", "expected dtype int16"),
    ("raw", "dataset /events/roi -> compound", "/events/roi", "expected dtype int32"),
    ("raw", "dataset /events/start -> vlen-ints", "/events/start", "expected dtype int64"),
    ("raw", "dataset /events/time_s -> null", "/events/time_s", "found a null (empty) dataspace"),
    ("raw", "dataset /events/roi -> soft-link-loop", "/events/roi", "cannot be read"),
    ("raw", "dataset /events/roi -> dangling-soft-link", "/events/roi", "does not exist"),
    ("raw", "dataset /events/trigger_id -> group", "/events/trigger_id", "expected a dataset, found a group"),
    ("raw", "dataset /truth/energy_kev -> group", "/truth/energy_kev", "expected a dataset, found a group"),
    ("raw", "dataset /truth/energy_kev -> strings", "/truth/energy_kev", "expected a boolean or signed integer"),
    ("raw", "dataset /events/signal -> external link", "/events/signal", "the data would come from another file"),
    ("raw", "group /events -> dataset", "/events", "expected a group, found a dataset"),
    ("raw", "group /geometry -> deleted", "/geometry", "missing group"),
    ("raw", "attribute /:format_version -> float", "/", "must be an integer, stored as one (got a floating-point"),
    ("raw", "attribute /:format_version -> bool", "/", "must be an integer, stored as one (got a boolean"),
    ("raw", "attribute /:format_version -> array", "/", "must be an integer, stored as one (got an array"),
    ("raw", "attribute /:format_version -> string-number", "/", "must be an integer, stored as one (got text"),
    ("raw", "attribute /:trackfit_format -> array", "/", "must be 'raw-events'"),
    ("raw", "attribute /:created_by -> bad-utf8", "/", "attribute 'created_by' cannot be read (UnicodeDecodeError"),
    ("raw", "attribute /geometry:n_columns -> huge-float", "/geometry", "'n_columns' must be an integer"),
    ("raw", "attribute /geometry:n_columns -> huge-int", "/geometry", "'n_columns' must be an integer from 1 to"),
    ("raw", "attribute /geometry:n_rows -> string-number", "/geometry", "'n_rows' must be an integer, stored as "
                                                                        "one (got text"),
    ("raw", "attribute /geometry:pitch_mm -> huge-float", "/geometry", "'pitch_mm' must be a finite number > 0 up "
                                                                       "to 10 "),
    ("raw", "attribute /geometry:pitch_mm -> nan", "/geometry", "'pitch_mm' must be a finite number"),
    ("raw", "attribute /geometry:pitch_mm -> string-number", "/geometry", "'pitch_mm' must be a number, stored as "
                                                                          "one"),
    ("raw", "attribute /geometry:shifted_rows -> float", "/geometry", "'shifted_rows' must be text"),
    ("raw", "attribute /run:source -> bad-utf8", "/run", "attribute 'source' cannot be read"),
    ("table", "dataset /events/energy_kev -> 2-d", "/events/energy_kev", "expected a 1-D array"),
    ("table", "dataset /events/energy_kev -> vlen-strings", "/events/energy_kev", "dtype"),
    ("table", "dataset /events/status -> compound", "/events/status", "dtype"),
    ("table", "dataset /events/status -> external link", "/events/status", "another file: 'other.h5'"),
    ("table", "group /events -> dataset", "/events", "expected a group, found a dataset"),
    ("table", "group /provenance -> dataset", "/provenance", "expected a group, found a dataset"),
    ("table", "attribute /events:column_order -> float", "/events", "'column_order' must be a list of column names"),
    ("table", "attribute /events:n_rows -> string-number", "/events", "'n_rows' must be the integer number of rows"),
    ("table", "attribute /:format_version -> nan", "/", "must be an integer"),
    ("table", "attribute /provenance:note -> bad-utf8", "/provenance", "attribute 'note' cannot be read"),
    ("calibration", "attribute /:format_version -> array", "/", "must be an integer"),
    ("calibration", "attribute /gain_map:min_counts -> string-number", "/gain_map", "'min_counts' must be an "
                                                                                   "integer, stored as one"),
    ("calibration", "attribute /gain_map:reference_peak -> text", "/gain_map", "'reference_peak' must be a number"),
    ("calibration", "attribute /energy_scale:coefficients -> text", "/energy_scale", "'coefficients' must be a "
                                                                                     "non-empty array of numbers"),
    ("calibration", "attribute /energy_scale:provenance -> text", "/energy_scale", "must be JSON text"),
    ("calibration", "dataset /gain_map/counts -> huge-shape", "/gain_map/counts", "expected a 2-D array"),
    ("calibration", "dataset /gain_map/counts -> scalar", "/gain_map/counts", "expected a 2-D array"),
    ("calibration", "dataset /energy_scale/line_energy_kev -> 2-d", "/energy_scale/line_energy_kev",
     "expected a 1-D array"),
    ("calibration", "dataset /gain_map/counts -> vlen-strings", "/gain_map/counts", "dtype"),
    ("calibration", "dataset /energy_scale/line_energy_kev -> soft-link-loop", "/energy_scale/line_energy_kev",
     "cannot be read"),
    ("pixel_map", "dataset /pixels/code -> compound", "/pixels/code", "expected the chip's shape"),
    ("pixel_map", "dataset /pixels/noise_adc -> huge-shape", "/pixels/noise_adc", "expected the chip's shape"),
    ("pixel_map", "dataset /sources/n_events -> vlen-strings", "/sources/n_events", "expected integers"),
    ("pixel_map", "dataset /sources/name -> huge-shape", "/sources/name", "expected at most"),
    ("pixel_map", "dataset /sources/name -> deleted", "/sources/name", "missing dataset"),
    ("pixel_map", "attribute /geometry:n_rows -> bool", "/geometry", "'n_rows' must be an integer, stored as one"),
    ("pixel_map", "attribute /:format_version -> bool", "/", "must be an integer"),
    ("response", "attribute /:chip_area_cm2 -> string-number", "/", "'chip_area_cm2' must be a number, stored as one"),
    ("response", "attribute /:design_toml -> float", "/", "'design_toml' must be text"),
    ("response", "attribute /:design_toml -> text", "/", "'design_toml' is not a valid design"),
    ("response", "attribute /:notes_json -> text", "/", "'notes_json' is not JSON text"),
    ("response", "attribute /:origin -> text", "/", "'origin' must be one of"),
    ("response", "group /absorption -> dataset", "/absorption", "expected a group, found a dataset"),
    ("response", "dataset /per_energy/energy_kev -> vlen-ints", "/per_energy/energy_kev", "dtype"),
    ("response", "dataset /per_energy/energy_kev -> dangling-soft-link", "/per_energy/energy_kev", "does not exist"),
]


@pytest.mark.parametrize(("kind", "name", "dataset", "text"), CATALOGUE, ids=[f"{k}: {n}" for k, n, _, _ in CATALOGUE])
def test_named_malformations_are_refused_naming_file_and_dataset(valid, tmp_path, kind, name, dataset, text):
    path = apply_named(valid, kind, name, tmp_path)
    err = outcome(kind, path)
    assert isinstance(err, FileFormatError), f"{name} was accepted"
    assert err.dataset == dataset and f"dataset '{dataset}'" in str(err), str(err)
    assert text in str(err), str(err)


@pytest.mark.parametrize("kind", list(damage.MAKERS))
def test_valid_files_read_and_a_seeded_sample_of_every_malformation_never_escapes(valid, tmp_path, kind):
    assert outcome(kind, valid[kind]) == "accepted"
    damages = damage.structural_damages(valid[kind])
    rng = np.random.default_rng(11)
    for k in rng.choice(len(damages), size=min(30, len(damages)), replace=False):
        name, change = damages[k]
        try:
            path = damage.apply_damage(valid[kind], tmp_path / f"{kind}_{k}.h5", change)
        except (OSError, ValueError, TypeError):  # h5py itself cannot make this one of this file
            continue
        outcome(kind, path)


@pytest.mark.slow
@pytest.mark.parametrize("kind", list(damage.MAKERS))
def test_every_malformation_of_the_catalogue_never_escapes(valid, tmp_path, kind):
    for k, (_, change) in enumerate(damage.structural_damages(valid[kind])):
        try:
            path = damage.apply_damage(valid[kind], tmp_path / f"{kind}_{k}.h5", change)
        except (OSError, ValueError, TypeError):
            continue
        outcome(kind, path)


# ------------------------------------------------------------------------------------------------ byte damage
_SWEEP = textwrap.dedent("""
    import sys
    from pathlib import Path
    sys.path.insert(0, {tests!r})
    import file_damage as damage
    from trackfit.io.errors import FileFormatError

    target = Path({target!r})
    for k, (name, data) in enumerate(damage.byte_damages({path!r}, {n}, {seed})):
        if k < {first}:
            continue
        print("AT", k, flush=True)
        target.write_bytes(data)
        for read in damage.READERS[{kind!r}]:
            try:
                read(target)
            except (FileFormatError, FileNotFoundError):
                break
            except Exception as err:
                print(f"ESCAPED {{name}}: {{read.__name__}} {{type(err).__name__}}: {{err}}")
                sys.exit(1)
    print("ok")
""")


def _run_byte_sweep(valid, tmp_path, kind, n, seed, timeout_s):
    """Seeded byte damages read in a child process: each is read or refused with our error, never another
    exception, never a hang (the time limit). Damage that crashes the HDF5 library itself (a signal, which no
    Python code can catch) must be refused by the structure probe ``trackfit info`` runs first; the sweep then goes
    on after it. Returns the number of such crashes."""
    from trackfit.io.probe import probe_structure

    damages = damage.byte_damages(valid[kind], n, seed)
    first, crashes = 0, 0
    while first < n:
        code = _SWEEP.format(tests=os.path.dirname(__file__), target=str(tmp_path / "damaged.h5"), kind=kind,
                             path=str(valid[kind]), n=n, seed=seed, first=first)
        result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=timeout_s,
                                env={**os.environ, "PYTHONWARNINGS": "ignore"})
        if result.returncode == 0 and result.stdout.strip().endswith("ok"):
            return crashes
        assert result.returncode < 0, result.stdout[-2000:] + result.stderr[-2000:]
        k = int(result.stdout.split("AT ")[-1].split()[0])
        crashed = tmp_path / f"crash_{k}.h5"
        crashed.write_bytes(damages[k][1])
        with pytest.raises(FileFormatError, match="crashed|did not finish"):
            probe_structure(crashed, error=FileFormatError, timeout_s=60)
        crashes += 1
        first = k + 1
    return crashes


def test_byte_damage_of_a_raw_file_is_read_or_refused(valid, tmp_path):
    _run_byte_sweep(valid, tmp_path, "raw", 24, 3, timeout_s=240)


@pytest.mark.slow
@pytest.mark.parametrize("kind", list(damage.MAKERS))
def test_byte_damage_of_every_kind_is_read_or_refused(valid, tmp_path, kind):
    _run_byte_sweep(valid, tmp_path, kind, 200, 7, timeout_s=1200)


def _damage_heap_object(source, target):
    """The reproduced endless open: the size of the second object of the first global heap collection (a text
    attribute) grows from 14 to 142 bytes."""
    data = bytearray(source.read_bytes())
    collection = data.find(b"GCOL")
    first_size = int.from_bytes(data[collection + 24:collection + 32], "little")
    second = collection + 16 + 16 + (first_size + 7) // 8 * 8
    data[second + 8] += 128
    target.write_bytes(bytes(data))
    return target


def test_a_damaged_global_heap_is_refused_before_the_hdf5_library_loops_on_it(valid, tmp_path):
    bad = _damage_heap_object(valid["raw"], tmp_path / "heap.h5")
    assert damaged_global_heaps(valid["raw"]) == []
    assert damaged_global_heaps(bad)
    code = f"from trackfit import open_raw\nopen_raw({str(bad)!r})"
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert "RawFormatError" in result.stderr and "global heap collection at byte" in result.stderr, result.stderr
    result = subprocess.run([sys.executable, "-m", "trackfit", "info", str(bad)], capture_output=True, text=True,
                            timeout=120)
    assert result.returncode == 2 and "Traceback" not in result.stderr and str(bad) in result.stderr


def test_the_heap_check_finds_the_same_damage_without_memory_maps(valid, tmp_path, monkeypatch):
    """The check maps the file; where a file system refuses memory maps it reads the two ends instead."""
    import mmap

    import trackfit.io.heapcheck as heapcheck

    bad = _damage_heap_object(valid["raw"], tmp_path / "heap.h5")
    padded = tmp_path / "padded.h5"  # the damaged collection in the first MiB of a file of more than two MiB
    padded.write_bytes(bad.read_bytes() + bytes(3 * heapcheck.SCAN_BYTES))
    tail = tmp_path / "tail.h5"  # and in the last MiB (the start of the damaged file after three MiB of zeros)
    tail.write_bytes(bytes(3 * heapcheck.SCAN_BYTES) + bad.read_bytes()[:heapcheck.SCAN_BYTES // 2])
    mapped = {path: damaged_global_heaps(path) for path in (bad, padded, tail, valid["raw"])}

    def refuse(*args, **kwargs):
        raise OSError("memory maps are not supported here")

    monkeypatch.setattr(mmap, "mmap", refuse)
    read = {path: damaged_global_heaps(path) for path in mapped}
    assert read == mapped
    assert mapped[bad] and mapped[padded] == mapped[bad] and mapped[valid["raw"]] == []
    shift = 3 * heapcheck.SCAN_BYTES  # byte positions are the file's, in the offset and in the text
    assert [offset for offset, _ in mapped[tail]] == [offset + shift for offset, _ in mapped[bad]]
    position = int(re.search(r"at byte (\d+) ", mapped[bad][0][1]).group(1))  # inside the collection
    assert mapped[bad][0][0] < position < mapped[bad][0][0] + 4096
    assert mapped[tail][0][1] == mapped[bad][0][1].replace(f"byte {position} ", f"byte {position + shift} ")
    empty = tmp_path / "empty.h5"
    empty.write_bytes(b"")
    assert damaged_global_heaps(empty) == []


# ------------------------------------------------------------------------------------------------ non-regular files
def test_pipes_directories_and_devices_are_refused_before_hdf5_opens_them(valid, tmp_path):
    fifo = tmp_path / "pipe.h5"
    os.mkfifo(fifo)
    for path, what in ((fifo, r"a named pipe \(FIFO\)"), (tmp_path, "a directory"),
                       ("/dev/null", "a character device")):
        for kind, read in (("raw", damage.read_raw), ("table", damage.read_table),
                           ("calibration", damage.read_calibration), ("pixel_map", damage.read_pixel_map),
                           ("response", damage.read_response)):
            with pytest.raises(ERRORS[kind], match=f"is {what}, not a regular file"):
                read(path)
    result = subprocess.run([sys.executable, "-m", "trackfit", "info", str(fifo)], capture_output=True, text=True,
                            timeout=120)
    assert result.returncode == 2 and "named pipe" in result.stderr and "Traceback" not in result.stderr


# ------------------------------------------------------------------------------------------------ external data
def _signal_values(path):
    with open_raw(path) as reader:
        return reader.read_all().signal


def test_external_links_storage_and_virtual_datasets_are_refused_unless_allowed(valid, tmp_path, monkeypatch,
                                                                                capsys):
    monkeypatch.chdir(tmp_path)  # h5py resolves external storage and links from the working directory
    with h5py.File(valid["raw"], "r") as f:
        signal = f["events/signal"][()]
    # external storage: the signal's bytes in a plain binary file next to it
    np.arange(len(signal), dtype="<i2").tofile(tmp_path / "pixels.bin")
    storage = tmp_path / "storage.h5"
    shutil.copyfile(valid["raw"], storage)
    with h5py.File(storage, "a") as f:
        del f["events/signal"]
        f["events"].create_dataset("signal", shape=signal.shape, dtype=np.int16,
                                   external=[("pixels.bin", 0, signal.nbytes)])
    # an external link to the signal of another file, and a virtual dataset mapping it
    other = tmp_path / "other.h5"
    with h5py.File(other, "w") as f:
        f["signal"] = (signal[::-1]).astype(np.int16)
    linked, virtual = tmp_path / "linked.h5", tmp_path / "virtual.h5"
    for path in (linked, virtual):
        shutil.copyfile(valid["raw"], path)
    with h5py.File(linked, "a") as f:
        del f["events/signal"]
        f["events/signal"] = h5py.ExternalLink("other.h5", "/signal")
    with h5py.File(virtual, "a") as f:
        del f["events/signal"]
        layout = h5py.VirtualLayout(shape=signal.shape, dtype=np.int16)
        layout[:] = h5py.VirtualSource("other.h5", "signal", shape=signal.shape)
        f["events"].create_virtual_dataset("signal", layout)

    for path, target, how in ((storage, "'pixels.bin'", "external storage"), (linked, "'other.h5'", "external link"),
                              (virtual, "'other.h5'", "virtual dataset")):
        with pytest.raises(RawFormatError) as err:
            open_raw(path)
        assert err.value.dataset == "/events/signal" and "the data would come from another file" in str(err.value)
        assert target in str(err.value) and how in str(err.value) and "allow_external=True" in str(err.value)
        assert main(["info", str(path)]) == 2
        assert "--allow-external-storage" in capsys.readouterr().err
    # allowed deliberately: the values are those numpy reads from the other file
    with open_raw(storage, allow_external=True) as reader:
        np.testing.assert_array_equal(reader.read_all().signal, np.fromfile(tmp_path / "pixels.bin", dtype="<i2"))
    for path in (linked, virtual):
        with open_raw(path, allow_external=True) as reader:
            np.testing.assert_array_equal(reader.read_all().signal, signal[::-1])
    assert main(["info", "--allow-external-storage", str(linked)]) == 0
    # every command: refused, then allowed by the global flag (which worker processes inherit through the environment)
    monkeypatch.delenv(EXTERNAL_VARIABLE, raising=False)  # restored (absent) after the test
    assert main(["reconstruct", str(linked), "-o", str(tmp_path / "refused.h5")]) == 2
    assert "the data would come from another file" in capsys.readouterr().err
    assert not (tmp_path / "refused.h5").exists()
    assert main(["--allow-external-storage", "reconstruct", str(linked), "-o", str(tmp_path / "allowed.h5")]) == 0
    assert os.environ[EXTERNAL_VARIABLE] == "1"
    with h5py.File(tmp_path / "allowed.h5", "r") as f, open_raw(valid["raw"]) as reader:
        assert f["events/status"].shape == (len(reader),)  # one row per event


def test_a_virtual_dataset_inside_the_file_is_not_external(valid, tmp_path):
    path = tmp_path / "self.h5"
    shutil.copyfile(valid["table"], path)
    with h5py.File(path, "a") as f:
        energy = f["events/energy_kev"]
        layout = h5py.VirtualLayout(shape=energy.shape, dtype=energy.dtype)
        layout[:] = h5py.VirtualSource(".", "events/energy_kev", shape=energy.shape)
        f["events"].create_virtual_dataset("energy_copy", layout)
        expected = energy[()]
    table = damage.read_table(path)
    np.testing.assert_array_equal(table["energy_copy"], expected)


# ------------------------------------------------------------------------------------------------ strict header
@pytest.mark.parametrize("kind", list(damage.MAKERS))
@pytest.mark.parametrize("value", [np.int32(1), np.uint8(1), np.int64(2), 1.0, True, np.array([1]), "1"],
                         ids=["int32", "uint8", "int64-2", "float", "bool", "array", "text"])
def test_format_version_must_be_a_known_integer(valid, tmp_path, kind, value):
    readable = (1, 2) if kind == "table" else (1,)  # the versions each format page lists
    accepted = isinstance(value, np.integer) and int(value) in readable
    path = tmp_path / "v.h5"
    shutil.copyfile(valid[kind], path)
    with h5py.File(path, "a") as f:
        f.attrs["format_version"] = value
    err = outcome(kind, path)
    if accepted:
        assert err == "accepted"
    else:
        assert isinstance(err, FileFormatError) and err.dataset == "/" and "format_version" in str(err), err


def test_numbers_stored_as_text_in_run_information_are_refused(valid, tmp_path):
    from trackfit.io.energy_label import counts_per_kev_from_run

    with pytest.raises(ValueError, match="expected a positive number"):
        counts_per_kev_from_run({"nominal_counts_per_kev": "100"})
    assert counts_per_kev_from_run({"nominal_counts_per_kev": np.float32(100.0)}) == 100.0


# ------------------------------------------------------------------------------------------------ info
def test_info_json_with_numeric_array_attributes_and_many_empty_events(tmp_path, capsys):
    from trackfit import EventBatch, RawEventWriter

    path = tmp_path / "empty_events.h5"
    grid = damage.GRID
    with RawEventWriter(path, grid, run_info={"hv_v": np.array([400.0, 410.0]), "channels": [1, 2, 3]}) as writer:
        n = 5000
        writer.append(EventBatch(roi=np.zeros((n, 4), np.int32), start=np.zeros(n + 1, np.int64),
                                 signal=np.zeros(0, np.int16), time_s=np.arange(n, dtype=float),
                                 trigger_id=np.arange(n), grid=grid))
    assert main(["info", "--json", str(path)]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["run_info"]["hv_v"] == [400.0, 410.0] and summary["n_empty"] == n
    assert main(["info", str(path)]) == 0
    assert f"{n} of them empty" in capsys.readouterr().out


def test_errors_cross_process_boundaries_intact(tmp_path):
    err = RawFormatError(tmp_path / "x.h5", "expected one thing (got another)", dataset="/events/roi", event=3)
    back = pickle.loads(pickle.dumps(err))
    assert type(back) is RawFormatError and str(back) == str(err) and (back.path, back.dataset, back.event) == \
        (str(tmp_path / "x.h5"), "/events/roi", 3)
    response = pickle.loads(pickle.dumps(ResponseFormatError("r.h5", "energies must increase", dataset="/e",
                                                             index=2)))
    assert response.index == 2 and "energy index 2: energies must increase" in str(response)


def test_a_file_whose_structure_loops_the_hdf5_library_is_refused_by_the_time_limit(valid, tmp_path):
    from trackfit.io.probe import probe_structure

    # the damaged heap, but without the check that catches it beforehand: the child's time limit must end it
    bad = _damage_heap_object(valid["raw"], tmp_path / "loops.h5")
    with pytest.raises(FileFormatError, match=r"did not finish reading the file's structure within 3 s"):
        probe_structure(bad, error=FileFormatError, timeout_s=3)
    probe_structure(valid["raw"], error=FileFormatError, timeout_s=60)  # a sound file passes


@settings(max_examples=60, deadline=None, derandomize=True, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(value=st.one_of(st.integers(-2**63, 2**63 - 1), st.floats(), st.booleans(), st.text(max_size=5),
                       st.lists(st.integers(-5, 5), min_size=1, max_size=3)))
def test_geometry_attributes_are_accepted_only_as_numbers_of_the_right_kind(valid, tmp_path, value):
    """Whatever is stored as n_columns: a reader accepts exactly an integer from 1 to the bound, stored as one (the
    expectation uses Python's own number types, not the reader's checks)."""
    from trackfit.io.structure import MAX_PIXELS_PER_SIDE

    path = tmp_path / "g.h5"
    shutil.copyfile(valid["raw"], path)
    stored = np.array(value) if isinstance(value, list) else value
    with h5py.File(path, "a") as f:
        f["geometry"].attrs["n_columns"] = stored
    valid_count = type(value) is int and 1 <= value <= MAX_PIXELS_PER_SIDE
    try:
        with open_raw(path) as reader:
            reader.read_all()
        refused_for = None
    except RawFormatError as err:
        refused_for = err.dataset
    if valid_count:  # a narrower chip than the events' ROIs is refused for the events, never for the attribute
        assert refused_for is None or refused_for.startswith("/events/"), (value, refused_for)
        assert value < damage.GRID.n_columns or refused_for is None, value
    else:
        assert refused_for == "/geometry", (value, refused_for)


def test_info_refuses_a_file_whose_attribute_datatype_crashes_the_hdf5_library(valid, tmp_path, capsys):
    # reproduced by byte damage: the variable-length class bits of the 'origin' attribute's datatype set to 15 (no
    # such type) make the library fail with a segmentation fault reading the attribute
    data = bytearray(valid["response"].read_bytes())
    where = data.find(b"origin\x00\x00\x19")
    assert where > 0
    data[where + len(b"origin\x00\x00\x19")] = 15
    bad = tmp_path / "crashes.h5"
    bad.write_bytes(bytes(data))
    assert main(["info", str(bad)]) == 2
    assert "the HDF5 library crashed (signal" in capsys.readouterr().err
