"""Fuzzing the event-table, calibration-file and pixel-map readers: structural mutations and byte damage of valid
files.

Accepted: a table whose columns all have the table's length (and a summary that prints), a calibration whose
parts load and print, a pixel map of the chip's shape that prints; refused: the reader's own error naming the file;
never anything else, never a hang.
"""

from __future__ import annotations

import pytest
from hypothesis import strategies as st

from . import probes
from .contract import SLICES, check_refusal, explore, fail, fresh_name, record
from .mutations import RESHAPES, apply_bytes, apply_structural, byte_mutations, describe, structural_mutations
from .test_fuzz_raw import outside_storage


def check_table(sandbox, path, what, target, *, check_outside=False):
    outside = outside_storage(path) if check_outside else []
    outcome = sandbox.run(probes.read_table_file, path)
    if outcome.kind != "accepted":
        check_refusal(outcome, target, path, what)
    elif outside:
        fail(target, "followed outside storage", f"{what}: accepted data stored outside the file: {outside}")
    elif set(outcome.value["lengths"].values()) - {outcome.value["n_rows"]}:
        fail(target, "wrong rows", f"{what}: columns of lengths {outcome.value['lengths']} in a table of "
             f"{outcome.value['n_rows']} rows")
    else:
        record(target, "accepted")


def check_calibration(sandbox, path, what, target, *, check_outside=False, probe=probes.read_calibration_file):
    outside = outside_storage(path) if check_outside else []
    outcome = sandbox.run(probe, path)
    if outcome.kind != "accepted":
        check_refusal(outcome, target, path, what)
    elif outside:
        fail(target, "followed outside storage", f"{what}: accepted data stored outside the file: {outside}")
    else:
        record(target, "accepted")


def test_the_base_files_are_accepted(sandbox, base_table, base_calibration):
    table = sandbox.run(probes.read_table_file, base_table)
    assert table.kind == "accepted" and table.value["n_rows"] == 10, str(table)
    calibration = sandbox.run(probes.read_calibration_file, base_calibration)
    assert calibration.kind == "accepted" and len(calibration.value["parts"]) == 5, str(calibration)


@pytest.mark.parametrize("n_examples", SLICES)
def test_table_structural_mutations(n_examples, sandbox, base_table, outside_file, fuzz_dir):
    def check(mutations):
        path = fresh_name(fuzz_dir, "table-structure")
        done = apply_structural(base_table, path, mutations, outside_file)
        check_table(sandbox, path, describe(done), "table file: structure", check_outside=True)

    explore(structural_mutations(), check, n_examples)


@pytest.mark.parametrize("n_examples", SLICES)
def test_table_byte_damage(n_examples, sandbox, base_table, fuzz_dir):
    def check(mutations):
        path = fresh_name(fuzz_dir, "table-bytes")
        done = apply_bytes(base_table, path, mutations)
        check_table(sandbox, path, describe(done), "table file: bytes")

    explore(byte_mutations(), check, n_examples)


@pytest.mark.parametrize("n_examples", SLICES)
def test_calibration_structural_mutations(n_examples, sandbox, base_calibration, outside_file, fuzz_dir):
    def check(mutations):
        path = fresh_name(fuzz_dir, "calibration-structure")
        done = apply_structural(base_calibration, path, mutations, outside_file)
        check_calibration(sandbox, path, describe(done), "calibration file: structure", check_outside=True)

    # parts that loaded and then failed in use: points of a modulation-factor curve of different lengths, NaN
    # counts of a spurious-modulation map
    known = [[("reshape", "/modulation_factor/point_error", RESHAPES.index("drop_first"))],
             [("revalue", "/spurious_modulation/counts", 127)]]
    explore(structural_mutations(), check, n_examples, known)


@pytest.mark.parametrize("n_examples", SLICES)
def test_calibration_byte_damage(n_examples, sandbox, base_calibration, fuzz_dir):
    def check(mutations):
        path = fresh_name(fuzz_dir, "calibration-bytes")
        done = apply_bytes(base_calibration, path, mutations)
        check_calibration(sandbox, path, describe(done), "calibration file: bytes")

    explore(byte_mutations(), check, n_examples)


@pytest.mark.parametrize("n_examples", SLICES)
def test_pixel_map_mutations(n_examples, sandbox, base_pixel_map, outside_file, fuzz_dir):
    def check(example):
        how, mutations = example
        path = fresh_name(fuzz_dir, f"pixel-map-{how}")
        if how == "structure":
            done = apply_structural(base_pixel_map, path, mutations, outside_file)
        else:
            done = apply_bytes(base_pixel_map, path, mutations)
        check_calibration(sandbox, path, describe(done), f"pixel map: {how}", check_outside=how == "structure",
                          probe=probes.read_pixel_map_file)

    explore(st.one_of(st.tuples(st.just("structure"), structural_mutations()),
                      st.tuples(st.just("bytes"), byte_mutations())), check, n_examples)
