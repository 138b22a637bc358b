"""Physics samplers of the track simulator, each usable on its own (vectorised numpy, or numba behind a check).

What to use when
----------------
* :func:`emission_directions` - photoelectron directions from the Sauter law with a polarized beam.
* :func:`isotropic_directions` - Auger electrons.
* :func:`ionization_electrons`, :func:`polya_gain`, :func:`diffusion_sigma_mm` - detector response pieces.
* :func:`stopping_power_kev_cm`, :func:`transport_electrons` - electron slowing down and tracks in a gas.

Frame: the photon travels along -z (from the window down to the multiplier), x runs along the chip columns and
y along the rows; azimuths are measured from +x towards +y, polar angles from the photon direction.

References
----------
Sauter 1931; Fano, McVoy & Albers 1959, Phys. Rev. 116, 1147 (angular law with polarization).
Joy & Luo 1989, Scanning 11, 176 (stopping power); Joy 1995, Monte Carlo Modeling for Electron Microscopy and
Microanalysis (screened-Rutherford single scattering). Alkhazov 1970, NIM 89, 155 (Polya avalanche statistics).
"""

from __future__ import annotations

import math

import numpy as np

from . import _kernels

__all__ = [
    "electron_beta",
    "sample_sauter_cos_theta",
    "sample_emission_azimuth",
    "emission_directions",
    "isotropic_directions",
    "ionization_electrons",
    "polya_gain",
    "diffusion_sigma_mm",
    "thermal_diffusion_um",
    "stopping_power_kev_cm",
    "transport_electrons",
]

BOLTZMANN_EV_K = 8.617333262e-5


def _generator(rng) -> np.random.Generator:
    if isinstance(rng, np.random.Generator):
        return rng
    raise TypeError(f"'rng' must be a numpy.random.Generator (got {type(rng).__name__}); "
                    "use numpy.random.default_rng(seed)")


def electron_beta(energy_kev) -> np.ndarray:
    """Speed of an electron in units of c, from its kinetic energy in keV."""
    gamma = 1.0 + np.asarray(energy_kev, dtype=np.float64) / _kernels.ELECTRON_MASS_KEV
    return np.sqrt(1.0 - 1.0 / gamma**2)


def sample_sauter_cos_theta(beta, rng) -> np.ndarray:
    """cos θ of K-shell photoelectrons from ``dσ/dΩ ∝ sin²θ / (1 - β cos θ)⁴`` (azimuth-averaged Sauter law).

    θ is measured from the photon direction. Proposal ``∝ (1 - β μ)⁻⁴`` in μ = cos θ (inverted analytically),
    accepted with probability ``1 - μ²``.

    Parameters
    ----------
    beta : array_like
        Electron speeds / c, each in [0, 1).
    rng : numpy.random.Generator
    """
    rng = _generator(rng)
    beta = np.atleast_1d(np.asarray(beta, dtype=np.float64))
    if np.any((beta < 0) | (beta >= 1)) or not np.all(np.isfinite(beta)):
        raise ValueError(f"'beta' must be in [0, 1) (got range {beta.min()}..{beta.max()})")
    out = np.empty_like(beta)
    todo = np.arange(beta.size)
    while todo.size:
        b = beta[todo]
        u = rng.random(todo.size)
        small = b < 1e-6
        bs = np.where(small, 0.5, b)
        lo, hi = (1.0 + bs) ** -3.0, (1.0 - bs) ** -3.0
        t = lo + u * (hi - lo)
        mu = np.where(small, 2.0 * u - 1.0, (1.0 - t ** (-1.0 / 3.0)) / bs)
        mu = np.clip(mu, -1.0, 1.0)
        accept = rng.random(todo.size) < 1.0 - mu * mu
        out[todo[accept]] = mu[accept]
        todo = todo[~accept]
    return out


def sample_emission_azimuth(n: int, polarization_degree: float, polarization_angle_rad: float, rng) -> np.ndarray:
    """Azimuths from ``pdf(φ) ∝ 1 + P cos 2(φ - ψ)`` (Sauter law for a beam of degree P and angle ψ), in [0, 2π)."""
    rng = _generator(rng)
    if not 0 <= polarization_degree <= 1:
        raise ValueError(f"'polarization_degree' must be between 0 and 1 (got {polarization_degree})")
    out = np.empty(int(n))
    todo = np.arange(int(n))
    while todo.size:
        phi = 2.0 * np.pi * rng.random(todo.size)
        accept = rng.random(todo.size) * (1.0 + polarization_degree) < \
            1.0 + polarization_degree * np.cos(2.0 * (phi - polarization_angle_rad))
        out[todo[accept]] = phi[accept]
        todo = todo[~accept]
    return out


def emission_directions(energy_kev, polarization_degree: float, polarization_angle_rad: float, rng):
    """Photoelectron directions for photons at normal incidence (travelling along -z).

    Returns
    -------
    azimuth_rad : ndarray
        In (-π, π], from +x towards +y.
    polar_rad : ndarray
        Angle from the photon direction.
    directions : ndarray, shape (n, 3)
        Unit vectors ``(sin θ cos φ, sin θ sin φ, -cos θ)``.
    """
    energy_kev = np.atleast_1d(np.asarray(energy_kev, dtype=np.float64))
    cos_theta = sample_sauter_cos_theta(electron_beta(energy_kev), rng)
    phi = sample_emission_azimuth(energy_kev.size, polarization_degree, polarization_angle_rad, rng)
    sin_theta = np.sqrt(1.0 - cos_theta**2)
    directions = np.column_stack([sin_theta * np.cos(phi), sin_theta * np.sin(phi), -cos_theta])
    azimuth = np.arctan2(directions[:, 1], directions[:, 0])
    return azimuth, np.arccos(cos_theta), directions


def isotropic_directions(n: int, rng) -> np.ndarray:
    """``n`` unit vectors uniform on the sphere, shape (n, 3)."""
    rng = _generator(rng)
    cos_theta = 2.0 * rng.random(int(n)) - 1.0
    phi = 2.0 * np.pi * rng.random(int(n))
    sin_theta = np.sqrt(1.0 - cos_theta**2)
    return np.column_stack([sin_theta * np.cos(phi), sin_theta * np.sin(phi), cos_theta])


def ionization_electrons(energy_kev, w_value_ev: float, fano_factor: float, rng) -> np.ndarray:
    """Number of ionization electrons from deposited energies: mean ``E / W``, variance ``F E / W``.

    Drawn as ``Binomial(T, 1 - F)`` with ``T`` the randomised rounding of ``N̄ / (1 - F)`` (as the event kernel
    does), so the mean is exactly ``N̄``.
    """
    rng = _generator(rng)
    if w_value_ev <= 0:
        raise ValueError(f"'w_value_ev' must be > 0 (got {w_value_ev})")
    if not 0 <= fano_factor < 1:
        raise ValueError(f"'fano_factor' must be in [0, 1) (got {fano_factor})")
    trials = np.asarray(energy_kev, dtype=np.float64) * 1000.0 / w_value_ev / (1.0 - fano_factor)
    n_trials = np.floor(trials).astype(np.int64)
    n_trials += rng.random(trials.shape) < trials - n_trials      # randomised rounding: the mean stays E / W
    return rng.binomial(n_trials, 1.0 - fano_factor) if fano_factor > 0 else n_trials


def polya_gain(size, mean_gain: float, theta: float, rng) -> np.ndarray:
    """Avalanche sizes from the Polya law ``P(G) ∝ (G/Ḡ)^θ exp(-(1+θ) G/Ḡ)``: a gamma law of shape 1 + θ.

    Mean ``mean_gain``, relative variance ``1 / (1 + θ)``.
    """
    rng = _generator(rng)
    if mean_gain <= 0:
        raise ValueError(f"'mean_gain' must be > 0 (got {mean_gain})")
    if theta <= -1:
        raise ValueError(f"'theta' must be > -1 (got {theta})")
    return rng.gamma(1.0 + theta, mean_gain / (1.0 + theta), size)


def diffusion_sigma_mm(drift_mm, diffusion_um_per_sqrt_cm: float) -> np.ndarray:
    """Transverse diffusion after drifting ``drift_mm``: ``sigma = D_T sqrt(drift length)``, mm."""
    drift_mm = np.asarray(drift_mm, dtype=np.float64)
    return diffusion_um_per_sqrt_cm * 1e-3 * np.sqrt(np.maximum(drift_mm, 0.0) / 10.0)


def thermal_diffusion_um(drift_cm: float, field_v_per_cm: float, temperature_k: float) -> float:
    """Thermal limit of the transverse diffusion, ``sqrt(2 k T z / (e E))``, µm (a lower bound for any gas)."""
    return math.sqrt(2.0 * BOLTZMANN_EV_K * temperature_k * drift_cm / field_v_per_cm) * 1e4


def stopping_power_kev_cm(energy_kev, mixture) -> np.ndarray:
    """Bethe stopping power with the Joy-Luo correction in a :class:`~trackfit.simulate.gas.GasMixture`, keV/cm."""
    _, _, rho_z_over_a, mean_excitation = mixture.stopping_constants()
    energy_kev = np.atleast_1d(np.asarray(energy_kev, dtype=np.float64))
    if np.any(energy_kev <= 0):
        raise ValueError("'energy_kev' must be > 0")
    return np.array([_kernels.stopping_power_kev_cm(e, rho_z_over_a, mean_excitation) for e in energy_kev])


def transport_electrons(energy_kev, directions, mixture, rng, *, start_height_mm=None, max_segments=200_000):
    """Track single electrons from the origin through the gas (no gap boundaries unless ``start_height_mm``).

    Parameters
    ----------
    energy_kev : array_like, shape (n,)
    directions : array_like, shape (n, 3)
        Unit vectors.
    mixture : GasMixture
    rng : numpy.random.Generator
    start_height_mm : float, optional
        Start this far above the multiplier inside the gap of the mixture; default: an unbounded gas.

    Returns
    -------
    path_mm : ndarray (n,)
        Path length travelled.
    end_mm : ndarray (n, 3)
        Point where each electron stops, relative to its start.
    max_distance_mm : ndarray (n,)
        Largest distance from the start reached along the track.
    """
    rng = _generator(rng)
    energy_kev = np.atleast_1d(np.asarray(energy_kev, dtype=np.float64))
    directions = np.asarray(directions, dtype=np.float64).reshape(-1, 3)
    if len(directions) != len(energy_kev):
        raise ValueError(f"'directions' must have one row per energy ({len(energy_kev)}) (got {len(directions)})")
    z, n, rho_z_over_a, mean_excitation = mixture.stopping_constants()
    gap_mm = 2e6 if start_height_mm is None else mixture.gap_cm * 10.0
    z0 = 1e6 if start_height_mm is None else float(start_height_mm)
    seg = np.empty((max_segments, 7))
    path = np.empty(len(energy_kev))
    end = np.empty((len(energy_kev), 3))
    far = np.empty(len(energy_kev))
    for i, (e, u) in enumerate(zip(energy_kev, directions, strict=True)):
        n_seg, path[i] = _kernels.transport_electron(rng, 0.0, 0.0, z0, u[0], u[1], u[2], e, gap_mm, z, n,
                                                     rho_z_over_a, mean_excitation, seg, 0)
        points = seg[:n_seg, 3:6] - [0.0, 0.0, z0]
        end[i] = points[-1]
        far[i] = np.sqrt((points**2).sum(axis=1)).max()
    return path, end, far
