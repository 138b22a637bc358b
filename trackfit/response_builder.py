"""Build the :class:`~trackfit.response.DetectorResponse` of a design (simulated beams) or of a built detector.

What to use when
----------------
* :func:`build_response` - a design (a :class:`~trackfit.simulate.SimConfig`: a preset or your own TOML): at each
  energy of a grid, simulate a 100 %-polarized beam (:func:`trackfit.design.simulate_beam`), reconstruct it, apply
  the selection and measure efficiency, modulation factor, resolution and ROI size (``trackfit response``).
  Energies run in parallel in a process pool (``spawn`` start method: numba's threading layer hangs a forked
  child) or as tasks of a Dask cluster (``scheduler=``); each measured energy is cached on disk, keyed by
  everything that determines it (the beam and design, events, seed, reconstruction settings, selection and
  trackfit version), so asking again is instant and a longer grid re-uses the energies already measured.
* :func:`response_from_calibration` - a built detector: μ(E) from its calibration file (``trackfit calibrate``),
  window and gas absorption from its design, the share surviving the selection, resolution and ROI sizes from
  measured runs (raw file + event table), so that it and a design compare on the same footing.
* :class:`ResponseSettings` - the grid and statistics (TOML ``[response]`` table); :func:`default_energies_kev` is
  the default grid: the band where window × gas absorption is at least 1 %.

The default statistics are small (2 000 triggered events per energy: μ to about ±0.03) so that a response of a
bundled preset takes a minute or so on two cores; raise ``events_per_energy`` for final numbers.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from . import _toml
from .analysis.selection import Cut, cut_from_dict, with_default
from .recon import ReconConfig
from .response import DetectorResponse, chip_area_cm2, raw_bytes_per_event
from .simulate import GasMixture, SimConfig, window_transmission

__all__ = ["ResponseSettings", "MeasuredRun", "build_response", "response_from_calibration", "response_selection",
           "default_energies_kev", "useful_band_kev", "absorption_table", "default_cache_dir", "CACHE_ENV"]

#: environment variable naming the cache folder (overridden by the ``cache_dir`` argument / ``--cache-dir``)
CACHE_ENV = "TRACKFIT_CACHE_DIR"
#: version of the cached point records; bump when a measured quantity changes meaning
_POINT_RECORD_VERSION = 1


def response_selection(extra: Cut | None = None) -> Cut:
    """The selection a response measures its shares and μ on: the default selection of every analysis (events with
    an emission angle and no failure bit, :func:`trackfit.analysis.with_default`), plus the cuts of ``extra``."""
    return with_default(extra)


@dataclass(frozen=True, kw_only=True)
class ResponseSettings:
    """Energy grid and statistics of a simulated response.

    Parameters
    ----------
    energies_kev : tuple of float
        Grid energies; empty (the default): ``n_energies`` log-spaced energies over :func:`useful_band_kev`.
    n_energies : int
        Points of the default grid (default 8).
    events_per_energy : int
        Triggered events simulated per energy (default 2000: μ error ≈ sqrt(2/N) ≈ 0.03).
    seed : int
        Seed; each energy's simulation uses a seed derived from it and the energy, so a point does not depend on
        the rest of the grid (and is cached on its own).
    beam_sigma_mm : float
        Gaussian spot at the chip centre (default 0.5 mm).
    min_efficiency : float
        Window × gas absorption that bounds the default band (default 0.01).
    """

    energies_kev: tuple[float, ...] = ()
    n_energies: int = 8
    events_per_energy: int = 2000
    seed: int = 0
    beam_sigma_mm: float = 0.5
    min_efficiency: float = 0.01

    def __post_init__(self):
        energies = tuple(float(e) for e in self.energies_kev)
        if any(not math.isfinite(e) or e <= 0 for e in energies) or \
                any(b <= a for a, b in zip(energies, energies[1:], strict=False)):
            raise ValueError(f"'energies_kev' must be positive and increasing (got {list(energies)})")
        object.__setattr__(self, "energies_kev", energies)
        for name, low in (("n_energies", 1), ("events_per_energy", 50), ("seed", 0)):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < low:
                raise ValueError(f"'{name}' must be an integer >= {low} (got {value!r})")
        if not (math.isfinite(self.beam_sigma_mm) and self.beam_sigma_mm >= 0):
            raise ValueError(f"'beam_sigma_mm' must be >= 0 (got {self.beam_sigma_mm!r})")
        if not 0 < self.min_efficiency < 1:
            raise ValueError(f"'min_efficiency' must be in (0, 1) (got {self.min_efficiency!r})")

    @classmethod
    def field_names(cls) -> list[str]:
        return [f.name for f in dataclasses.fields(cls)]

    def to_dict(self) -> dict:
        return {name: list(v) if isinstance(v := getattr(self, name), tuple) else v for name in self.field_names()}

    @classmethod
    def from_dict(cls, values: dict, *, source: str = "response settings") -> ResponseSettings:
        """From a dict (a ``[response]`` table or its content); unknown keys are refused with the valid ones."""
        if isinstance(values.get("response"), dict):
            if set(values) != {"response"}:
                raise ValueError(f"{source}: unknown table(s) {sorted(set(values) - {'response'})}; expected "
                                 "only [response]")
            values = values["response"]
        unknown = sorted(set(values) - set(cls.field_names()))
        if unknown:
            raise ValueError(f"{source}: unknown key(s) {unknown}; valid keys are {cls.field_names()}")
        try:
            return cls(**values)
        except (TypeError, ValueError) as err:
            raise ValueError(f"{source}: {err}") from None

    def to_toml(self) -> str:
        return _toml.dumps({"response": self.to_dict()}, header="trackfit detector-response settings")

    @classmethod
    def read_toml(cls, path) -> ResponseSettings:
        values, source = _toml.read_file(path, what="response settings file")
        return cls.from_dict(values, source=source)


# ---------------------------------------------------------------------------------------------- energy grid
def _window_gas(design: SimConfig, energy_kev) -> tuple[np.ndarray, np.ndarray]:
    w = design.window
    window = window_transmission(w.material, w.density_g_cm3, w.thickness_um, energy_kev)
    gas = GasMixture.from_config(design.gas).absorption_probability(energy_kev)
    return np.asarray(window, dtype=np.float64), np.asarray(gas, dtype=np.float64)


def _round_down(x: float) -> float:
    scale = 10.0 ** math.floor(math.log10(x))
    return math.floor(x / scale * (1 + 1e-12)) * scale


def _round_up(x: float) -> float:
    scale = 10.0 ** math.floor(math.log10(x))
    return math.ceil(x / scale * (1 - 1e-12)) * scale


def useful_band_kev(design: SimConfig, min_efficiency: float = 0.01) -> tuple[float, float]:
    """Energies where window transmission × gas absorption is at least ``min_efficiency``, widened to one
    significant digit (1.07-7.71 keV -> 1-8 keV), searched over 0.5-200 keV.

    Raises
    ------
    ValueError
        The design reaches ``min_efficiency`` nowhere.
    """
    grid = np.geomspace(0.5, 200.0, 3000)
    window, gas = _window_gas(design, grid)
    ok = grid[window * gas >= min_efficiency]
    if ok.size == 0:
        raise ValueError(f"design '{design.description}' absorbs at least {min_efficiency:g} of the photons at no "
                         f"energy between 0.5 and 200 keV (largest {float(np.max(window * gas)):.3g})")
    return _round_down(float(ok.min())), _round_up(float(ok.max()))


def default_energies_kev(design: SimConfig, settings: ResponseSettings | None = None) -> np.ndarray:
    """The grid of a response: ``settings.energies_kev`` if given, else ``n_energies`` log-spaced energies over
    :func:`useful_band_kev` (rounded to 4 significant digits)."""
    settings = settings or ResponseSettings()
    if settings.energies_kev:
        return np.array(settings.energies_kev)
    lo, hi = useful_band_kev(design, settings.min_efficiency)
    grid = np.geomspace(lo, hi, settings.n_energies) if settings.n_energies > 1 else np.array([math.sqrt(lo * hi)])
    return np.array([float(f"{e:.4g}") for e in grid])


def absorption_table(design: SimConfig, lo_kev: float, hi_kev: float, n: int = 600) -> dict[str, np.ndarray]:
    """Window transmission and gas absorption on ``n`` log-spaced energies from ``lo_kev`` to ``hi_kev``, plus
    points 0.1 eV either side of every absorption edge of the window and gas elements in that range (xraydb)."""
    from .simulate.gas import require_xraydb

    xraydb = require_xraydb()
    symbols = set(GasMixture.from_config(design.gas).elements)
    if design.window.material.lower() != "none":
        symbols |= set(xraydb.chemparse(design.window.material))
    edges = [edge.energy / 1000.0 for s in symbols for edge in xraydb.xray_edges(s).values()]
    grid = np.geomspace(lo_kev, hi_kev, n) if hi_kev > lo_kev else np.array([lo_kev])
    extra = [e + d for e in edges for d in (-1e-4, 1e-4) if lo_kev < e + d < hi_kev]
    grid = np.unique(np.concatenate([grid, extra]))
    window, gas = _window_gas(design, grid)
    return {"energy_kev": grid, "window_transmission": window, "gas_absorption": gas}


# ---------------------------------------------------------------------------------------------- one energy
def _point_seed(seed: int, energy_kev: float) -> int:
    """A seed for one energy that depends on the user's seed and the energy only (not on the grid)."""
    return int(np.random.SeedSequence([int(seed), int(round(energy_kev * 1e6))]).generate_state(1)[0])


def _measure_point(task: dict) -> dict:
    """Runs in a worker: simulate and reconstruct one beam, return the measured values (plain floats)."""
    from .analysis.estimates import with_estimate
    from .analysis.modfactor import measure_modulation_factor
    from .design import pulse_height_resolution, simulate_beam

    design = SimConfig.from_toml(task["design_toml"])
    recon = ReconConfig.from_toml(task["recon_toml"])
    energy = float(task["energy_kev"])
    try:
        result, table = simulate_beam(design, energy, n_events=task["events"], seed=task["seed"], recon_config=recon,
                                      beam_sigma_mm=task["beam_sigma_mm"])
    except RuntimeError as err:  # the simulator's "nothing triggers": a property of the design, named with the energy
        raise ValueError(f"design '{design.description}' at {energy:g} keV: {err}") from None
    if task.get("keep_raw"):
        result.write(task["keep_raw"], overwrite=True)
    table = with_estimate(table)  # the emission estimate of the reconstruction settings
    mask = np.asarray(task["selection"].mask(table), dtype=bool)
    n_triggered, n_selected = len(table), int(mask.sum())
    phi = np.asarray(table["emission_rad"], dtype=np.float64)[mask]
    if n_selected >= 2:
        # the beam is polarized along +x (angle 0): the modulation is the projection on it (docs/methods.md §4)
        point = measure_modulation_factor(phi, np.full(phi.size, energy), polarization_angle_rad=0.0)
        mu, mu_err = point.value, point.error
    else:
        mu = mu_err = float("nan")
    fwhm, fwhm_err = pulse_height_resolution(np.asarray(table["pulse_height"])[mask])
    roi = np.asarray(result.batch.roi, dtype=np.int64)
    pixels = (roi[:, 2] * roi[:, 3]).astype(np.float64)
    p50, p90, p99 = np.quantile(pixels, [0.5, 0.9, 0.99]) if pixels.size else (np.nan,) * 3
    return {
        "record_version": _POINT_RECORD_VERSION, "energy_kev": energy, "seed": int(task["seed"]),
        "n_triggered": n_triggered, "n_converted": int(result.n_converted), "n_selected": n_selected,
        "trigger_fraction": n_triggered / result.n_converted if result.n_converted else float("nan"),
        "selected_fraction": n_selected / n_triggered if n_triggered else float("nan"),
        "modulation_factor": float(mu), "modulation_factor_err": float(mu_err),
        "fwhm_frac": fwhm, "fwhm_frac_err": fwhm_err,
        "roi_pixels_mean": float(pixels.mean()) if pixels.size else float("nan"),
        "roi_pixels_p50": float(p50), "roi_pixels_p90": float(p90), "roi_pixels_p99": float(p99),
        "roi_pixels_max": float(pixels.max()) if pixels.size else float("nan"),
        "bytes_per_event": float(raw_bytes_per_event(pixels.mean())) if pixels.size else float("nan"),
    }


# ---------------------------------------------------------------------------------------------- cache
def default_cache_dir() -> Path:
    """``$TRACKFIT_CACHE_DIR``, else ``$XDG_CACHE_HOME/trackfit``, else ``.cache/trackfit`` in the home folder."""
    if os.environ.get(CACHE_ENV):
        return Path(os.environ[CACHE_ENV])
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "trackfit"


def _cache_key(task: dict) -> str:
    from . import __version__
    from .design import polarized_beam

    design = SimConfig.from_toml(task["design_toml"])
    beam = polarized_beam(design, float(task["energy_kev"]), task["beam_sigma_mm"])
    identity = {"record_version": _POINT_RECORD_VERSION, "trackfit_version": __version__, "beam": beam.to_toml(),
                "events": int(task["events"]), "seed": int(task["seed"]), "recon": task["recon_toml"],
                "selection": task["selection"].to_dict()}
    return hashlib.sha256(json.dumps(identity, sort_keys=True, default=str).encode()).hexdigest()


def _cache_path(cache_dir: Path, key: str) -> Path:
    return cache_dir / "response-points" / f"{key}.json"


def _cache_read(path: Path) -> dict | None:
    try:
        record = json.loads(path.read_text())
    except (OSError, ValueError):
        return None
    return record if record.get("record_version") == _POINT_RECORD_VERSION else None


def _cache_write(path: Path, record: dict) -> None:
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        partial = path.with_name(f"{path.name}.{os.getpid()}.partial")
        partial.write_text(json.dumps(record, indent=1))
        os.replace(partial, path)
    except OSError:
        pass  # a cache that cannot be written costs time, never a result


# ---------------------------------------------------------------------------------------------- running
def _run_local(tasks: list[dict], workers: int, on_done):
    if workers <= 1 or len(tasks) <= 1:
        for task in tasks:
            on_done(task, _measure_point(task))
        return
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor, as_completed

    context = multiprocessing.get_context("spawn")  # numba's threading layer hangs a forked child
    with ProcessPoolExecutor(min(workers, len(tasks)), mp_context=context) as pool:
        futures = {pool.submit(_measure_point, task): task for task in tasks}
        try:
            for future in as_completed(futures):
                on_done(futures[future], future.result())
        except BaseException:
            for future in futures:
                future.cancel()
            raise


def _run_dask(tasks: list[dict], scheduler: str, on_done):
    try:
        from dask.distributed import Client, LocalCluster, as_completed
    except ImportError:
        raise ImportError('a response on a Dask cluster needs the optional extra: pip install "trackfit[dask]"'
                          ) from None
    if scheduler == "local":
        client = Client(LocalCluster(threads_per_worker=1, processes=True, dashboard_address=None))
    else:
        client = Client(scheduler)
    try:
        futures = {}
        for i, task in enumerate(tasks):
            future = client.submit(_measure_point, task, pure=False, key=f"trackfit-response-{i}")
            futures[future.key] = (future, task)
        for future in as_completed([f for f, _ in futures.values()]):
            on_done(futures[future.key][1], future.result())
    finally:
        cluster = getattr(client, "cluster", None)
        client.close()
        if cluster is not None and scheduler == "local":
            cluster.close()


def build_response(design: SimConfig, *, name: str | None = None, settings: ResponseSettings | None = None,
                   recon_config: ReconConfig | None = None, selection: Cut | None = None, workers: int | None = None,
                   scheduler: str | None = None, cache_dir=None, use_cache: bool = True, keep_runs=None,
                   progress: bool = True) -> DetectorResponse:
    """Simulate the response of a design on an energy grid (see the module docstring).

    Parameters
    ----------
    design : SimConfig
        The detector (window, gas, drift, multiplier, readout); its source is replaced by the beams.
    name : str, optional
        Label of the response (default: the design's description).
    settings : ResponseSettings, optional
        Grid and statistics (default ``ResponseSettings()``).
    recon_config : ReconConfig, optional
        Reconstruction settings (default ``ReconConfig()``).
    selection : Cut, optional
        The analysis selection (default :func:`response_selection`).
    workers : int, optional
        Processes of the local pool (default: CPUs, at most one per energy to compute; 1 runs in this process).
    scheduler : str, optional
        A Dask scheduler address (``tcp://host:8786``) or ``"local"``: one task per energy on that cluster.
    cache_dir : path, optional
        Cache folder (default :func:`default_cache_dir`).
    use_cache : bool
        Read and write the cache (default True).
    keep_runs : path, optional
        Folder where the simulated raw files are written (``<name>_<E>kev.h5``); every energy is then simulated,
        cached or not.
    progress : bool
        Show a progress bar (one step per energy).

    Returns
    -------
    DetectorResponse
    """
    from tqdm import tqdm

    from . import __version__

    if not isinstance(design, SimConfig):
        raise TypeError(f"'design' must be a SimConfig (got {type(design).__name__})")
    settings = settings or ResponseSettings()
    recon_config = recon_config or ReconConfig()
    selection = selection if selection is not None else response_selection()
    name = name or design.description or "design"
    energies = default_energies_kev(design, settings)
    design_toml, recon_toml = design.to_toml(), recon_config.to_toml()
    cache = Path(cache_dir) if cache_dir is not None else default_cache_dir()
    runs_dir = Path(keep_runs) if keep_runs is not None else None
    if runs_dir is not None:
        runs_dir.mkdir(parents=True, exist_ok=True)
    tasks, records, keys = [], {}, []
    for energy in energies:
        task = {"design_toml": design_toml, "recon_toml": recon_toml, "energy_kev": float(energy),
                "events": settings.events_per_energy, "seed": _point_seed(settings.seed, energy),
                "beam_sigma_mm": settings.beam_sigma_mm, "selection": selection}
        if runs_dir is not None:
            safe = "".join(c if c.isalnum() or c in "-_." else "_" for c in name)
            task["keep_raw"] = str(runs_dir / f"{safe}_{energy:.4g}kev.h5")
        task["key"] = _cache_key(task)
        keys.append(task["key"])
        cached = _cache_read(_cache_path(cache, task["key"])) if use_cache and runs_dir is None else None
        if cached is not None:
            records[task["key"]] = cached
        else:
            tasks.append(task)
    bar = tqdm(total=len(energies), initial=len(records), unit="energy", desc=f"response {name}",
               disable=not progress)

    def done(task, record):
        records[task["key"]] = record
        if use_cache:
            _cache_write(_cache_path(cache, task["key"]), record)
        bar.update(1)

    with bar:
        if tasks and scheduler:
            _run_dask(tasks, scheduler, done)
        elif tasks:
            _run_local(tasks, workers if workers is not None else (os.cpu_count() or 1), done)
    ordered = [records[key] for key in keys]
    window, gas = _window_gas(design, energies)
    column = {k: np.array([r[k] for r in ordered], dtype=np.float64) for k in (
        "trigger_fraction", "selected_fraction", "modulation_factor", "modulation_factor_err", "fwhm_frac",
        "fwhm_frac_err", "roi_pixels_mean", "roi_pixels_p50", "roi_pixels_p90", "roi_pixels_p99", "roi_pixels_max",
        "bytes_per_event", "n_triggered", "n_selected")}
    per_energy = {"energy_kev": np.asarray(energies, dtype=np.float64), "window_transmission": window,
                  "gas_absorption": gas, "detection_efficiency": window * gas * column["trigger_fraction"]
                  * column["selected_fraction"], **column}
    notes = []
    few = [f"{e:g}" for e, n in zip(energies, column["n_selected"], strict=True) if n < 100]
    if few:
        notes.append(f"fewer than 100 selected events at {', '.join(few)} keV: μ there is poorly measured")
    return DetectorResponse(
        name=name, description=design.description, origin="simulation", design=design, recon_config=recon_config,
        selection=selection.to_dict(), settings={**settings.to_dict(), "energies_kev": [float(e) for e in energies],
                                                 "trackfit_version": __version__},
        per_energy=per_energy, absorption=absorption_table(design, float(energies[0]), float(energies[-1])),
        chip_area_cm2=chip_area_cm2(design), notes=tuple(notes))


# ---------------------------------------------------------------------------------------------- measured detector
@dataclass(frozen=True)
class MeasuredRun:
    """A run taken with the built detector: its raw file (ROI sizes) and its event table (energies, selection).

    Attributes
    ----------
    raw_path, table_path : path
        The raw event file and the event table ``trackfit reconstruct`` made from it.
    """

    raw_path: str | Path
    table_path: str | Path


def _run_values(run: MeasuredRun, calibration, selection: Cut) -> dict:
    from .design import pulse_height_resolution
    from .io.raw import open_raw
    from .io.table import read_table

    for path, what in ((run.raw_path, "raw event file"), (run.table_path, "event table")):
        if not Path(path).exists():
            raise FileNotFoundError(f"{what} '{path}' does not exist")
    columns = calibration.apply(read_table(run.table_path))
    mask = np.asarray(selection.mask(columns), dtype=bool)
    if not mask.any():
        raise ValueError(f"event table '{run.table_path}': no event survives the selection "
                         f"({selection.describe()})")
    energy = float(np.median(np.asarray(columns["energy_kev"], dtype=np.float64)[mask]))
    ph = np.asarray(columns["pulse_height"], dtype=np.float64)
    if "gain_relative" in columns:
        ph = ph / np.asarray(columns["gain_relative"], dtype=np.float64)
    fwhm, fwhm_err = pulse_height_resolution(ph[mask])
    pixels = []
    with open_raw(run.raw_path) as reader:
        if len(reader) != len(mask):
            raise ValueError(f"raw event file '{run.raw_path}' has {len(reader)} events but event table "
                             f"'{run.table_path}' has {len(mask)} rows: give a table made from that raw file")
        for batch in reader.iter_batches(with_truth=False):
            roi = np.asarray(batch.roi, dtype=np.int64)
            pixels.append(roi[:, 2] * roi[:, 3])
    pixels = np.concatenate(pixels).astype(np.float64)
    p50, p90, p99 = np.quantile(pixels, [0.5, 0.9, 0.99])
    return {"raw": str(run.raw_path), "table": str(run.table_path), "energy_kev": energy,
            "n_triggered": int(mask.size), "n_selected": int(mask.sum()), "selected_fraction": float(mask.mean()),
            "fwhm_frac": fwhm, "fwhm_frac_err": fwhm_err, "roi_pixels_mean": float(pixels.mean()),
            "roi_pixels_p50": float(p50), "roi_pixels_p90": float(p90), "roi_pixels_p99": float(p99),
            "roi_pixels_max": float(pixels.max()), "bytes_per_event": float(raw_bytes_per_event(pixels.mean()))}


def response_from_calibration(calibration, design: SimConfig, runs: Sequence[MeasuredRun], *, name: str | None = None,
                              energies_kev=None, n_energies: int = 5, selection: Cut | None = None,
                              recon_config: ReconConfig | None = None) -> DetectorResponse:
    """The response of a built detector from its calibration file and measured runs.

    * μ(E) and its error: the calibration's modulation-factor curve (``trackfit calibrate --polarized``), which is
      clamped outside its measured range (as when it calibrates data);
    * window transmission and gas absorption: the design (the detector as built: window, gas, pressure, gap);
    * share surviving the selection, energy resolution, ROI sizes and bytes per event: each run at its median
      selected energy, interpolated in ln E between runs and held beyond them;
    * trigger losses cannot be seen in measured data: ``trigger_fraction`` is 1.

    Parameters
    ----------
    calibration : Calibration or path
        With a ``modulation_factor`` part.
    design : SimConfig
        The detector as built (its source is not used).
    runs : sequence of MeasuredRun
        At least one run (raw file + its event table).
    name : str, optional
    energies_kev : array_like, optional
        Grid (default: ``n_energies`` log-spaced energies over the curve's measured range).
    n_energies : int
    selection : Cut, optional
        Default: the selection the calibration's modulation factor was measured with (recorded in the file), else
        :func:`response_selection`; a note says when a given selection differs from the recorded one.
    recon_config : ReconConfig, optional
        Recorded in the response (default: the settings stored in the first run's table, else the defaults).

    Raises
    ------
    ValueError
        No modulation-factor part, no run, or a run whose table and raw file do not match.
    """
    from . import __version__
    from .analysis import Calibration
    from .io.table import read_table

    source = str(calibration) if isinstance(calibration, str | Path) else "in memory"
    if isinstance(calibration, str | Path):
        calibration = Calibration.load(calibration)
    curve = calibration.modulation_factor
    if curve is None:
        raise ValueError(f"calibration '{source}' has no modulation_factor part: make one with trackfit calibrate "
                         "--polarized")
    if not runs:
        raise ValueError("a response from a calibration needs at least one measured run (raw file and event table) "
                         "for the selected share and the ROI sizes")
    recorded = (calibration.provenance.get("modulation_factor") or {}).get("cuts")
    if selection is None:
        selection = with_default(cut_from_dict(recorded)) if recorded else response_selection()
    lo, hi = curve.energy_range_kev
    if energies_kev is None:
        energies = np.geomspace(lo, hi, n_energies) if hi > lo and n_energies > 1 else np.array([lo])
    else:
        energies = np.asarray(energies_kev, dtype=np.float64)
    values = sorted((_run_values(r, calibration, selection) for r in runs), key=lambda v: v["energy_kev"])
    run_energy = np.array([v["energy_kev"] for v in values])
    if np.any(np.diff(run_energy) <= 0):
        raise ValueError(f"measured runs need different energies (got {run_energy.tolist()} keV)")
    if recon_config is None:
        prov = getattr(read_table(runs[0].table_path, columns=["status"]), "provenance", {}) or {}
        recon_config = ReconConfig.from_toml(prov["config_toml"]) if "config_toml" in prov else ReconConfig()

    def at_grid(key):
        return np.interp(np.log(energies), np.log(run_energy), [v[key] for v in values])

    window, gas = _window_gas(design, energies)
    selected = at_grid("selected_fraction")
    per_energy = {"energy_kev": energies, "window_transmission": window, "gas_absorption": gas,
                  "trigger_fraction": np.ones_like(energies), "selected_fraction": selected,
                  "detection_efficiency": window * gas * selected, "modulation_factor": curve(energies),
                  "modulation_factor_err": curve.error(energies),
                  **{k: at_grid(k) for k in ("fwhm_frac", "fwhm_frac_err", "roi_pixels_mean", "roi_pixels_p50",
                                             "roi_pixels_p90", "roi_pixels_p99", "roi_pixels_max",
                                             "bytes_per_event")},
                  "n_triggered": np.full(energies.shape, np.nan), "n_selected": np.full(energies.shape, np.nan)}
    notes = ["trigger losses are not seen in measured runs: trigger_fraction = 1",
             f"selected share, resolution and ROI sizes measured at {', '.join(f'{e:.3g}' for e in run_energy)} keV, "
             "interpolated in ln E and held beyond"]
    if energies.min() < lo * (1 - 1e-9) or energies.max() > hi * (1 + 1e-9):
        notes.append(f"μ measured over {lo:.3g}-{hi:.3g} keV only: the curve is held constant beyond")
    if recorded and with_default(cut_from_dict(recorded)).to_dict() != selection.to_dict():
        notes.append(f"the calibration's modulation factor was measured with cuts {json.dumps(recorded)}; the shares "
                     f"here use {selection.describe()}")
    return DetectorResponse(
        name=name or design.description or "detector", description=design.description, origin="calibration",
        design=design, recon_config=recon_config, selection=selection.to_dict(),
        settings={"calibration": source, "modulation_factor_range_kev": [lo, hi], "runs": values,
                  "trackfit_version": __version__},
        per_energy=per_energy, absorption=absorption_table(design, float(energies[0]), float(energies[-1])),
        chip_area_cm2=chip_area_cm2(design), notes=tuple(notes))
