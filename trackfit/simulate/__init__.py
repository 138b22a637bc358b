"""Photoelectron track Monte Carlo of the gas-pixel polarimeter (needs the optional extra ``xray``).

What to use when
----------------
* :func:`run` - simulate ``n_events`` triggered events for a :class:`SimConfig`; returns a :class:`SimResult`
  whose ``batch`` is an :class:`~trackfit.EventBatch` with the per-event ``truth``; ``result.write(path)`` makes a
  raw event file (format v1) with ``/truth`` and the full config in ``/run``.
* :class:`SimConfig` - the detector and source, one frozen dataclass per stage; :func:`load_preset` /
  :func:`list_presets` for the shipped designs; TOML in and out.
* :mod:`trackfit.simulate.physics` - the samplers on their own (Sauter directions, Polya gain, ...), for studies.
* :class:`~trackfit.simulate.gas.GasMixture` - absorption efficiency, stopping power of a mixture.
* :mod:`trackfit.simulate.transport` - transverse diffusion from the drift field, temperature and gas
  (:func:`~trackfit.simulate.transport.transverse_diffusion`, thermal limit, characteristic energies).
* :mod:`trackfit.simulate.fluorescence` - where fluorescence photons go (escape, re-absorption).
* :mod:`trackfit.simulate.gain` - the multiplier's gain map (smooth part, cells) and gain drift.
* :mod:`trackfit.design` (analysis layer) - efficiency, μ(E) and resolution of a design, sweeps of one value.

The physics chain and its approximations are described in ``docs/simulator.md``.
"""

from .config import (
    ConfigError,
    DriftConfig,
    GasConfig,
    MultiplierConfig,
    ReadoutConfig,
    SimConfig,
    SourceConfig,
    WindowConfig,
    list_presets,
    load_preset,
)
from .engine import TRUTH_COLUMNS, SimResult, run
from .gas import GasMixture, window_transmission

__all__ = [
    "ConfigError",
    "DriftConfig",
    "GasConfig",
    "GasMixture",
    "MultiplierConfig",
    "ReadoutConfig",
    "SimConfig",
    "SimResult",
    "SourceConfig",
    "TRUTH_COLUMNS",
    "WindowConfig",
    "list_presets",
    "load_preset",
    "run",
    "window_transmission",
]
