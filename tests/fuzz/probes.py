"""What the fuzz child process does with one input (module-level functions, run through :class:`Sandbox`).

Each probe uses trackfit the way a user would and returns plain data (numpy arrays, numbers, text) for the parent
to check against the contract; exceptions are described by the sandbox.
"""

from __future__ import annotations

import numpy as np

#: the first-pass columns the oracle checks, and the columns every reconstruction row must have
FIRST_PASS_COLUMNS = ("status", "n_pixels", "n_clusters", "pulse_height", "peak_adc", "centroid_x_mm",
                      "centroid_y_mm")


def warm_up() -> bool:
    """Import everything and run the kernels once, so the first input is not timed with the numba cache load."""
    import trackfit.cli  # noqa: F401
    from trackfit import EventBatch, HexGrid, reconstruct

    image = np.zeros((5, 6), np.int16)
    image[2, 1:5] = [40, 60, 90, 200]
    reconstruct(EventBatch.from_images([image], [(10, 10)], grid=HexGrid()))
    return True


def _events(batch) -> dict:
    return {"roi": np.asarray(batch.roi), "start": np.asarray(batch.start), "signal": np.asarray(batch.signal),
            "bad": np.asarray(batch.bad), "index": np.asarray(batch.index), "trigger_id": np.asarray(batch.trigger_id),
            "time_s": np.asarray(batch.time_s)}


def _grid(grid) -> dict:
    return {"pitch_mm": grid.pitch_mm, "n_columns": grid.n_columns, "n_rows": grid.n_rows,
            "shifted_rows": grid.shifted_rows}


def read_raw(path, out_path, *, strict: bool) -> dict:
    """Open a raw file, read every event, reconstruct it to a table file and read the table back."""
    from trackfit import ReconConfig, open_raw, read_table, reconstruct_file

    with open_raw(path, strict=strict) as reader:
        n_events = len(reader)
        batch = reader.read_all()
        grid = _grid(reader.grid)
        bad_events = list(reader.bad_events)
    reconstruct_file(path, out_path, progress=False, strict=strict, threads=1)
    table = read_table(out_path)
    return {"n_events": n_events, "events": _events(batch), "grid": grid, "bad_events": bad_events,
            "threshold_adc": ReconConfig().threshold_adc, "n_rows": table.n_rows,
            "columns": {name: table[name] for name in table.columns}}


def read_table_file(path) -> dict:
    """Read an event table and summarise it (what ``trackfit info`` shows)."""
    from trackfit import read_table

    table = read_table(path)
    lengths = {name: len(table[name]) for name in table.columns}
    table.summary()
    return {"n_rows": table.n_rows, "lengths": lengths, "columns": list(table.columns)}


def read_calibration_file(path) -> dict:
    """Load a calibration file and print it."""
    from trackfit.analysis import Calibration

    calibration = Calibration.load(path)
    return {"parts": calibration.parts(), "text": repr(calibration)}


def read_pixel_map_file(path) -> dict:
    """Read a pixel map and print it."""
    from trackfit.io.pixelmap import read_pixel_map

    pixel_map = read_pixel_map(path)
    return {"shape": pixel_map.code.shape, "text": repr(pixel_map)}


def build_batch(arrays: dict, grid: dict | None) -> dict:
    """``EventBatch(**arrays)`` on the given chip: the arrays it stored (or the error)."""
    from trackfit import EventBatch, HexGrid

    batch = EventBatch(**arrays, grid=HexGrid(**grid) if grid is not None else HexGrid())
    return _events(batch)


def reconstruct_batch(arrays: dict, grid: dict, config: dict) -> dict:
    """Build a batch and a config from plain values and reconstruct it in memory."""
    from trackfit import EventBatch, HexGrid, ReconConfig, reconstruct

    config = ReconConfig(**config)
    batch = EventBatch(**arrays, grid=HexGrid(**grid))
    table = reconstruct(batch, config)
    return {"events": _events(batch), "n_rows": table.n_rows, "columns": {name: table[name] for name in table.columns},
            "threshold_adc": config.threshold_adc, "bad_pixels": config.bad_pixels,
            "round_trip": type(config).from_toml(config.to_toml()) == config}


def config_from_toml(text: str) -> dict:
    """``ReconConfig.from_toml(text)`` and its settings."""
    from trackfit import ReconConfig

    return ReconConfig.from_toml(text, source="settings.toml").to_dict()


def cli(argv) -> dict:
    """``trackfit.cli.main(argv)`` with its output captured (exit status, stdout, stderr)."""
    from trackfit.cli import main

    from .sandbox import captured

    status, out, err = captured(main, [str(a) for a in argv])
    return {"status": status, "out": out, "err": err}
