"""Lab-like readout for the simulator: per-pixel pedestals and noise, hot, dead and noisy pixels, pedestal runs.

The track simulator (:func:`trackfit.simulate.run`) gives every pixel the same noise and a perfect pedestal
subtraction. Real chips do not: this module draws a chip (:class:`LabChip`) from stated distributions
(:class:`LabPixelConfig`) and reads simulated charge out through it, so every estimate of
:func:`trackfit.pixels.measure_pixel_map` can be tested against the truth:

* pedestal of pixel p: ``pedestal_mean_adc + pedestal_rms_adc * N(0, 1)`` (Gaussian);
* noise of pixel p: ``noise_mean_adc * U(1 - noise_spread_fraction, 1 + noise_spread_fraction)`` (uniform);
* ``n_noisy`` pixels (chosen at random) have their noise multiplied by ``U(*noisy_noise_factor)``;
* ``n_hot`` pixels fire in a fraction ``U(*hot_fire_probability)`` of the events, adding ``A * U(0.5, 1.5)`` with
  ``A ~ U(*hot_amplitude_adc)`` drawn once per pixel;
* ``n_dead`` pixels give no signal and no noise: always their pedestal (0 when pedestal-subtracted).

A value read out is ``round(charge + noise_p * z + hot spike + pedestal_p)`` (the pedestal only when the output is
not pedestal-subtracted), clipped to int16. The chip is a function of ``chip_seed`` alone, so a pedestal run and a
track run made with the same :class:`LabPixelConfig` see the same chip. :meth:`LabRun.defect_free_batch` reads the same
charge with the same random numbers through the chip without its defects (:meth:`LabChip.without_defects`: no hot,
dead or noisy pixel, every pixel with its own noise, the same pedestals and output convention): the same run
simulated without the defects. :meth:`LabChip.true_map` is the pixel map of a chip's truth, the perfect map to
reconstruct such a twin with.

Files carry the chip truth in ``/pixel_truth`` (:data:`PIXEL_TRUTH`) and the settings in the ``/run`` attribute
``lab_pixels_toml`` (``docs/simulator.md``).
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import math
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .. import _toml
from ..events import EventBatch
from ..hexgrid import HexGrid
from ..io.pixelmap import PixelCode, PixelMap
from ..io.raw import RawEventWriter, open_raw
from .config import ConfigError, SimConfig

__all__ = ["LabPixelConfig", "LabChip", "LabRun", "draw_lab_chip", "lab_readout", "simulate_lab_run",
           "simulate_pedestal_run", "write_pedestal_run", "read_pixel_truth", "PIXEL_TRUTH"]

#: datasets of the ``/pixel_truth`` group (chip-sized, ``[row, column]``) -> meaning
PIXEL_TRUTH = {
    "pedestal_adc": "true pedestal, ADC counts (added to the output when it is not pedestal-subtracted)",
    "noise_adc": "true Gaussian noise, ADC counts rms (0 for dead pixels)",
    "code": "true defect: trackfit.io.pixelmap.PixelCode value (0 ok, 1 hot, 2 dead, 3 noisy)",
    "hot_fire_probability": "probability that a hot pixel fires in an event (0 for the others)",
    "hot_amplitude_adc": "typical spike of a hot pixel, ADC counts (spikes are A * U(0.5, 1.5); 0 for the others)",
    "base_noise_adc": "noise the pixel would have without its defect, ADC counts rms (= noise_adc for ok pixels)",
}

#: events read out per block (a fixed size, so that a seed gives the same values whatever the run length)
_BLOCK_PIXELS = 1 << 21


def _range(name, value, *, minimum=0.0, maximum=math.inf):
    if not isinstance(value, list | tuple) or len(value) != 2:
        raise ConfigError(f"'lab_pixels.{name}' must be a list [low, high] (got {value!r})")
    low, high = (float(v) for v in value)
    if not (minimum <= low <= high <= maximum) or not all(math.isfinite(v) for v in (low, high)):
        raise ConfigError(f"'lab_pixels.{name}' must satisfy {minimum:g} <= low <= high <= {maximum:g} "
                          f"(got {value!r})")
    return (low, high)


@dataclass(frozen=True, kw_only=True)
class LabPixelConfig:
    """Distributions of the per-pixel readout of a lab-like chip (see the module docs).

    Parameters
    ----------
    chip_seed : int
        Seed of the chip's pedestals, noise and defect positions (not of the events).
    pedestal_mean_adc, pedestal_rms_adc : float
        Gaussian pedestals, ADC counts.
    noise_mean_adc : float
        Mean pixel noise, ADC counts rms (2: 50 electrons at 25 electrons per count, the simulator's defaults).
    noise_spread_fraction : float
        Noise uniform within ``+-noise_spread_fraction`` of the mean (0.3: +-30 %).
    n_hot, n_dead, n_noisy : int
        Defective pixels, at distinct random positions.
    hot_fire_probability, hot_amplitude_adc, noisy_noise_factor : [low, high]
        Uniform ranges (see the module docs).
    pedestal_subtracted : bool
        Write pedestal-subtracted values (True) or raw ADC values with the pedestals (False).

    Examples
    --------
    >>> lab = LabPixelConfig(noise_spread_fraction=0.3, n_hot=20, n_dead=20, pedestal_subtracted=False)
    >>> LabPixelConfig.from_toml(lab.to_toml()) == lab
    True
    """

    chip_seed: int = 0
    pedestal_mean_adc: float = 400.0
    pedestal_rms_adc: float = 30.0
    noise_mean_adc: float = 2.0
    noise_spread_fraction: float = 0.0
    n_hot: int = 0
    hot_fire_probability: tuple = (0.1, 0.5)
    hot_amplitude_adc: tuple = (50.0, 500.0)
    n_dead: int = 0
    n_noisy: int = 0
    noisy_noise_factor: tuple = (4.0, 8.0)
    pedestal_subtracted: bool = True

    def __post_init__(self):
        for name in ("chip_seed", "n_hot", "n_dead", "n_noisy"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < 0:
                raise ConfigError(f"'lab_pixels.{name}' must be an integer >= 0 (got {value!r})")
        for name in ("pedestal_mean_adc", "pedestal_rms_adc", "noise_mean_adc", "noise_spread_fraction"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
                raise ConfigError(f"'lab_pixels.{name}' must be a finite number (got {value!r})")
            object.__setattr__(self, name, float(value))
        if self.pedestal_rms_adc < 0 or self.noise_mean_adc < 0:
            raise ConfigError("'lab_pixels.pedestal_rms_adc' and 'lab_pixels.noise_mean_adc' must be >= 0 "
                              f"(got {self.pedestal_rms_adc}, {self.noise_mean_adc})")
        if not 0 <= self.noise_spread_fraction < 1:
            raise ConfigError("'lab_pixels.noise_spread_fraction' must be in [0, 1) "
                              f"(got {self.noise_spread_fraction})")
        object.__setattr__(self, "hot_fire_probability", _range("hot_fire_probability", self.hot_fire_probability,
                                                                 maximum=1.0))
        object.__setattr__(self, "hot_amplitude_adc", _range("hot_amplitude_adc", self.hot_amplitude_adc))
        object.__setattr__(self, "noisy_noise_factor", _range("noisy_noise_factor", self.noisy_noise_factor,
                                                               minimum=1.0))
        if not isinstance(self.pedestal_subtracted, bool):
            raise ConfigError("'lab_pixels.pedestal_subtracted' must be true or false "
                              f"(got {self.pedestal_subtracted!r})")

    # ------------------------------------------------------------------ TOML
    def to_dict(self) -> dict:
        return {f.name: list(getattr(self, f.name)) if isinstance(getattr(self, f.name), tuple)
                else getattr(self, f.name) for f in dataclasses.fields(self)}

    @classmethod
    def from_dict(cls, values: dict) -> LabPixelConfig:
        """Keys at the top level or in a ``[lab_pixels]`` table; unknown keys are refused with the valid ones."""
        if "lab_pixels" in values and isinstance(values["lab_pixels"], dict):
            values = values["lab_pixels"]
        valid = [f.name for f in dataclasses.fields(cls)]
        unknown = sorted(set(values) - set(valid))
        if unknown:
            raise ConfigError(f"unknown key(s) {', '.join('lab_pixels.' + k for k in unknown)}; valid keys of "
                              f"[lab_pixels]: {', '.join(valid)}")
        return cls(**values)

    def to_toml(self) -> str:
        return _toml.dumps({"lab_pixels": self.to_dict()},
                           header="lab-like pixel readout for the simulator (trackfit.simulate.labpixels)")

    @classmethod
    def from_toml(cls, text: str) -> LabPixelConfig:
        return cls.from_dict(_toml.parse(text, source="lab-pixel config", error=ConfigError))

    @classmethod
    def load(cls, path) -> LabPixelConfig:
        path = Path(path)
        if not path.exists():
            raise FileNotFoundError(f"lab-pixel config '{path}' does not exist")
        try:
            return cls.from_toml(path.read_text())
        except ConfigError as err:
            raise ConfigError(f"{path}: {err}") from None


@dataclass(frozen=True, eq=False)
class LabChip:
    """One drawn chip: the true per-pixel readout (arrays ``[row, column]``, see :data:`PIXEL_TRUTH`)."""

    grid: HexGrid
    config: LabPixelConfig
    pedestal_adc: np.ndarray
    noise_adc: np.ndarray
    code: np.ndarray
    hot_fire_probability: np.ndarray
    hot_amplitude_adc: np.ndarray
    base_noise_adc: np.ndarray
    pedestal_subtracted: bool = True

    def without_defects(self) -> LabChip:
        """The same chip without its defects: no hot, dead or noisy pixel (each keeps its base noise); every pixel
        keeps its own noise and pedestal, and the output its pedestal convention."""
        zeros = np.zeros(self.grid.shape)
        return LabChip(grid=self.grid, config=self.config, pedestal_adc=self.pedestal_adc,
                       noise_adc=self.base_noise_adc, code=np.zeros(self.grid.shape, np.uint8),
                       hot_fire_probability=zeros, hot_amplitude_adc=zeros, base_noise_adc=self.base_noise_adc,
                       pedestal_subtracted=self.pedestal_subtracted)

    def true_map(self) -> PixelMap:
        """The pixel map of the truth: true pedestals, noise and codes (no samples, no uncertainties, no
        occupancy). Reconstructing with it is reconstructing with perfect knowledge of the chip."""
        zeros = np.zeros(self.grid.shape)
        return PixelMap(grid=self.grid, pedestal_adc=self.pedestal_adc, pedestal_error_adc=zeros,
                        noise_adc=self.noise_adc, noise_error_adc=zeros, occupancy=np.full(self.grid.shape, np.nan),
                        n_samples=np.zeros(self.grid.shape, np.int64), n_above=np.zeros(self.grid.shape, np.int64),
                        code=self.code, statistics={"source": "simulation truth (trackfit.simulate.labpixels)"})

    def truth(self) -> dict:
        """The :data:`PIXEL_TRUTH` arrays as written to ``/pixel_truth``."""
        return {name: np.asarray(getattr(self, name), dtype=np.uint8 if name == "code" else np.float32)
                for name in PIXEL_TRUTH}


def draw_lab_chip(config: LabPixelConfig, grid: HexGrid) -> LabChip:
    """Draw the chip of ``config`` (a function of ``config.chip_seed``) on ``grid``."""
    n_defects = config.n_hot + config.n_dead + config.n_noisy
    if n_defects > grid.n_pixels:
        raise ConfigError(f"{n_defects} defective pixels requested on a chip of {grid.n_pixels} pixels")
    rng = np.random.default_rng(config.chip_seed)
    shape = grid.shape
    pedestal = config.pedestal_mean_adc + config.pedestal_rms_adc * rng.standard_normal(shape)
    spread = config.noise_spread_fraction
    noise = config.noise_mean_adc * rng.uniform(1.0 - spread, 1.0 + spread, shape)
    code = np.zeros(grid.n_pixels, np.uint8)
    fire = np.zeros(grid.n_pixels)
    amplitude = np.zeros(grid.n_pixels)
    chosen = rng.choice(grid.n_pixels, n_defects, replace=False)
    hot = chosen[:config.n_hot]
    dead = chosen[config.n_hot:config.n_hot + config.n_dead]
    noisy = chosen[config.n_hot + config.n_dead:]
    code[hot] = PixelCode.HOT
    code[dead] = PixelCode.DEAD
    code[noisy] = PixelCode.NOISY
    fire[hot] = rng.uniform(*config.hot_fire_probability, len(hot))
    amplitude[hot] = rng.uniform(*config.hot_amplitude_adc, len(hot))
    base_noise = noise.copy()
    flat_noise = noise.ravel()
    flat_noise[noisy] *= rng.uniform(*config.noisy_noise_factor, len(noisy))
    flat_noise[dead] = 0.0
    return LabChip(grid=grid, config=config, pedestal_adc=pedestal, noise_adc=flat_noise.reshape(shape),
                   code=code.reshape(shape), hot_fire_probability=fire.reshape(shape),
                   hot_amplitude_adc=amplitude.reshape(shape), base_noise_adc=base_noise,
                   pedestal_subtracted=config.pedestal_subtracted)


def _pixel_index(batch: EventBatch) -> np.ndarray:
    """Chip pixel index (``row * n_columns + column``) of every signal value of a compact batch."""
    n_pix = batch.n_pixels
    owner = np.repeat(np.arange(len(batch)), n_pix)
    k = np.arange(len(batch.signal), dtype=np.int64) - batch.start[:-1][owner]
    nc = batch.roi[owner, 2].astype(np.int64)
    rows = k // np.maximum(nc, 1)
    columns = k - rows * nc
    return (batch.roi[owner, 1] + rows) * batch.grid.n_columns + batch.roi[owner, 0] + columns


def lab_readout(charge: EventBatch, chip: LabChip, rng) -> EventBatch:
    """Read noise-free charge (ADC counts, pedestal-subtracted) out through ``chip``.

    Random numbers are drawn in blocks of whole events of fixed size, three per pixel value (noise, hot firing,
    spike size) whatever the chip, so the same ``rng`` state gives the same noise through any chip.

    Returns
    -------
    EventBatch
        Same events and ROIs, ``pedestal_subtracted = chip.pedestal_subtracted``.
    """
    charge = charge.compact()
    if charge.grid != chip.grid:
        raise ValueError(f"the events' chip {charge.grid} is not the lab chip's {chip.grid}")
    pedestal = chip.pedestal_adc.ravel()
    noise = chip.noise_adc.ravel()
    fire = chip.hot_fire_probability.ravel()
    amplitude = chip.hot_amplitude_adc.ravel()
    dead = chip.code.ravel() == PixelCode.DEAD
    out = np.empty(len(charge.signal), np.int16)
    ends = charge.start[1:]
    first = 0
    while first < len(charge):
        # whole events up to a fixed number of pixels per block (at least one event)
        last = int(np.searchsorted(ends, charge.start[first] + _BLOCK_PIXELS, side="right"))
        last = min(max(last, first + 1), len(charge))
        block = charge.select(np.arange(first, last))
        p = _pixel_index(block)
        m = len(p)
        z = rng.standard_normal(m)
        u_fire = rng.random(m)
        u_size = rng.random(m)
        value = block.signal + noise[p] * z + np.where(u_fire < fire[p], amplitude[p] * (0.5 + u_size), 0.0)
        value = np.where(dead[p], 0.0, value)
        if not chip.pedestal_subtracted:
            value = value + pedestal[p]
        a, b = charge.start[first], charge.start[last]
        out[a:b] = np.clip(np.rint(value), -32768, 32767).astype(np.int16)
        first = last
    return EventBatch(roi=charge.roi, start=charge.start, signal=out, time_s=charge.time_s,
                      trigger_id=charge.trigger_id, grid=charge.grid, index=charge.index, bad=charge.bad,
                      truth=charge.truth, validate=False, pedestal_subtracted=chip.pedestal_subtracted)


def _generator(rng):
    if rng is None or isinstance(rng, int | np.integer):
        return np.random.default_rng(None if rng is None else int(rng)), (None if rng is None else int(rng))
    if isinstance(rng, np.random.Generator):
        return rng, None
    raise TypeError(f"'rng' must be a seed (int), a numpy.random.Generator or None (got {type(rng).__name__})")


@dataclass(eq=False)
class LabRun:
    """Events read out through a lab chip, with what is needed to write them and to read them again without the defects.

    Attributes
    ----------
    batch : EventBatch
        The lab-like events.
    charge : EventBatch
        The noise-free charge the events were read from (ADC counts, pedestal-subtracted).
    chip : LabChip
    trigger_mode : {"self", "random"}
        ``"random"`` for pedestal runs.
    seed : int or None
    sim : SimResult or None
        The track simulation (None for pedestal runs).
    """

    batch: EventBatch
    charge: EventBatch
    chip: LabChip
    trigger_mode: str
    seed: int | None
    sim: object = None
    _readout_state: dict = field(default_factory=dict, repr=False)

    def defect_free_batch(self) -> EventBatch:
        """The same events read through the chip without its defects (:meth:`LabChip.without_defects`) with the
        same random numbers."""
        return self.readout(self.chip.without_defects())

    def readout(self, chip: LabChip) -> EventBatch:
        """The same charge read through another chip (e.g. ``dataclasses.replace(run.chip, pedestal_subtracted=
        True)``) with the same random numbers."""
        rng = np.random.default_rng()
        rng.bit_generator.state = self._readout_state
        return lab_readout(self.charge, chip, rng)

    def run_info(self, *, defect_free: bool = False) -> dict:
        info = dict(self.sim.run_info()) if self.sim is not None else {
            "generator": "trackfit.simulate.labpixels", "seed": -1 if self.seed is None else int(self.seed),
            "n_triggered": int(len(self.batch)), "description": "pedestal run: random triggers, no source"}
        info["lab_pixels_toml"] = self.chip.config.to_toml()
        info["lab_pixels_defect_free"] = bool(defect_free)
        return info

    def write(self, path, *, overwrite: bool = False, compression: str = "none", defect_free: bool = False,
              created_utc: str | None = None) -> Path:
        """Write a raw event file: the events (or, with ``defect_free=True``, the same events without the defects),
        ``/truth`` of a track run, the chip truth in ``/pixel_truth`` and the lab settings in ``/run``."""
        batch = self.defect_free_batch() if defect_free else self.batch
        chip = self.chip.without_defects() if defect_free else self.chip
        if created_utc is None and self.seed is not None:
            epoch = int(os.environ.get("SOURCE_DATE_EPOCH", "0"))
            created_utc = _dt.datetime.fromtimestamp(epoch, _dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
        with RawEventWriter(path, batch.grid, compression=compression, run_info=self.run_info(defect_free=defect_free),
                            overwrite=overwrite, created_utc=created_utc, trigger_mode=self.trigger_mode,
                            pedestal_subtracted=batch.pedestal_subtracted) as writer:
            writer.append(batch)
            for name, values in chip.truth().items():
                writer.add_array(f"pixel_truth/{name}", values, meaning=PIXEL_TRUTH[name])
            if self.sim is not None and getattr(self.sim, "pixel_gain", None) is not None:
                writer.add_array("simulation/pixel_gain", self.sim.pixel_gain.astype(np.float32))
        return Path(path)

    def __repr__(self):
        c = self.chip.config
        kind = "pedestal run" if self.trigger_mode == "random" else "track run"
        return (f"LabRun({kind}, {len(self.batch)} events, chip {self.chip.grid.n_columns} x {self.chip.grid.n_rows}, "
                f"{c.n_hot} hot / {c.n_dead} dead / {c.n_noisy} noisy, "
                f"{'pedestal-subtracted' if self.chip.pedestal_subtracted else 'raw ADC'}, seed={self.seed})")


def simulate_lab_run(config: SimConfig, lab: LabPixelConfig | LabChip, n_events: int, rng=None, *,
                     progress=None, design: str = "") -> LabRun:
    """Simulate ``n_events`` triggered track events and read them out through a lab chip.

    The tracks come from :func:`trackfit.simulate.run` with the readout noise and zero suppression switched off
    (the chip adds the noise); triggers and ROIs therefore depend on the charge alone, and the defect-free twin
    (:meth:`LabRun.defect_free_batch`) has exactly the same events.
    """
    from .engine import run

    chip = lab if isinstance(lab, LabChip) else draw_lab_chip(lab, config.grid)
    if chip.grid != config.grid:
        raise ValueError(f"the lab chip {chip.grid} is not the simulated chip {config.grid}")
    generator, seed = _generator(rng)
    quiet = dataclasses.replace(config, readout=dataclasses.replace(config.readout, noise_electrons=0.0,
                                                                    zero_suppression_electrons=0.0))
    sim = run(quiet, n_events, rng=generator, progress=progress, design=design)
    sim.seed = seed
    state = generator.bit_generator.state
    batch = lab_readout(sim.batch, chip, generator)
    return LabRun(batch=batch, charge=sim.batch, chip=chip, trigger_mode="self", seed=seed, sim=sim,
                  _readout_state=state)


def _pedestal_frames(chip: LabChip, first: int, n_events: int, rate_hz: float) -> EventBatch:
    """Noise-free charge of ``n_events`` random-trigger frames (every pixel of the chip, zero charge)."""
    grid = chip.grid
    roi = np.tile(np.array([0, 0, grid.n_columns, grid.n_rows], np.int32), (n_events, 1))
    start = np.arange(n_events + 1, dtype=np.int64) * grid.n_pixels
    index = np.arange(first, first + n_events, dtype=np.int64)
    return EventBatch(roi=roi, start=start, signal=np.zeros(n_events * grid.n_pixels, np.int16),
                      time_s=index / float(rate_hz), trigger_id=index, index=index, grid=grid, validate=False)


def _frames_per_block(grid: HexGrid) -> int:
    """Frames read out per block: whole frames up to the readout block size (at least one)."""
    return max(1, _BLOCK_PIXELS // grid.n_pixels)


def _check_count(n_events):
    if isinstance(n_events, bool) or int(n_events) != n_events or n_events < 0:
        raise ValueError(f"'n_events' must be an integer >= 0 (got {n_events!r})")
    return int(n_events)


def simulate_pedestal_run(lab: LabPixelConfig | LabChip, n_events: int, rng=None, *, grid: HexGrid | None = None,
                          rate_hz: float = 100.0) -> LabRun:
    """A pedestal run in memory: ``n_events`` random triggers without a source, each reading the whole chip.

    Parameters
    ----------
    lab : LabPixelConfig or LabChip
    n_events : int
    rng : seed or numpy.random.Generator
    grid : HexGrid, optional
        The chip (needed with a :class:`LabPixelConfig`; default ``HexGrid()``).
    rate_hz : float
        Trigger rate (event times are ``i / rate_hz``).

    See Also
    --------
    write_pedestal_run : the same values streamed to a file (long runs of large chips).
    """
    n_events = _check_count(n_events)
    chip = lab if isinstance(lab, LabChip) else draw_lab_chip(lab, grid or HexGrid())
    generator, seed = _generator(rng)
    state = generator.bit_generator.state
    step = _frames_per_block(chip.grid)
    blocks = [lab_readout(_pedestal_frames(chip, a, min(step, n_events - a), rate_hz), chip, generator)
              for a in range(0, n_events, step)]
    batch = (EventBatch.concatenate(blocks) if blocks
             else dataclasses.replace(EventBatch.empty(chip.grid), pedestal_subtracted=chip.pedestal_subtracted))
    charge = _pedestal_frames(chip, 0, n_events, rate_hz)
    return LabRun(batch=batch, charge=charge, chip=chip, trigger_mode="random", seed=seed, _readout_state=state)


def write_pedestal_run(path, lab: LabPixelConfig | LabChip, n_events: int, rng=None, *, grid: HexGrid | None = None,
                       rate_hz: float = 100.0, overwrite: bool = False, compression: str = "none") -> Path:
    """Stream a pedestal run to a raw file, block by block (memory bounded by the block, not the run).

    Writes the same values as ``simulate_pedestal_run(...).write(path)`` for the same arguments.
    """
    n_events = _check_count(n_events)
    chip = lab if isinstance(lab, LabChip) else draw_lab_chip(lab, grid or HexGrid())
    generator, seed = _generator(rng)
    created_utc = None
    if seed is not None:
        epoch = int(os.environ.get("SOURCE_DATE_EPOCH", "0"))
        created_utc = _dt.datetime.fromtimestamp(epoch, _dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    info = {"generator": "trackfit.simulate.labpixels", "seed": -1 if seed is None else int(seed),
            "n_triggered": n_events, "description": "pedestal run: random triggers, no source",
            "lab_pixels_toml": chip.config.to_toml(), "lab_pixels_defect_free": False}
    step = _frames_per_block(chip.grid)
    with RawEventWriter(path, chip.grid, compression=compression, run_info=info, overwrite=overwrite,
                        created_utc=created_utc, trigger_mode="random",
                        pedestal_subtracted=chip.pedestal_subtracted) as writer:
        for a in range(0, n_events, step):
            writer.append(lab_readout(_pedestal_frames(chip, a, min(step, n_events - a), rate_hz), chip, generator))
        for name, values in chip.truth().items():
            writer.add_array(f"pixel_truth/{name}", values, meaning=PIXEL_TRUTH[name])
    return Path(path)


def read_pixel_truth(path) -> dict:
    """The ``/pixel_truth`` arrays of a lab-like simulated raw file (``[row, column]``)."""
    import h5py

    with open_raw(path) as reader:
        shape = reader.grid.shape
    with h5py.File(path, "r") as f:
        if "pixel_truth" not in f:
            raise KeyError(f"'{path}' has no /pixel_truth group (not a lab-like simulated file)")
        truth = {name: f["pixel_truth"][name][()] for name in PIXEL_TRUTH if name in f["pixel_truth"]}
    for name, values in truth.items():
        if values.shape != shape:
            raise ValueError(f"'{path}', dataset '/pixel_truth/{name}': expected the chip's shape {shape}, "
                             f"found {values.shape}")
    return truth
