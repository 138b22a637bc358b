"""Toy event generators for the analysis tests (test scaffolding, not physics).

``modulated_angles`` draws emission angles from pdf(phi) = (1 + m cos 2(phi - phi0)) / 2pi on (-pi, pi], the
modulation curve of docs/methods.md section 3 (m = mu p), by rejection sampling.
"""

import numpy as np


def modulated_angles(rng, n, modulation, phase_rad=0.0):
    modulation = np.asarray(modulation, dtype=float)
    out = np.empty(n)
    filled = 0
    per_event = np.ndim(modulation) > 0
    todo = np.arange(n)
    while filled < n:
        k = todo.size
        phi = rng.uniform(-np.pi, np.pi, k)
        m = modulation[todo] if per_event else modulation
        ph0 = phase_rad[todo] if np.ndim(phase_rad) else phase_rad
        accept = rng.uniform(0, 2, k) < 1 + m * np.cos(2 * (phi - ph0))
        out[todo[accept]] = phi[accept]
        filled += int(accept.sum())
        todo = todo[~accept]
    return np.mod(out + np.pi, 2 * np.pi) - np.pi
