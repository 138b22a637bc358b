"""Fuzzing the in-memory entry points: ``EventBatch`` from generated arrays, ``reconstruct`` of generated batches,
``ReconConfig`` from generated values and from generated TOML text.

Contract: a batch either stores exactly the values it was given (no wrap, no rounding through float) or refuses
them with :class:`trackfit.EventBatchError`; a config either works for a reconstruction or is refused with an
error that names the setting; an accepted batch reconstructs to one row per event with the independently
recomputed first pass (:mod:`.oracle`).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import strategies as st

from . import probes
from .contract import SLICES, check_no_failure, check_rows, explore, fail, record

GRID = {"pitch_mm": 0.05, "n_columns": 24, "n_rows": 20, "shifted_rows": "odd"}
INT_DTYPES = ("int8", "int16", "uint16", "int32", "uint32", "int64", "uint64")
FLOAT_DTYPES = ("float16", "float32", "float64")


@st.composite
def events(draw, grid=GRID, max_events=5):
    """A valid batch as plain arrays: ROIs on the chip, consistent offsets, int16 signal with tracks and noise."""
    n = draw(st.integers(0, max_events))
    roi, signals = [], []
    for _ in range(n):
        nc, nr = draw(st.integers(0, 6)), draw(st.integers(0, 6))
        c0 = draw(st.integers(0, grid["n_columns"] - nc))
        r0 = draw(st.integers(0, grid["n_rows"] - nr))
        roi.append((c0, r0, nc, nr))
        signals += draw(st.lists(st.one_of(st.integers(-20, 40), st.integers(0, 2000), st.integers(-32768, 32767)),
                                 min_size=nc * nr, max_size=nc * nr))
    roi = np.array(roi, dtype=np.int32).reshape(-1, 4)
    return {"roi": roi, "start": np.concatenate([[0], np.cumsum(roi[:, 2] * roi[:, 3])]).astype(np.int64),
            "signal": np.array(signals, dtype=np.int16), "time_s": np.arange(n, dtype=np.float64) * 1e-3,
            "trigger_id": np.arange(n, dtype=np.int64) * 7 + 3, "index": np.arange(n, dtype=np.int64)}


def _value_for(dtype):
    """Values representable in ``dtype``, ordinary and extreme."""
    dtype = np.dtype(dtype)
    if dtype.kind in "iu":
        info = np.iinfo(dtype)
        return st.one_of(st.integers(max(info.min, -5), min(info.max, 5)), st.integers(info.min, info.max),
                         st.sampled_from([info.min, info.max]))
    width = {2: 16, 4: 32, 8: 64}[dtype.itemsize]
    return st.one_of(st.integers(-5, 5).map(float), st.floats(width=width),
                     st.sampled_from([32767.0, 32768.0, -32769.0, 2.0**31, 2.0**63, -2.0**63, 2.0**64, 0.5, -0.0]))


@st.composite
def perturbed_events(draw):
    """A valid batch with one array given in another dtype, and maybe one of its values replaced."""
    arrays = draw(events())
    name = draw(st.sampled_from(["roi", "start", "signal", "trigger_id", "index", "time_s"]))
    dtype = draw(st.sampled_from(INT_DTYPES + FLOAT_DTYPES))
    original = arrays[name]
    with np.errstate(all="ignore"):
        changed = original.astype(dtype)
    if changed.size and draw(st.booleans()):
        changed.reshape(-1)[draw(st.integers(0, changed.size - 1))] = draw(_value_for(dtype))
    arrays[name] = changed
    return arrays, name


def exact(values) -> list:
    """Python numbers of an array, exactly (floats that hold whole numbers become ints)."""
    out = []
    for v in np.asarray(values).ravel().tolist():
        if isinstance(v, float) and math.isfinite(v) and v.is_integer():
            v = int(v)
        out.append(v)
    return out


@pytest.mark.parametrize("n_examples", SLICES)
def test_event_batch_from_generated_arrays(n_examples, sandbox):
    target = "EventBatch"

    def check(example):
        arrays, name = example
        what = f"'{name}' given as {arrays[name].dtype}: {arrays[name].tolist()}"
        outcome = sandbox.run(probes.build_batch, arrays, GRID)
        if not check_no_failure(outcome, target, what):
            return
        if outcome.kind == "raised":
            if outcome.error_type == "EventBatchError" and f"'{name}'" in outcome.message or outcome.ours:
                record(target, "refused")
            else:
                fail(target, f"foreign {outcome.error_type}", what, outcome)
            return
        stored = outcome.value[name]
        given, kept = exact(arrays[name]), exact(stored)
        nan_equal = all((a == b) or (isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b))
                        for a, b in zip(given, kept, strict=True))
        if len(given) != len(kept) or not nan_equal:
            fail(target, "values changed", f"{what}\nstored as {stored.dtype}: {stored.tolist()}")
        else:
            record(target, "accepted")

    def one_event(**arrays):
        base = {"roi": np.array([[2, 3, 1, 1]], np.int32), "start": np.array([0, 1]),
                "signal": np.array([50], np.int16), "time_s": np.zeros(1), "trigger_id": np.array([7]),
                "index": np.array([0])}
        return {**base, **arrays}

    # values that once wrapped through a float cast: float16 32768 as int16 signal, 2**63 as int64 trigger_id
    known = [(one_event(signal=np.array([32768.0], np.float16)), "signal"),
             (one_event(trigger_id=np.array([2.0**63])), "trigger_id"),
             (one_event(index=np.array([-2.0**63 - 4096])), "index"),
             (one_event(roi=np.array([[2, 3, 1, 2.0**32 + 1]])), "roi")]
    explore(perturbed_events(), check, n_examples, known)


# ---------------------------------------------------------------------------------------------- settings
SETTING_VALUES = {
    "threshold_adc": [0, 0.5, 10, 10.5, 200, 32767, 32768, 1e20, -1, math.nan, math.inf, 2**63, "10", True, None],
    "min_pixels": [1, 6, 6.0, 0, -1, 2**31, 2**63, 1.5, "6", True],
    "start_search_inner_rms": [0, 1.5, -1, math.nan, 1e300, 1e-300],
    "start_search_outer_rms": [3.5, 0.1, 1e300, math.inf, 2],
    "second_pass_length_mm": [0.05, 0, -1, 1e-300, 1e300, math.inf, math.nan],
    "second_pass_centre": ["conversion_point", "weighted_centroid", "", "centre", 1],
    "counts_per_kev": [None, 1, 3333.3, 1e-300, 1e300, 0, -1, math.nan, math.inf],
    "saturation_adc": [32767, 100, 0, -1, 2**40, 1e20, 1.5, -2**63],
    "bad_pixels": [(), [(0, 0)], [(3, 4), (3, 4)], [(10**9, 1)], [(-1, 0)], [[1, 2, 3]], "x", [(2.5, 1)],
                   np.ones((20, 24), bool), np.ones((3, 3), bool)],
    "threshold_noise_rms": [0, 1, -1, math.nan],
    "emission_estimator": ["two-stage", "adaptive", "nothing"],
}


@st.composite
def settings_values(draw):
    keys = draw(st.lists(st.sampled_from(sorted(SETTING_VALUES)), max_size=4, unique=True))
    return {key: draw(st.sampled_from(SETTING_VALUES[key])) for key in keys}


def check_config_refusal(outcome, target, what, keys) -> None:
    """A refused setting: a ValueError raised by trackfit (ConfigError or ValueError) naming a setting given."""
    named = any(key in outcome.message for key in keys)
    if outcome.ours or (outcome.raised_in_trackfit and "ValueError" in outcome.bases and named):
        record(target, "refused")
    else:
        fail(target, f"foreign {outcome.error_type}", f"{what}\nrefused without naming a setting given", outcome)


@pytest.mark.parametrize("n_examples", SLICES)
def test_reconstruct_generated_batches_with_generated_settings(n_examples, sandbox):
    target = "reconstruct + ReconConfig"

    def check(example):
        arrays, config = example
        what = f"settings {config}, roi {arrays['roi'].tolist()}"
        outcome = sandbox.run(probes.reconstruct_batch, arrays, GRID, config)
        if not check_no_failure(outcome, target, what):
            return
        if outcome.kind == "raised":
            check_config_refusal(outcome, target, what, list(config))
            return
        value = outcome.value
        value["grid"] = GRID
        if not value["round_trip"]:
            fail(target, "TOML round trip", f"{what}: the settings do not survive to_toml/from_toml")
            return
        check_rows(value, target, what)

    batch = {"roi": np.array([[2, 3, 2, 1]], np.int32), "start": np.array([0, 2]),
             "signal": np.array([50, 60], np.int16), "time_s": np.zeros(1), "trigger_id": np.array([7]),
             "index": np.array([0])}
    # a threshold once reached the kernel as a Python integer too large for it
    known = [(batch, {"threshold_adc": 1e20}), (batch, {"saturation_adc": 2**40}), (batch, {"min_pixels": 2**63})]
    explore(st.tuples(events(), settings_values()), check, n_examples, known)


TOML_KEYS = sorted(SETTING_VALUES) + ["pixel_map", "r_min", "weight_scale_mm", "threshold", "[recon]"]
TOML_VALUES = ["10", "1e20", "-1", "nan", "inf", "-inf", '"10"', "true", "[1, 2]", "[[0, 0]]", "[[1e9, 0]]",
               "{a = 1}", "1979-05-27", "0x10", '"two-stage"', '"weighted_barycentre"', "9223372036854775808",
               "1_000", "[]", '""', "'''x'''", "= 1", "[[", "\u00e9"]


@pytest.mark.parametrize("n_examples", SLICES)
def test_settings_from_generated_toml(n_examples, sandbox):
    target = "ReconConfig TOML"
    line = st.tuples(st.sampled_from(TOML_KEYS), st.sampled_from(TOML_VALUES)).map(
        lambda kv: kv[0] if kv[0].startswith("[") else f"{kv[0]} = {kv[1]}")

    def check(lines):
        text = "\n".join(lines) + "\n"
        outcome = sandbox.run(probes.config_from_toml, text)
        if not check_no_failure(outcome, target, text):
            return
        if outcome.kind == "accepted":
            record(target, "accepted")
        elif "settings.toml" in outcome.message and (outcome.ours or (outcome.raised_in_trackfit
                                                                       and "ValueError" in outcome.bases)):
            record(target, "refused")
        else:
            fail(target, f"foreign {outcome.error_type}", f"{text}\nrefused without naming the source", outcome)

    explore(st.lists(line, min_size=1, max_size=4), check, n_examples, [["bad_pixels = 10"], ["threshold_adc = 1e20"]])


def test_isolated_hits_do_not_wrap_the_cluster_count(sandbox):
    # a third of the pixels of a full chip, no two of them neighbours, is 35 200 clusters of one pixel: more than
    # an int16 column holds. Pixels with (q - r) % 3 == 0 in axial coordinates are never neighbours: the six axial
    # steps change q - r by +-1 or +-2 (docs/methods.md §1; standard hexagonal-grid algebra)
    grid = {"pitch_mm": 0.05, "n_columns": 300, "n_rows": 352, "shifted_rows": "odd"}
    rows, columns = np.divmod(np.arange(300 * 352), 300)
    q = columns - (rows - (rows & 1)) // 2
    signal = np.where((q - rows) % 3 == 0, 100, 0).astype(np.int16)
    arrays = {"roi": np.array([[0, 0, 300, 352]], np.int32), "start": np.array([0, signal.size]), "signal": signal}
    outcome = sandbox.run(probes.reconstruct_batch, arrays, grid, {"emission_estimator": "two-stage"})
    assert outcome.kind == "accepted", str(outcome)
    assert int(np.count_nonzero(signal)) == 35_200
    assert int(outcome.value["columns"]["n_clusters"][0]) == 35_200
