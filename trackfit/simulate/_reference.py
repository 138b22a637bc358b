"""Plain-Python/numpy twins of the simulator kernels (``_kernels.py``), for tests and the benchmark baseline.

They make the same random draws in the same order from a ``numpy.random.Generator`` as the numba kernels, so
kernel and twin give the same events for the same generator state. Slow (a Python loop per step and electron):
use them on a few events only.
"""

from __future__ import annotations

import math

import numpy as np

from ..hexgrid import HexGrid
from ._kernels import CUTOFF_KEV, JOY_LUO_K, JOY_LUO_KEV_CM
from .transport import transverse_diffusion

__all__ = ["stopping_power_kev_cm", "elastic_cross_section_cm2", "transport_electron", "simulate_events"]


def stopping_power_kev_cm(energy_kev, rho_z_over_a, mean_excitation_kev):
    """Joy-Luo stopping power, vectorised over energies (keV/cm)."""
    e = np.asarray(energy_kev, dtype=np.float64)[..., None]
    terms = rho_z_over_a * np.log(1.166 * (e + JOY_LUO_K * mean_excitation_kev) / mean_excitation_kev)
    return JOY_LUO_KEV_CM * terms.sum(axis=-1) / e[..., 0]


def elastic_cross_section_cm2(energy_kev, z):
    """Screened-Rutherford elastic cross section, vectorised (cm²)."""
    e = np.asarray(energy_kev, dtype=np.float64)
    a = 3.4e-3 * z**0.67 / e
    rel = (e + 511.0) / (e + 1024.0)
    return 5.21e-21 * z * z / (e * e) * 4.0 * np.pi / (a * (1.0 + a)) * rel * rel


def _sp(e, rho_z_over_a, mean_excitation_kev):
    total = 0.0
    for j in range(len(rho_z_over_a)):
        total += rho_z_over_a[j] * math.log(1.166 * (e + JOY_LUO_K * mean_excitation_kev[j]) / mean_excitation_kev[j])
    return JOY_LUO_KEV_CM * total / e


def _sigma(e, z):
    a = 3.4e-3 * z**0.67 / e
    rel = (e + 511.0) / (e + 1024.0)
    return 5.21e-21 * z * z / (e * e) * 4.0 * math.pi / (a * (1.0 + a)) * rel * rel


def _rotate(ux, uy, uz, cos_chi, phi):
    sin_chi = math.sqrt(max(0.0, 1.0 - cos_chi * cos_chi))
    cp, sp = math.cos(phi), math.sin(phi)
    if abs(uz) > 0.99999999:
        return sin_chi * cp, sin_chi * sp, (1.0 if uz > 0 else -1.0) * cos_chi
    t = math.sqrt(1.0 - uz * uz)
    nx = sin_chi * (ux * uz * cp - uy * sp) / t + ux * cos_chi
    ny = sin_chi * (uy * uz * cp + ux * sp) / t + uy * cos_chi
    nz = -sin_chi * cp * t + uz * cos_chi
    norm = math.sqrt(nx * nx + ny * ny + nz * nz)
    return nx / norm, ny / norm, nz / norm


def transport_electron(rng, x, y, z, ux, uy, uz, energy_kev, gap_mm, atom_z, atom_density_cm3, rho_z_over_a,
                       mean_excitation_kev):
    """Twin of ``_kernels.transport_electron``; returns (segments as a list of 7-tuples, path_mm)."""
    segments = []
    e, path = energy_kev, 0.0
    while e > CUTOFF_KEV:
        weights = np.array([n * _sigma(e, zz) for zz, n in zip(atom_z, atom_density_cm3, strict=True)])
        mu = 0.0
        for w in weights:
            mu += w
        s_cm = -math.log(1.0 - rng.random()) / mu
        loss = _sp(e, rho_z_over_a, mean_excitation_kev) * s_cm
        e_mid = e - 0.5 * loss
        if e_mid > 0.5 * CUTOFF_KEV:
            loss = _sp(e_mid, rho_z_over_a, mean_excitation_kev) * s_cm
        last = False
        if e - loss <= CUTOFF_KEV:
            s_cm *= (e - CUTOFF_KEV) / loss
            loss = e - CUTOFF_KEV
            last = True
        s_mm = 10.0 * s_cm
        nz = z + uz * s_mm
        left = False
        if nz < 0.0 or nz > gap_mm:
            limit = (0.0 - z) / uz if nz < 0.0 else (gap_mm - z) / uz
            loss *= limit / s_mm
            s_mm = limit
            nz = 0.0 if uz < 0 else gap_mm
            left = True
        nx, ny = x + ux * s_mm, y + uy * s_mm
        segments.append((x, y, z, nx, ny, nz, loss))
        path += s_mm
        x, y, z = nx, ny, nz
        e -= loss
        if left:
            return segments, path
        if last:
            break
        pick = rng.random() * mu
        j, acc = 0, weights[0]
        while acc < pick and j < len(weights) - 1:
            j += 1
            acc += weights[j]
        a = 3.4e-3 * atom_z[j] ** 0.67 / e
        r = rng.random()
        cos_chi = 1.0 - 2.0 * a * r / (1.0 + a - r)
        phi = 2.0 * math.pi * rng.random()
        ux, uy, uz = _rotate(ux, uy, uz, cos_chi, phi)
    segments.append((x, y, z, x, y, z, e))
    return segments, path


def simulate_events(rng, photons, gain_factor, mixture, config, pixel_gain=None):
    """Twin of ``_kernels.simulate_events`` for a :class:`~trackfit.simulate.photons.PhotonBatch`.

    Returns
    -------
    list of dict
        One per photon: ``triggered``, ``roi`` (4 ints), ``signal`` (int16 array, row by row), ``path_mm``,
        ``n_ionization``.
    """
    grid: HexGrid = config.grid
    gas, ro, mult = config.gas, config.readout, config.multiplier
    z_atoms, n_atoms, rho_z_over_a, mean_excitation = mixture.stopping_constants()
    gap_mm = gas.gap_cm * 10.0
    w_kev, fano = gas.w_value_ev / 1000.0, gas.fano_factor
    diffusion = transverse_diffusion(config.gas, config.drift).um_per_sqrt_cm * 1e-3 / math.sqrt(10.0)
    spread = mult.transfer_spread_um * 1e-3
    pixel_gain = np.ones(grid.shape) if pixel_gain is None else pixel_gain
    out = []
    for i in range(len(photons)):
        x0, y0, z0 = photons.x_mm[i], photons.y_mm[i], photons.height_mm[i]
        segments = [(x0, y0, z0, x0, y0, z0, photons.local_kev[i])]
        second = photons.fluorescence
        if second.deposit_kev[i] > 0:
            xs, ys, zs = second.x_mm[i], second.y_mm[i], second.z_mm[i]
            segments.append((xs, ys, zs, xs, ys, zs, second.deposit_kev[i]))
        path = 0.0
        if photons.photoelectron_kev[i] > 0:
            d = photons.photoelectron_dir[i]
            more, path = transport_electron(rng, x0, y0, z0, d[0], d[1], d[2], photons.photoelectron_kev[i], gap_mm,
                                            z_atoms, n_atoms, rho_z_over_a, mean_excitation)
            segments += more
        if photons.auger_kev[i] > 0:
            d = photons.auger_dir[i]
            more, _ = transport_electron(rng, x0, y0, z0, d[0], d[1], d[2], photons.auger_kev[i], gap_mm,
                                         z_atoms, n_atoms, rho_z_over_a, mean_excitation)
            segments += more
        seg = np.array(segments)
        deposit = 0.0
        for v in seg[:, 6]:
            deposit += v
        trials = deposit / w_kev / (1.0 - fano)
        n_trials = math.floor(trials)
        if rng.random() < trials - n_trials:
            n_trials += 1
        n_e = int(rng.binomial(n_trials, 1.0 - fano)) if fano > 0 else n_trials
        # electron positions along the deposits, stratified in deposited energy
        counts: dict[tuple[int, int], int] = {}
        k_seg, before, acc = 0, 0.0, seg[0, 6]
        for k in range(n_e):
            level = (k + rng.random()) * deposit / n_e
            while level > acc and k_seg < len(seg) - 1:
                before = acc
                k_seg += 1
                acc = acc + seg[k_seg, 6]
            width = acc - before
            f = min(max((level - before) / width if width > 0 else 0.0, 0.0), 1.0)
            ex, ey, ez = (seg[k_seg, c] + f * (seg[k_seg, c + 3] - seg[k_seg, c]) for c in range(3))
            sigma = math.sqrt(diffusion * diffusion * max(ez, 0.0) + spread * spread)
            ex += sigma * rng.standard_normal()
            ey += sigma * rng.standard_normal()
            column, row = (int(v) for v in grid.nearest_pixel(ex, ey))
            if not grid.contains(column, row):
                continue
            counts[(column, row)] = counts.get((column, row), 0) + 1
        charge = {}
        for (column, row), n in counts.items():       # dicts keep first-touch order, as the kernel's list
            scale = mult.gain * pixel_gain[row, column] * gain_factor[i] / (1.0 + mult.polya_theta)
            charge[(column, row)] = rng.gamma(n * (1.0 + mult.polya_theta), scale) \
                + ro.noise_electrons * rng.standard_normal()
        hot = [key for key, q in charge.items() if q > ro.trigger_threshold_electrons]
        result = {"triggered": False, "roi": np.zeros(4, np.int32), "signal": np.zeros(0, np.int16),
                  "path_mm": path, "n_ionization": n_e}
        if len(hot) >= ro.trigger_min_pixels:
            columns = [c for c, _ in hot]
            rows = [r for _, r in hot]
            m = ro.roi_margin_pixels
            c0, c1 = max(min(columns) - m, 0), min(max(columns) + m, grid.n_columns - 1)
            r0, r1 = max(min(rows) - m, 0), min(max(rows) + m, grid.n_rows - 1)
            values = []
            for row in range(r0, r1 + 1):
                for column in range(c0, c1 + 1):
                    q = charge[(column, row)] if (column, row) in charge \
                        else ro.noise_electrons * rng.standard_normal()
                    adc = np.rint(q / ro.electrons_per_adc) if q >= ro.zero_suppression_electrons else 0.0
                    values.append(min(max(adc, -32768.0), 32767.0))
            result.update(triggered=True, roi=np.array([c0, r0, c1 - c0 + 1, r1 - r0 + 1], np.int32),
                          signal=np.array(values, dtype=np.int16))
        out.append(result)
    return out
