"""Photon stage of the simulator: which photons convert in the gas, where, on which atom and shell, what
electrons leave the atom and where its fluorescence photon goes (vectorised numpy).

Only photons that convert in the gap are generated: the spectrum is weighted by the window transmission and the
gap's absorption probability (Beer-Lambert with xraydb cross sections), the conversion depth follows the
exponential law truncated to the gap, and event times form the thinned Poisson process of converted photons.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .fluorescence import FluorescencePaths, track_fluorescence
from .gas import SHELL_NAMES, GasMixture, relaxation_data, window_transmission
from .physics import emission_directions, isotropic_directions

__all__ = ["PhotonSampler", "PhotonBatch"]

_K = SHELL_NAMES.index("K")
_L_SHELLS = (SHELL_NAMES.index("L1"), SHELL_NAMES.index("L2"), SHELL_NAMES.index("L3"))


@dataclass(frozen=True)
class PhotonBatch:
    """Converted photons and the electrons they release (arrays of one length n).

    ``height_mm`` is the height of the conversion point above the multiplier (the drift length); directions are
    unit vectors in the detector frame (photon along -z). ``fluorescence_kev`` is the energy of the fluorescence
    photon emitted (0 when none) and ``fluorescence`` where it went (escape or a second deposit).
    """

    energy_kev: np.ndarray
    x_mm: np.ndarray
    y_mm: np.ndarray
    height_mm: np.ndarray
    atomic_number: np.ndarray
    shell: np.ndarray
    photoelectron_kev: np.ndarray
    azimuth_rad: np.ndarray
    polar_rad: np.ndarray
    photoelectron_dir: np.ndarray
    auger_kev: np.ndarray
    auger_dir: np.ndarray
    fluorescence_kev: np.ndarray
    fluorescence: FluorescencePaths
    local_kev: np.ndarray
    time_s: np.ndarray

    def __len__(self):
        return len(self.energy_kev)


class PhotonSampler:
    """Draws converted photons for a :class:`~trackfit.simulate.SimConfig`.

    Parameters
    ----------
    config : SimConfig
    mixture : GasMixture, optional
        Built from ``config.gas`` when not given.
    """

    def __init__(self, config, mixture: GasMixture | None = None):
        self.config = config
        self.source = config.source
        self.mixture = mixture or GasMixture.from_config(config.gas)
        source, window = config.source, config.window
        if source.spectrum == "lines":
            energies = np.asarray(source.line_energies_kev)
            emitted = np.asarray(source.line_weights)
        else:
            lo, hi = source.energy_range_kev
            energies = np.linspace(lo, hi, 4001)
            if source.spectrum == "flat":
                emitted = np.ones_like(energies)
            elif source.spectrum == "powerlaw":
                emitted = energies ** -source.photon_index
            else:
                emitted = np.interp(energies, source.table_energies_kev, source.table_weights)
        efficiency = window_transmission(window.material, window.density_g_cm3, window.thickness_um, energies) \
            * self.mixture.absorption_probability(energies)
        detected = emitted * efficiency
        if source.spectrum == "lines":
            self._line_energies = energies
            self._line_probabilities = detected / detected.sum()
            self.efficiency = float(detected.sum() / emitted.sum())
        else:
            self._line_energies = None
            cdf = np.concatenate([[0.0], np.cumsum(0.5 * (detected[1:] + detected[:-1]) * np.diff(energies))])
            norm = np.concatenate([[0.0], np.cumsum(0.5 * (emitted[1:] + emitted[:-1]) * np.diff(energies))])
            self.efficiency = float(cdf[-1] / norm[-1])
            self._grid = energies
            self._cdf = cdf / cdf[-1]
        if self.efficiency <= 0:
            raise ValueError("no photon of the source can convert in the gas (detection efficiency is 0)")
        #: rate of converted photons, s⁻¹
        self.converted_rate_hz = source.rate_hz * self.efficiency
        self._time_s = 0.0

    # ------------------------------------------------------------------
    def _energies(self, n, rng):
        if self._line_energies is not None:
            return self._line_energies[rng.choice(len(self._line_energies), size=n, p=self._line_probabilities)]
        # inverse of the piecewise-linear CDF (linear interpolation between grid points)
        return np.interp(rng.random(n), self._cdf, self._grid)

    def _positions(self, n, rng):
        s = self.source
        cx, cy = s.beam_centre_mm
        if s.beam == "pencil":
            return np.full(n, cx), np.full(n, cy)
        if s.beam == "gaussian":
            xy = rng.normal(size=(n, 2)) * s.beam_sigma_mm
            return cx + xy[:, 0], cy + xy[:, 1]
        uv = rng.random((n, 2)) - 0.5
        return cx + uv[:, 0] * s.field_size_mm[0], cy + uv[:, 1] * s.field_size_mm[1]

    def sample(self, n: int, rng) -> PhotonBatch:
        """The next ``n`` converted photons (event times continue from the previous call)."""
        mixture = self.mixture
        energy = self._energies(n, rng)
        x, y = self._positions(n, rng)
        # conversion depth below the window: exponential law truncated to the gap
        mu = mixture.absorption_per_cm(energy)
        gap = mixture.gap_cm
        depth_cm = -np.log1p(rng.random(n) * np.expm1(-mu * gap)) / mu
        height_mm = np.clip((gap - depth_cm) * 10.0, 0.0, gap * 10.0)
        # absorbing element, by its share of the photoabsorption
        partial = mixture.element_absorption_per_cm(energy)
        cumulative = np.cumsum(partial, axis=0) / partial.sum(axis=0)
        element = (rng.random(n) > cumulative).sum(axis=0)
        element = np.minimum(element, len(mixture.elements) - 1)
        shell = np.empty(n, dtype=np.int8)
        binding = np.empty(n)
        u_shell = rng.random(n)
        for j in range(len(mixture.elements)):
            sel = element == j
            codes, edges, probs = mixture.shell_probabilities(j, energy[sel])
            pick = (u_shell[sel, None] > np.cumsum(probs, axis=1)).sum(axis=1)
            pick = np.minimum(pick, len(codes) - 1)
            shell[sel] = codes[pick]
            binding[sel] = edges[pick]
        photoelectron = np.maximum(energy - binding, 0.0)
        # relaxation of the vacancy: Auger electron, fluorescence photon (tracked below) or local deposit
        auger = np.zeros(n)
        fluorescence = np.zeros(n)
        u_relax = rng.random(n)
        u_line = rng.random(n)
        for j, symbol in enumerate(mixture.elements):
            for code, (auger_kev, fyield, lines, line_p) in relaxation_data(symbol).items():
                sel = (element == j) & (shell == code)
                if not sel.any():
                    continue
                fluo = sel & (u_relax < fyield)
                if fluo.any():
                    pick = np.minimum((u_line[fluo, None] > np.cumsum(line_p)).sum(axis=1), len(lines) - 1)
                    fluorescence[fluo] = lines[pick]
                auger[sel & ~fluo] = auger_kev
        local = np.maximum(binding - auger - fluorescence, 0.0)
        s = self.source
        azimuth, polar, pe_dir = emission_directions(photoelectron, s.polarization_degree,
                                                     np.deg2rad(s.polarization_angle_deg), rng)
        auger_dir = isotropic_directions(n, rng)
        paths = track_fluorescence(x, y, height_mm, fluorescence, mixture, self.config.grid, rng)
        times = self._time_s + np.cumsum(rng.exponential(1.0 / self.converted_rate_hz, n))
        if n:
            self._time_s = float(times[-1])
        return PhotonBatch(
            energy_kev=energy, x_mm=x, y_mm=y, height_mm=height_mm,
            atomic_number=mixture.atomic_number[element].astype(np.int16), shell=shell,
            photoelectron_kev=photoelectron, azimuth_rad=azimuth, polar_rad=polar, photoelectron_dir=pe_dir,
            auger_kev=auger, auger_dir=auger_dir, fluorescence_kev=fluorescence, fluorescence=paths, local_kev=local,
            time_s=times,
        )
