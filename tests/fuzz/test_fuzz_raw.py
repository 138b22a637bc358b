"""Fuzzing the raw-file reader and the reconstruction of files: structural mutations of a small simulator file,
byte damage, files written from generated arrays with h5py, and files that are not regular files.

Each input is opened strictly and leniently (``open_raw(strict=...)``), read whole and reconstructed into a table
file in the sandboxed child process; the contract is that of :mod:`.contract`.
"""

from __future__ import annotations

import os

import h5py
import numpy as np
import pytest
from hypothesis import strategies as st

from . import probes
from .contract import SLICES, check_refusal, check_rows, explore, fail, fresh_name
from .mutations import apply_bytes, apply_structural, byte_mutations, describe, structural_mutations

TARGET_STRUCTURE = "raw file: structure"
TARGET_BYTES = "raw file: bytes"
TARGET_ARRAYS = "raw file: generated arrays"


def outside_storage(path) -> list[str]:
    """Objects of an HDF5 file whose data live outside it: external links, external storage, virtual datasets."""
    found = []
    with h5py.File(path, "r") as f:
        def walk(group, prefix):
            for name in group:
                link = group.get(name, getlink=True)
                where = f"{prefix}/{name}"
                if isinstance(link, h5py.ExternalLink):
                    found.append(f"{where} (external link)")
                    continue
                if isinstance(link, h5py.SoftLink):
                    continue
                item = group[name]
                if isinstance(item, h5py.Group):
                    walk(item, where)
                elif item.external:
                    found.append(f"{where} (external storage)")
                elif item.is_virtual:
                    found.append(f"{where} (virtual dataset)")
        walk(f, "")
    return found


def check_raw_file(sandbox, path, what: str, target: str, *, check_outside: bool = False) -> None:
    """The contract for one raw file, read strictly and leniently."""
    outside = outside_storage(path) if check_outside else []
    outcomes = {}
    for strict in (True, False):
        out = path.with_name(path.name + (".strict" if strict else ".lenient") + ".table.h5")
        outcome = sandbox.run(probes.read_raw, path, out, strict=strict)
        outcomes[strict] = outcome
        mode = "strict" if strict else "lenient"
        if outcome.kind == "accepted":
            if outside:
                fail(target, "followed outside storage", f"{what} ({mode}): accepted data stored outside the file: "
                     f"{outside}")
            else:
                check_rows(outcome.value, target, f"{what} ({mode})")
        else:
            check_refusal(outcome, target, path, f"{what} ({mode})")
    strict, lenient = outcomes[True], outcomes[False]
    if strict.kind == "accepted" and lenient.kind != "accepted":
        fail(target, "lenient refuses what strict accepts", f"{what}\nlenient: {lenient}")
    event = strict.extra.get("event") if strict.kind == "raised" else None
    if event is not None and lenient.kind == "accepted":
        columns = lenient.value["columns"]
        if "status" in columns and event < len(columns["status"]) and not columns["status"][event] & 1:
            fail(target, "bad event not flagged", f"{what}\nstrict reading refused event {event} ({strict.message}); "
                 "lenient reading did not flag it MALFORMED_INPUT")


def test_the_base_file_is_accepted_with_the_first_pass_recomputed(sandbox, base_raw, fuzz_dir):
    # the starting point of every mutation is valid, and the oracle agrees with the kernel on it
    outcome = sandbox.run(probes.read_raw, base_raw, fresh_name(fuzz_dir, "base-check"), strict=True)
    assert outcome.kind == "accepted", str(outcome)
    value = outcome.value
    assert value["n_rows"] == value["n_events"] == 10
    # simulated tracks: several pixels and some noise clusters, so the check below compares real values
    assert (value["columns"]["n_pixels"] > 5).all() and value["columns"]["n_clusters"].max() > 1
    check_rows(value, "raw file: base", "the unmodified base file")


#: structural damage met before (each once broke the contract): a group where a dataset belongs, data stored
#: outside the file, header values of the wrong form, absurd geometry, text that is not UTF-8
KNOWN_STRUCTURAL = [
    [("dataset_for_group", "/truth", 0)],
    [("group_for_dataset", "/truth/photon_energy_kev", 0)],
    [("external_link", "/events/signal", 0)],
    [("external_link", "/events/signal", 1)],
    [("external_storage", "/events/signal", 0)],
    [("virtual_dataset", "/events/signal", 0)],
    [("external_link", "/truth/photon_energy_kev", 1)],
    [("set_attribute", ("/", "format_version"), 1.0)],
    [("set_attribute", ("/", "format_version"), True)],
    [("set_attribute", ("/", "format_version"), np.array([1]))],
    [("set_attribute", ("/", "format_version"), "1")],
    [("set_attribute", ("/geometry", "pitch_mm"), 1e300)],
    [("set_attribute", ("/geometry", "n_columns"), 1e300)],
    [("set_attribute", ("/geometry", "n_columns"), "300")],
    [("set_attribute", ("/run", "nominal_counts_per_kev"), "3333.3")],
    [("set_attribute", ("/", "created_by"), np.void(b"\xff\xfe"))],
    [("set_attribute", ("/geometry", "shifted_rows"), b"\xff\xfe\xfd")],
    [("soft_link", "/events/start", "/events/start")],
]


@pytest.mark.parametrize("n_examples", SLICES)
def test_structural_mutations(n_examples, sandbox, base_raw, outside_file, fuzz_dir):
    def check(mutations):
        path = fresh_name(fuzz_dir, "raw-structure")
        done = apply_structural(base_raw, path, mutations, outside_file)
        check_raw_file(sandbox, path, describe(done), TARGET_STRUCTURE, check_outside=True)

    explore(structural_mutations(), check, n_examples, KNOWN_STRUCTURAL)


@pytest.mark.parametrize("n_examples", SLICES)
def test_byte_damage(n_examples, sandbox, base_raw, fuzz_dir):
    def check(mutations):
        path = fresh_name(fuzz_dir, "raw-bytes")
        done = apply_bytes(base_raw, path, mutations)
        check_raw_file(sandbox, path, describe(done), TARGET_BYTES)

    explore(byte_mutations(), check, n_examples)


# ---------------------------------------------------------------------------------------------- generated arrays
SANE_GEOMETRY = st.fixed_dictionaries({
    "pitch_mm": st.sampled_from([0.05, 0.055, 0.001, 2.5]),
    "n_columns": st.integers(1, 40),
    "n_rows": st.integers(1, 40),
    "shifted_rows": st.sampled_from(["odd", "even"]),
})
ABSURD = {
    "pitch_mm": [0.0, -0.05, np.nan, np.inf, 1e300, 1e-320, "0.05", np.array([0.05, 0.05]), True],
    "n_columns": [0, -3, 1e300, 2**40, 12.5, "300", np.float64(30.0), np.uint64(2**63), True, np.array([30])],
    "n_rows": [0, -1, 1e20, 2**62, 7.5, b"352", np.int8(20)],
    "shifted_rows": ["diagonal", b"odd", 1, "", "ODD"],
}
ABSURD_GEOMETRY = st.tuples(SANE_GEOMETRY, st.sampled_from(sorted(ABSURD)), st.integers(0, 100)).map(
    lambda t: {**t[0], t[1]: ABSURD[t[1]][t[2] % len(ABSURD[t[1]])]})


@st.composite
def raw_arrays(draw):
    """The arrays of a raw file: events with ROIs mostly on the chip and consistent offsets, sometimes not."""
    geometry = draw(st.one_of(SANE_GEOMETRY, ABSURD_GEOMETRY))
    n_columns = geometry["n_columns"] if isinstance(geometry["n_columns"], int) else 40
    n_rows = geometry["n_rows"] if isinstance(geometry["n_rows"], int) else 40
    n = draw(st.integers(0, 6))
    sizes = draw(st.lists(st.tuples(st.integers(0, 5), st.integers(0, 5)), min_size=n, max_size=n))
    roi = []
    for nc, nr in sizes:
        c0 = draw(st.integers(0, max(n_columns - nc, 0)) | st.integers(-3, n_columns + 3))
        r0 = draw(st.integers(0, max(n_rows - nr, 0)) | st.integers(-3, n_rows + 3))
        roi.append((c0, r0, nc, nr))
    roi = np.array(roi, dtype=np.int64).reshape(-1, 4)
    start = np.concatenate([[0], np.cumsum(roi[:, 2] * roi[:, 3])]).astype(np.int64)
    n_signal = int(start[-1])
    signal = np.array(draw(st.lists(st.one_of(st.integers(-40, 400), st.integers(-32768, 32767)),
                                    min_size=n_signal, max_size=n_signal)), dtype=np.int16)
    damage = draw(st.sampled_from(["none"] * 4 + ["roi", "start", "negative size", "short time", "huge roi"]))
    if damage == "roi" and n:
        roi[draw(st.integers(0, n - 1)), draw(st.integers(0, 3))] += draw(st.integers(-5, 5))
    elif damage == "start" and n:
        start[draw(st.integers(1, n))] += draw(st.integers(-3, 3))
    elif damage == "negative size" and n:
        roi[draw(st.integers(0, n - 1)), 2] *= -1
    elif damage == "huge roi" and n:
        roi[draw(st.integers(0, n - 1)), 2:] = 2**31 - 1
    time_s = np.array(draw(st.lists(st.floats(allow_nan=True, allow_infinity=True), min_size=n, max_size=n)),
                      dtype=np.float64)
    trigger_id = np.array(draw(st.lists(st.integers(-2**63, 2**63 - 1), min_size=n, max_size=n)), dtype=np.int64)
    if damage == "short time" and n:
        time_s = time_s[:-1]
    return {"geometry": geometry, "roi": roi.clip(-2**31, 2**31 - 1).astype(np.int32), "start": start,
            "signal": signal, "time_s": time_s, "trigger_id": trigger_id, "damage": damage}


def write_arrays(path, arrays) -> None:
    """A raw file written with h5py directly (no trackfit writer, so nothing is checked on the way)."""
    with h5py.File(path, "w") as f:
        f.attrs.update({"trackfit_format": "raw-events", "format_version": 1, "created_by": "fuzz",
                        "created_utc": "1970-01-01T00:00:00Z"})
        geometry = f.create_group("geometry")
        for key, value in arrays["geometry"].items():
            geometry.attrs[key] = value
        events = f.create_group("events")
        for name in ("roi", "start", "signal", "time_s", "trigger_id"):
            events.create_dataset(name, data=arrays[name])


@pytest.mark.parametrize("n_examples", SLICES)
def test_generated_arrays(n_examples, sandbox, fuzz_dir):
    def check(arrays):
        path = fresh_name(fuzz_dir, "raw-arrays")
        write_arrays(path, arrays)
        what = (f"geometry {arrays['geometry']}, roi {arrays['roi'].tolist()}, start {arrays['start'].tolist()}, "
                f"damage {arrays['damage']}")
        check_raw_file(sandbox, path, what, TARGET_ARRAYS)

    empty = {"geometry": {"pitch_mm": 0.05, "n_columns": 30, "n_rows": 20, "shifted_rows": "odd"},
             "roi": np.zeros((0, 4), np.int32), "start": np.zeros(1, np.int64), "signal": np.zeros(0, np.int16),
             "time_s": np.zeros(0), "trigger_id": np.zeros(0, np.int64), "damage": "none (no events)"}
    explore(raw_arrays(), check, n_examples, [empty])


# ---------------------------------------------------------------------------------------------- not regular files
@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="named pipes need a POSIX system")
@pytest.mark.parametrize("kind", ["named pipe", "directory", "empty file", "text file", "symlink to a pipe"])
def test_inputs_that_are_not_regular_hdf5_files(kind, sandbox, fuzz_dir):
    # a named pipe given as input once blocked the reader forever: it must be refused up front, like the others
    path = fresh_name(fuzz_dir, kind.replace(" ", "-"), "")
    if kind == "named pipe":
        os.mkfifo(path)
    elif kind == "directory":
        path.mkdir()
    elif kind == "empty file":
        path.write_bytes(b"")
    elif kind == "text file":
        path.write_text("trackfit_format = raw-events\n")
    else:
        fifo = fresh_name(fuzz_dir, "pipe", "")
        os.mkfifo(fifo)
        path.symlink_to(fifo)
    outcome = sandbox.run(probes.read_raw, path, fresh_name(fuzz_dir, "unused"), strict=True, timeout_s=20)
    check_refusal(outcome, "raw file: not regular", path, kind)


# ---------------------------------------------------------------------------------------------- strict header
@pytest.mark.parametrize("where, value", [
    (("/", "format_version"), 1.0),
    (("/", "format_version"), True),
    (("/", "format_version"), np.array([1])),
    (("/", "format_version"), "1"),
    (("/geometry", "n_columns"), "300"),
    (("/geometry", "n_columns"), 1e300),
    (("/geometry", "n_rows"), 352.0 + 2**60),
    (("/geometry", "pitch_mm"), 1e300),
    (("/geometry", "pitch_mm"), "0.05"),
    (("/run", "nominal_counts_per_kev"), "3333.3"),
], ids=lambda v: repr(v) if not isinstance(v, tuple) else "@".join(v))
def test_header_values_of_the_wrong_form_are_refused(where, value, sandbox, base_raw, outside_file, fuzz_dir):
    # being strict about the header costs nothing: a version given as 1.0, True or [1], numbers stored as text and
    # absurd chip sizes are refused, with the file and the group of the attribute named
    path = fresh_name(fuzz_dir, "raw-header")
    apply_structural(base_raw, path, [("set_attribute", where, value)], outside_file)
    outcome = sandbox.run(probes.read_raw, path, fresh_name(fuzz_dir, "unused"), strict=True)
    target = "raw file: header forms"
    if outcome.kind == "accepted":
        fail(target, "accepted", f"{where[0]}@{where[1]} = {value!r} was accepted")
        return
    check_refusal(outcome, target, path, f"{where[0]}@{where[1]} = {value!r}")
    assert where[0] in outcome.message or where[1] in outcome.message, outcome.message
