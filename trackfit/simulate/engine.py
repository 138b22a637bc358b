"""Run the simulator: converted photons -> tracks -> pixel charges -> triggered events with their truth."""

from __future__ import annotations

import datetime as _dt
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..events import EventBatch
from ..io.energy_label import RUN_COUNTS_PER_KEV, RUN_DESIGN
from ..io.raw import RawEventWriter
from . import _kernels
from .config import SimConfig
from .fluorescence import FLUORESCENCE_FATES
from .gain import gain_drift_factor, pixel_gain_map
from .gas import SHELL_NAMES, GasMixture
from .photons import PhotonSampler
from .transport import transverse_diffusion

__all__ = ["SimResult", "run", "TRUTH_COLUMNS", "pixel_gain_map"]

#: photons generated per kernel call; fixed, so that a seed gives the same events whatever the run length
CHUNK_PHOTONS = 4096

#: truth column -> description (written per event to ``/truth``; floats as float32, counts as integers)
TRUTH_COLUMNS = {
    "photon_energy_kev": "energy of the converted photon",
    "conversion_x_mm": "conversion point, chip frame",
    "conversion_y_mm": "conversion point, chip frame",
    "conversion_z_mm": "height of the conversion point above the multiplier (drift length)",
    "absorber_atomic_number": "atomic number of the absorbing atom",
    "absorber_shell": "shell code of the vacancy: index into the comma-separated run attribute shell_names",
    "photoelectron_energy_kev": "photon energy minus binding energy",
    "emission_azimuth_rad": "photoelectron azimuth in (-pi, pi], from +x towards +y",
    "emission_polar_rad": "photoelectron angle from the photon direction (-z)",
    "auger_energy_kev": "Auger electron energy (0 when none)",
    "fluorescence_energy_kev": "energy of the fluorescence photon emitted at the conversion point (0 when none)",
    "fluorescence_fate": "where the fluorescence photon went: index into the comma-separated run attribute "
                         "fluorescence_fates (none, absorbed, window, multiplier, beyond_chip)",
    "fluorescence_x_mm": "absorption point of the fluorescence photon, or where it left the gap (NaN when none)",
    "fluorescence_y_mm": "absorption point of the fluorescence photon, or where it left the gap (NaN when none)",
    "fluorescence_z_mm": "height of that point above the multiplier (NaN when none)",
    "track_length_mm": "path length of the photoelectron",
    "ionization_electrons": "ionization electrons produced by the event",
    "gain_relative": "pixel gain at the conversion point times the gain drift factor at the event time",
}


def _gain_drift(config: SimConfig, time_s: np.ndarray) -> np.ndarray:
    return gain_drift_factor(config, time_s)


@dataclass(eq=False)
class SimResult:
    """Triggered events with their truth, and the run's bookkeeping.

    Attributes
    ----------
    batch : EventBatch
        The events; ``batch.truth`` holds the :data:`TRUTH_COLUMNS`.
    config : SimConfig
    seed : int or None
    n_converted : int
        Photons converted in the gas up to the last written event.
    n_not_triggered : int
        Of those, events that did not trigger (counted, not written).
    detection_efficiency : float
        Converted / incident photons (window and gap), averaged over the source spectrum.
    converted_rate_hz : float
    pixel_gain : ndarray or None
        The per-pixel relative gain map used (None: uniform).
    diffusion_um_per_sqrt_cm : float
        Transverse diffusion coefficient used (from the drift field and the gas, or set by hand).
    design : str
        Name of the detector design (a preset name, a config file name; empty when unknown).
    """

    batch: EventBatch
    config: SimConfig
    seed: int | None
    n_converted: int
    n_not_triggered: int
    detection_efficiency: float
    converted_rate_hz: float
    pixel_gain: np.ndarray | None = field(default=None, repr=False)
    diffusion_um_per_sqrt_cm: float = float("nan")
    design: str = ""

    @property
    def truth(self) -> dict:
        return self.batch.truth

    @property
    def trigger_efficiency(self) -> float:
        return len(self.batch) / self.n_converted if self.n_converted else float("nan")

    def run_info(self) -> dict:
        """Attributes of the ``/run`` group of the output file."""
        return {
            "generator": "trackfit.simulate",
            "config_toml": self.config.to_toml(),
            "seed": -1 if self.seed is None else int(self.seed),
            "n_converted": int(self.n_converted),
            "n_triggered": int(len(self.batch)),
            "n_not_triggered": int(self.n_not_triggered),
            "detection_efficiency": float(self.detection_efficiency),
            "converted_rate_hz": float(self.converted_rate_hz),
            "shell_names": ",".join(SHELL_NAMES),
            "fluorescence_fates": ",".join(FLUORESCENCE_FATES),
            "diffusion_um_per_sqrt_cm": float(self.diffusion_um_per_sqrt_cm),
            "description": self.config.description,
            RUN_DESIGN: self.design,
            RUN_COUNTS_PER_KEV: float(self.config.nominal_counts_per_kev),
        }

    def write(self, path, *, overwrite: bool = False, compression: str = "none", created_utc: str | None = None):
        """Write a raw event file (format v1) with ``/truth``, the run attributes and, when the gain is not
        uniform, the gain map as ``/simulation/pixel_gain``.

        ``created_utc`` defaults to the current time for unseeded runs; seeded runs are a function of
        (config, seed, trackfit version) and get a fixed time (``SOURCE_DATE_EPOCH`` if set, else the epoch),
        so the same seed gives a bit-identical file. ``compression`` defaults to ``"none"``, the raw format's
        default (fastest to reprocess); ``"gzip"`` is deterministic and small (the sample data use it), ``"lzf"``
        is not bit-reproducible (its compressor leaves part of its hash table uninitialised).
        """
        if created_utc is None and self.seed is not None:
            epoch = int(os.environ.get("SOURCE_DATE_EPOCH", "0"))
            created_utc = _dt.datetime.fromtimestamp(epoch, _dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
        with RawEventWriter(path, self.batch.grid, compression=compression, run_info=self.run_info(),
                            overwrite=overwrite, created_utc=created_utc) as writer:
            writer.append(self.batch)
            if self.pixel_gain is not None:
                writer.add_array("simulation/pixel_gain", self.pixel_gain.astype(np.float32))
        return Path(path)

    def _summary(self) -> list[tuple[str, str]]:
        c = self.config
        return [
            ("events written", f"{len(self.batch)}"),
            ("photons converted", f"{self.n_converted} ({self.n_not_triggered} did not trigger)"),
            ("detection efficiency", f"{self.detection_efficiency:.4f} (window x gap)"),
            ("gas", f"{'/'.join(c.gas.molecules)} {'/'.join(f'{f:g}' for f in c.gas.fractions)}, "
                    f"{c.gas.pressure_atm:g} atm, {c.gas.gap_cm:g} cm"),
            ("source", f"{c.source.spectrum} {c.source.energy_range_kev[0]:g}-{c.source.energy_range_kev[1]:g} keV, "
                       f"P = {c.source.polarization_degree:g} at {c.source.polarization_angle_deg:g} deg"),
            ("seed", f"{self.seed}"),
        ]

    def _repr_html_(self):
        rows = "".join(f"<tr><th style='text-align:left'>{k}</th><td>{v}</td></tr>" for k, v in self._summary())
        return f"<table><caption>SimResult</caption>{rows}</table>"

    def __repr__(self):
        c = self.config
        return (f"SimResult({len(self.batch)} events written, {self.n_converted} photons converted, "
                f"{self.n_not_triggered} not triggered, efficiency {self.detection_efficiency:.4f}, "
                f"gas {'/'.join(c.gas.molecules)} {c.gas.pressure_atm:g} atm {c.gas.gap_cm:g} cm, "
                f"seed={self.seed})")


class _Simulator:
    """Holds the tables and scratch buffers of one run; :meth:`chunk` simulates a fixed number of photons."""

    def __init__(self, config: SimConfig, rng):
        self.config = config
        self.rng = rng
        self.mixture = GasMixture.from_config(config.gas)
        self.photons = PhotonSampler(config, self.mixture)
        grid = config.grid
        self.grid = grid
        self.diffusion_um_per_sqrt_cm = transverse_diffusion(config.gas, config.drift).um_per_sqrt_cm
        self.pixel_gain = pixel_gain_map(config)
        self._pixel_gain_flat = (np.ones(grid.n_pixels) if self.pixel_gain is None
                                 else np.ascontiguousarray(self.pixel_gain.ravel(), dtype=np.float64))
        self.consts = self.mixture.stopping_constants()
        self.seg = np.empty((200_000, 7))
        self.count = np.zeros(grid.n_pixels, dtype=np.int64)
        self.charge = np.zeros(grid.n_pixels)
        self.touched = np.zeros(grid.n_pixels, dtype=np.int64)      # pixels hit by the current event
        self.signal = np.zeros(1 << 20, dtype=np.int16)

    def events(self, p, gain_factor):
        """Run the event kernel on a :class:`~trackfit.simulate.photons.PhotonBatch` (see its Returns)."""
        config, grid = self.config, self.grid
        mult, ro = config.multiplier, config.readout
        z, n_atoms, rho_z_over_a, mean_excitation = self.consts
        second_xyz = np.ascontiguousarray(np.column_stack([p.fluorescence.x_mm, p.fluorescence.y_mm,
                                                           p.fluorescence.z_mm]))
        out = _kernels.simulate_events(
            self.rng, p.x_mm, p.y_mm, p.height_mm, p.photoelectron_dir, p.photoelectron_kev, p.auger_dir,
            p.auger_kev, p.local_kev, second_xyz, p.fluorescence.deposit_kev, gain_factor, config.gas.gap_cm * 10.0,
            z, n_atoms, rho_z_over_a,
            mean_excitation, config.gas.w_value_ev / 1000.0, config.gas.fano_factor,
            self.diffusion_um_per_sqrt_cm * 1e-3 / np.sqrt(10.0), mult.transfer_spread_um * 1e-3,
            mult.gain, mult.polya_theta, self._pixel_gain_flat, grid.n_columns, grid.n_rows,
            -grid.extent_mm[0], -grid.extent_mm[2], grid.pitch_mm, grid.row_pitch_mm,
            0 if grid.shifted_rows == "odd" else 1, ro.noise_electrons, ro.electrons_per_adc,
            ro.trigger_threshold_electrons, ro.trigger_min_pixels, ro.roi_margin_pixels, ro.zero_suppression_electrons,
            self.seg, self.count, self.charge, self.touched, self.signal)
        self.signal = out[3]                      # keep the (possibly enlarged) buffer for the next call
        return out

    def chunk(self, n: int, first_trigger_id: int = 0):
        config, grid = self.config, self.grid
        p = self.photons.sample(n, self.rng)
        gain_factor = _gain_drift(config, p.time_s)
        ix, iy = grid.nearest_pixel(p.x_mm, p.y_mm)
        inside = grid.contains(ix, iy)
        map_at = np.where(inside, self._pixel_gain_flat[np.where(inside, iy * grid.n_columns + ix, 0)], 1.0)
        triggered, roi, n_signal, signal, path_mm, n_ion = self.events(p, gain_factor)
        truth = {
            "photon_energy_kev": p.energy_kev,
            "conversion_x_mm": p.x_mm,
            "conversion_y_mm": p.y_mm,
            "conversion_z_mm": p.height_mm,
            "absorber_atomic_number": p.atomic_number,
            "absorber_shell": p.shell,
            "photoelectron_energy_kev": p.photoelectron_kev,
            "emission_azimuth_rad": p.azimuth_rad,
            "emission_polar_rad": p.polar_rad,
            "auger_energy_kev": p.auger_kev,
            "fluorescence_energy_kev": p.fluorescence_kev,
            "fluorescence_fate": p.fluorescence.fate,
            "fluorescence_x_mm": p.fluorescence.x_mm,
            "fluorescence_y_mm": p.fluorescence.y_mm,
            "fluorescence_z_mm": p.fluorescence.z_mm,
            "track_length_mm": path_mm,
            "ionization_electrons": n_ion.astype(np.int32),
            "gain_relative": map_at * gain_factor,
        }
        # float truth is stored as float32: 7 significant digits, half the file space of float64
        truth = {k: v.astype(np.float32) if v.dtype == np.float64 else v for k, v in truth.items()}
        keep = np.flatnonzero(triggered)
        start = np.concatenate([[0], np.cumsum(n_signal[keep])])
        batch = EventBatch(roi=roi[keep], start=start, signal=signal[:start[-1]].copy(), time_s=p.time_s[keep],
                           trigger_id=first_trigger_id + np.arange(len(keep)),
                           index=first_trigger_id + np.arange(len(keep)), grid=grid,
                           truth={k: v[keep] for k, v in truth.items()}, validate=False)
        return batch, keep, n


def _as_generator(rng):
    if rng is None or isinstance(rng, int | np.integer):
        return np.random.default_rng(None if rng is None else int(rng)), (None if rng is None else int(rng))
    if isinstance(rng, np.random.Generator):
        return rng, None
    raise TypeError(f"'rng' must be a seed (int), a numpy.random.Generator or None (got {type(rng).__name__})")


def run(config: SimConfig, n_events: int, rng=None, *, progress=None, design: str = "") -> SimResult:
    """Simulate until ``n_events`` events have triggered.

    Parameters
    ----------
    config : SimConfig
    n_events : int
        Events to write (triggered). Photons that convert but do not trigger are counted in the result.
    rng : int, numpy.random.Generator or None
        A seed (recorded in the result and the file) or a generator.
    progress : callable, optional
        Called as ``progress(n_new_events)`` after every chunk (e.g. ``tqdm.update``).
    design : str
        Name of the design (e.g. the preset name), written with the events to the ``/run`` attributes.

    Returns
    -------
    SimResult
        ``result.batch`` (an :class:`~trackfit.EventBatch` whose ``truth`` holds the truth columns).

    Examples
    --------
    >>> from trackfit.simulate import load_preset, run
    >>> result = run(load_preset("hedme-1atm-1cm"), 100, rng=7)          # doctest: +SKIP
    """
    if not isinstance(config, SimConfig):
        raise TypeError(f"'config' must be a SimConfig (got {type(config).__name__})")
    if isinstance(n_events, bool) or int(n_events) != n_events or n_events < 0:
        raise ValueError(f"'n_events' must be an integer >= 0 (got {n_events!r})")
    n_events = int(n_events)
    generator, seed = _as_generator(rng)
    sim = _Simulator(config, generator)
    batches, n_written, n_converted = [], 0, 0
    empty_chunks = 0
    while n_written < n_events:
        batch, keep, n = sim.chunk(CHUNK_PHOTONS, first_trigger_id=n_written)
        if len(batch) == 0:
            empty_chunks += 1
            if empty_chunks >= 25:
                raise RuntimeError(f"no event triggered in {empty_chunks * CHUNK_PHOTONS} converted photons: "
                                   f"check readout.trigger_threshold_electrons "
                                   f"({config.readout.trigger_threshold_electrons}) against the gain")
        else:
            empty_chunks = 0
        need = n_events - n_written
        if len(batch) > need:
            # photons up to (and including) the last kept event count as converted
            n = int(keep[need - 1]) + 1
            batch = batch.select(np.arange(need))
        batches.append(batch)
        n_written += len(batch)
        n_converted += n
        if progress is not None:
            progress(len(batch))
    result = EventBatch.concatenate(batches) if batches else EventBatch.empty(config.grid)
    return SimResult(batch=result, config=config, seed=seed, n_converted=n_converted,
                     n_not_triggered=n_converted - len(result), detection_efficiency=sim.photons.efficiency,
                     converted_rate_hz=sim.photons.converted_rate_hz, pixel_gain=sim.pixel_gain,
                     diffusion_um_per_sqrt_cm=sim.diffusion_um_per_sqrt_cm, design=str(design))
