"""Shared fixtures: a tiny generator of raw events for tests that must not depend on the simulator.

``make_batch(n, rng)`` draws ``n`` events with random rectangular ROIs on a chip and random int16 pulse heights:
enough to exercise file layouts, validation and streaming. It is test scaffolding, not physics.
"""

import os

import numpy as np
import pytest

os.environ.setdefault("MPLBACKEND", "agg")

from trackfit import EventBatch, HexGrid  # noqa: E402


def random_batch(n, rng, *, grid=None, max_side=12, with_truth=False, first_index=0):
    grid = grid or HexGrid(n_columns=64, n_rows=48)
    rng = np.random.default_rng(rng)
    n_cols = rng.integers(1, max_side + 1, n)
    n_rows = rng.integers(1, max_side + 1, n)
    c0 = rng.integers(0, grid.n_columns - n_cols + 1)
    r0 = rng.integers(0, grid.n_rows - n_rows + 1)
    roi = np.column_stack([c0, r0, n_cols, n_rows]).astype(np.int32).reshape(-1, 4)
    start = np.concatenate([[0], np.cumsum(n_cols * n_rows)]).astype(np.int64)
    signal = rng.integers(-20, 400, int(start[-1])).astype(np.int16)
    time_s = np.cumsum(rng.exponential(1e-3, n))
    trigger_id = np.arange(first_index, first_index + n, dtype=np.int64) * 3 + 1
    truth = {"energy_kev": rng.uniform(2, 8, n), "shell": rng.integers(0, 3, n).astype(np.int8)} if with_truth else None
    return EventBatch(roi=roi, start=start, signal=signal, time_s=time_s, trigger_id=trigger_id, grid=grid,
                      index=np.arange(first_index, first_index + n), truth=truth)


@pytest.fixture
def make_batch():
    return random_batch


@pytest.fixture
def small_raw_file(tmp_path):
    """A 500-event raw file with truth columns, written with the default filter; returns (path, batch)."""
    from trackfit import RawEventWriter

    batch = random_batch(500, 11, with_truth=True)
    path = tmp_path / "small.h5"
    with RawEventWriter(path, batch.grid, run_info={"source": "test generator", "pressure_atm": 1.0}) as writer:
        writer.append(batch.select(np.arange(0, 200)))
        writer.append(batch.select(np.arange(200, 500)))
    return path, batch
