"""Numba kernels of the track simulator (private; use :mod:`trackfit.simulate.physics` and ``run``).

Every kernel has a plain-Python/numpy twin in ``_reference.py`` that makes the same random draws in the same
order from a ``numpy.random.Generator``; numba's Generator support reproduces numpy's algorithms bit for bit, so
the tests compare kernel and twin event by event.

Units inside the kernels: energies keV, lengths mm (cross sections and densities in cm, converted once per step).
"""

from __future__ import annotations

import math

import numpy as np

from .._jit import jit

#: electron rest energy, keV
ELECTRON_MASS_KEV = 510.99895
#: Joy-Luo constants: dE/ds [keV/cm] = -JOY_LUO_KEV_CM * sum(rho Z/A ln(1.166 (E + k J)/J)) / E
JOY_LUO_KEV_CM = 78500.0
JOY_LUO_K = 0.8
#: electrons below this energy stop where they are (their energy is deposited there), keV
CUTOFF_KEV = 0.05


@jit
def stopping_power_kev_cm(energy_kev, rho_z_over_a, mean_excitation_kev):
    """Bethe stopping power with the Joy-Luo low-energy correction, keV/cm (positive)."""
    total = 0.0
    for j in range(rho_z_over_a.shape[0]):
        arg = 1.166 * (energy_kev + JOY_LUO_K * mean_excitation_kev[j]) / mean_excitation_kev[j]
        total += rho_z_over_a[j] * math.log(arg)
    return JOY_LUO_KEV_CM * total / energy_kev


@jit
def screening_parameter(energy_kev, z):
    """Screening parameter ``a = 3.4e-3 Z**0.67 / E`` of the screened-Rutherford cross section."""
    return 3.4e-3 * z**0.67 / energy_kev


@jit
def elastic_cross_section_cm2(energy_kev, z):
    """Screened-Rutherford total elastic cross section of one atom, cm² (Joy 1995 form)."""
    a = screening_parameter(energy_kev, z)
    rel = (energy_kev + 511.0) / (energy_kev + 1024.0)
    return 5.21e-21 * z * z / (energy_kev * energy_kev) * 4.0 * math.pi / (a * (1.0 + a)) * rel * rel


@jit
def _rotate(ux, uy, uz, cos_chi, phi):
    """Direction after a deflection by polar angle ``acos(cos_chi)`` and azimuth ``phi`` about ``u``."""
    sin_chi = math.sqrt(max(0.0, 1.0 - cos_chi * cos_chi))
    cp = math.cos(phi)
    sp = math.sin(phi)
    if abs(uz) > 0.99999999:
        sign = 1.0 if uz > 0 else -1.0
        return sin_chi * cp, sin_chi * sp, sign * cos_chi
    t = math.sqrt(1.0 - uz * uz)
    nx = sin_chi * (ux * uz * cp - uy * sp) / t + ux * cos_chi
    ny = sin_chi * (uy * uz * cp + ux * sp) / t + uy * cos_chi
    nz = -sin_chi * cp * t + uz * cos_chi
    norm = math.sqrt(nx * nx + ny * ny + nz * nz)
    return nx / norm, ny / norm, nz / norm


@jit
def _put_segment(seg, k, x0, y0, z0, x1, y1, z1, energy_kev):
    """Row ``k`` of the segment buffer: a straight piece of track and the energy deposited along it."""
    seg[k, 0] = x0
    seg[k, 1] = y0
    seg[k, 2] = z0
    seg[k, 3] = x1
    seg[k, 4] = y1
    seg[k, 5] = z1
    seg[k, 6] = energy_kev


@jit
def transport_electron(rng, x, y, z, ux, uy, uz, energy_kev, gap_mm, atom_z, atom_density_cm3, rho_z_over_a,
                       mean_excitation_kev, seg, n_seg):
    """Follow one electron (condensed history with single elastic scattering) and record energy deposits.

    Each step: free flight ``s = -ln(U) / mu_el(E)`` (screened-Rutherford, all atoms), continuous loss
    ``S(E_mid) * s`` (Bethe/Joy-Luo at the mid-step energy), then an elastic deflection on an atom chosen by its
    share of ``mu_el`` with ``cos chi = 1 - 2 a R / (1 + a - R)``. The electron stops below :data:`CUTOFF_KEV`
    (rest deposited there) or when it leaves the gap ``0 <= z <= gap_mm`` (rest lost).

    Parameters
    ----------
    seg : ndarray, shape (capacity, 7)
        Segment buffer ``(x0, y0, z0, x1, y1, z1, energy_kev)``; rows ``n_seg..`` are written.

    Returns
    -------
    n_seg : int
        Rows used after this electron.
    path_mm : float
        Path length travelled.
    """
    n_atoms = atom_z.shape[0]
    weights = np.empty(n_atoms)
    e = energy_kev
    path = 0.0
    capacity = seg.shape[0]
    while e > CUTOFF_KEV and n_seg < capacity - 1:
        mu = 0.0
        for j in range(n_atoms):
            weights[j] = atom_density_cm3[j] * elastic_cross_section_cm2(e, atom_z[j])
            mu += weights[j]
        s_cm = -math.log(1.0 - rng.random()) / mu
        loss = stopping_power_kev_cm(e, rho_z_over_a, mean_excitation_kev) * s_cm
        e_mid = e - 0.5 * loss
        if e_mid > 0.5 * CUTOFF_KEV:
            loss = stopping_power_kev_cm(e_mid, rho_z_over_a, mean_excitation_kev) * s_cm
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
        nx = x + ux * s_mm
        ny = y + uy * s_mm
        _put_segment(seg, n_seg, x, y, z, nx, ny, nz, loss)
        n_seg += 1
        path += s_mm
        x, y, z = nx, ny, nz
        e -= loss
        if left:
            return n_seg, path
        if last:
            break
        # elastic deflection at the end of the flight
        pick = rng.random() * mu
        j = 0
        acc = weights[0]
        while acc < pick and j < n_atoms - 1:
            j += 1
            acc += weights[j]
        a = screening_parameter(e, atom_z[j])
        r = rng.random()
        cos_chi = 1.0 - 2.0 * a * r / (1.0 + a - r)
        phi = 2.0 * math.pi * rng.random()
        ux, uy, uz = _rotate(ux, uy, uz, cos_chi, phi)
    # what is left is deposited where the electron stops
    _put_segment(seg, n_seg, x, y, z, x, y, z, e)
    return n_seg + 1, path


@jit
def nearest_pixel(x_mm, y_mm, x0_mm, y0_mm, pitch_mm, row_pitch_mm, unshifted_offset):
    """Chip ``(column, row)`` of the hexagon containing a point: the cube rounding of :class:`HexGrid`."""
    x = x_mm + x0_mm - 0.5 * unshifted_offset * pitch_mm
    rf = (y_mm + y0_mm) / row_pitch_mm
    qf = x / pitch_mm - 0.5 * rf
    sf = -qf - rf
    q = np.rint(qf)
    r = np.rint(rf)
    s = np.rint(sf)
    dq = abs(q - qf)
    dr = abs(r - rf)
    ds = abs(s - sf)
    if dq > dr and dq > ds:
        q = -r - s
    elif dr > ds:
        r = -q - s
    qi = np.int64(q)
    ri = np.int64(r)
    # axial -> offset; the shifted parity is (1 - unshifted_offset)
    if unshifted_offset == 0:
        column = qi + (ri - (ri & 1)) // 2
    else:
        column = qi + (ri + (ri & 1)) // 2
    return column, ri


@jit
def simulate_events(rng, x0_mm, y0_mm, z0_mm, pe_dir, pe_kev, auger_dir, auger_kev, local_kev, second_xyz_mm,
                    second_kev, gain_factor,
                    gap_mm, atom_z, atom_density_cm3, rho_z_over_a, mean_excitation_kev,
                    w_kev, fano, diffusion_mm_sqrt_mm, spread_mm, mean_gain, theta,
                    pixel_gain, n_columns, n_rows, x_origin_mm, y_origin_mm, pitch_mm, row_pitch_mm,
                    unshifted_offset, noise_e, e_per_adc, threshold_e, min_pixels, margin, zero_suppression_e,
                    seg, count, charge, touched, signal):
    """Tracks, ionization, drift, avalanche, pixels, noise, trigger and ROI for a batch of converted photons.

    Energy is deposited as segments: ``local_kev`` at the conversion point, ``second_kev`` (re-absorbed
    fluorescence, where > 0) at ``second_xyz_mm``, then the photoelectron and Auger tracks.

    Returns
    -------
    triggered : bool array (n,)
    roi : int32 array (n, 4)
        First column, first row, columns, rows (meaningful where triggered).
    n_signal : int64 array (n,)
        ROI pixels written for each event (0 when not triggered); the signal of the triggered events follows
        in ``signal`` in event order.
    signal : int16 array
        The buffer given, or a larger copy when it was too small.
    path_mm : float array (n,)
        Path length of the photoelectron.
    n_ionization : int64 array (n,)
        Ionization electrons produced.
    """
    n = x0_mm.shape[0]
    triggered = np.zeros(n, dtype=np.bool_)
    roi = np.zeros((n, 4), dtype=np.int32)
    n_signal = np.zeros(n, dtype=np.int64)
    path_mm = np.zeros(n)
    n_ionization = np.zeros(n, dtype=np.int64)
    one_minus_f = 1.0 - fano
    int16_max = 32767.0
    pos = 0
    for i in range(n):
        # --- energy deposits: local (binding energy not carried away), re-absorbed fluorescence, photoelectron,
        #     Auger electron
        _put_segment(seg, 0, x0_mm[i], y0_mm[i], z0_mm[i], x0_mm[i], y0_mm[i], z0_mm[i], local_kev[i])
        n_seg = 1
        if second_kev[i] > 0:
            _put_segment(seg, 1, second_xyz_mm[i, 0], second_xyz_mm[i, 1], second_xyz_mm[i, 2], second_xyz_mm[i, 0],
                         second_xyz_mm[i, 1], second_xyz_mm[i, 2], second_kev[i])
            n_seg = 2
        if pe_kev[i] > 0:
            n_seg, path = transport_electron(rng, x0_mm[i], y0_mm[i], z0_mm[i], pe_dir[i, 0], pe_dir[i, 1],
                                             pe_dir[i, 2], pe_kev[i], gap_mm, atom_z, atom_density_cm3,
                                             rho_z_over_a, mean_excitation_kev, seg, n_seg)
            path_mm[i] = path
        if auger_kev[i] > 0:
            n_seg, _ = transport_electron(rng, x0_mm[i], y0_mm[i], z0_mm[i], auger_dir[i, 0], auger_dir[i, 1],
                                          auger_dir[i, 2], auger_kev[i], gap_mm, atom_z, atom_density_cm3,
                                          rho_z_over_a, mean_excitation_kev, seg, n_seg)
        deposit = 0.0
        for k in range(n_seg):
            deposit += seg[k, 6]
        # --- number of ionization electrons: Binomial(E / W / (1 - F), 1 - F) has mean E/W, variance F E/W
        trials = deposit / w_kev / one_minus_f
        n_trials = np.int64(math.floor(trials))
        if rng.random() < trials - n_trials:        # randomised rounding keeps the mean exactly E / W
            n_trials += 1
        n_e = rng.binomial(n_trials, one_minus_f) if fano > 0 else n_trials
        n_ionization[i] = n_e
        # --- place the electrons along the deposits (stratified in deposited energy), drift and diffuse
        n_touched = 0
        k_seg = 0
        acc = seg[0, 6]
        before = 0.0
        for k in range(n_e):
            level = (k + rng.random()) * deposit / n_e
            while level > acc and k_seg < n_seg - 1:
                before = acc
                k_seg += 1
                acc += seg[k_seg, 6]
            width = acc - before
            f = (level - before) / width if width > 0 else 0.0
            f = min(max(f, 0.0), 1.0)
            ex = seg[k_seg, 0] + f * (seg[k_seg, 3] - seg[k_seg, 0])
            ey = seg[k_seg, 1] + f * (seg[k_seg, 4] - seg[k_seg, 1])
            ez = seg[k_seg, 2] + f * (seg[k_seg, 5] - seg[k_seg, 2])
            sigma = math.sqrt(diffusion_mm_sqrt_mm * diffusion_mm_sqrt_mm * max(ez, 0.0) + spread_mm * spread_mm)
            ex += sigma * rng.standard_normal()
            ey += sigma * rng.standard_normal()
            column, row = nearest_pixel(ex, ey, x_origin_mm, y_origin_mm, pitch_mm, row_pitch_mm,
                                        unshifted_offset)
            if column < 0 or column >= n_columns or row < 0 or row >= n_rows:
                continue
            p = row * n_columns + column
            if count[p] == 0:
                touched[n_touched] = p
                n_touched += 1
            count[p] += 1
        # --- avalanche (sum of Polya = gamma), noise, trigger
        n_trig = 0
        c_min = n_columns
        c_max = -1
        r_min = n_rows
        r_max = -1
        for t in range(n_touched):
            p = touched[t]
            scale = mean_gain * pixel_gain[p] * gain_factor[i] / (1.0 + theta)
            q = rng.gamma(count[p] * (1.0 + theta), scale) + noise_e * rng.standard_normal()
            charge[p] = q
            if q > threshold_e:
                n_trig += 1
                row = p // n_columns
                column = p - row * n_columns
                c_min = min(c_min, column)
                c_max = max(c_max, column)
                r_min = min(r_min, row)
                r_max = max(r_max, row)
        if n_trig >= min_pixels:
            triggered[i] = True
            c0 = max(c_min - margin, 0)
            c1 = min(c_max + margin, n_columns - 1)
            r0 = max(r_min - margin, 0)
            r1 = min(r_max + margin, n_rows - 1)
            nc = c1 - c0 + 1
            nr = r1 - r0 + 1
            roi[i, 0] = c0
            roi[i, 1] = r0
            roi[i, 2] = nc
            roi[i, 3] = nr
            need = pos + nc * nr
            if need > signal.shape[0]:
                bigger = np.empty(max(2 * signal.shape[0], need), dtype=np.int16)
                bigger[:pos] = signal[:pos]
                signal = bigger
            for row in range(r0, r1 + 1):
                for column in range(c0, c1 + 1):
                    p = row * n_columns + column
                    if count[p] > 0:
                        q = charge[p]
                    else:
                        q = noise_e * rng.standard_normal()
                    adc = np.rint(q / e_per_adc) if q >= zero_suppression_e else 0.0
                    adc = min(max(adc, -int16_max - 1.0), int16_max)
                    signal[pos] = np.int16(adc)
                    pos += 1
            n_signal[i] = nc * nr
        for t in range(n_touched):
            count[touched[t]] = 0
    return triggered, roi, n_signal, signal, path_mm, n_ionization
