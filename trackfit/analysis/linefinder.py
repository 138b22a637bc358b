"""Find lines of known energy in pulse-height spectra and fit each in a window clear of its neighbours
(docs/methods.md §6).

An energy scale needs the pulse height of each calibration line. When nothing tells where the lines are, the gain
(pulse height per keV) is found by a scan: for each trial gain ``g`` every line ``E_i`` is looked up at ``g E_i`` in
the smoothed spectrum of its own run, and the gain whose lines all land on populated peaks wins (the score is the sum
of the spectrum densities, each relative to its run's highest peak). Lines of one run (a main line and its escape
peak, two fluorescence lines) constrain each other through the ratio of their energies, which does not depend on
the gain; a first guess of the gain (the reconstruction's nominal scale, or a line already fitted) narrows the scan.

Each line is then fitted with one Gaussian on a linear background (:func:`trackfit.analysis.fit_line`): in a window
of +-25 % around the guess, then twice in +-2 fitted sigma around the last fitted peak. The core of a line is close
to a Gaussian even when its tails are not (a spread of gains, charge lost at the edges, an unresolved escape tail),
so the peak position is not pulled by the tails and the goodness of fit judges the core. Every window stops
half-way to the next line of the same run, so a neighbouring line never enters a fit.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from .spectrum import FWHM_PER_SIGMA, LineFit, fit_line

__all__ = ["scan_gain", "fit_line_near", "nominal_counts_per_kev", "CORE_HALF_WIDTH_SIGMA"]

#: half-width of the final line fits, in fitted sigma (the core of a line; common practice)
CORE_HALF_WIDTH_SIGMA = 2.0


def nominal_counts_per_kev(pulse_height, energy_kev) -> float | None:
    """The scale a table was reconstructed with: the median of ``pulse_height / energy_kev`` (None if undefined)."""
    ph = np.asarray(pulse_height, dtype=float)
    energy = np.asarray(energy_kev, dtype=float)
    good = np.isfinite(ph) & np.isfinite(energy) & (ph > 0) & (energy > 0)
    return float(np.median(ph[good] / energy[good])) if np.any(good) else None


def _log_density(values, n_bins=240):
    """Smoothed density of ``values`` on log-spaced bins (bin width proportional to the value, like the line
    widths), normalised to a maximum of 1; returns (bin centres, density)."""
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v) & (v > 0)]
    low, high = np.percentile(v, [0.1, 99.9])
    if not high > low:
        low, high = 0.9 * low, 1.1 * high
    edges = np.geomspace(0.8 * low, 1.25 * high, n_bins + 1)
    counts, _ = np.histogram(v, bins=edges)
    kernel = np.exp(-0.5 * (np.arange(-6, 7) / 2.0) ** 2)  # a Gaussian of 2 bins (about 1.6 % of the value)
    smooth = np.convolve(counts, kernel / kernel.sum(), mode="same")
    return np.sqrt(edges[:-1] * edges[1:]), smooth / max(smooth.max(), 1e-300)


def scan_gain(spectra: Sequence, energies_kev: Sequence[float], *, guess: float | None = None,
              span: float = 2.5) -> float:
    """The pulse height per keV that puts every line on a peak of its spectrum (see the module docstring).

    Parameters
    ----------
    spectra : sequence of array_like
        Pulse heights of the run of each line (the same array may appear for several lines).
    energies_kev : sequence of float
        Energy of each line.
    guess : float, optional
        A first estimate of the gain; the scan covers ``[guess / span, guess * span]``. Default: every gain that
        puts the lines inside their spectra.
    span : float
        Factor around ``guess`` scanned.
    """
    energies = np.asarray(energies_kev, dtype=float)
    if len(spectra) != energies.size or energies.size == 0:
        raise ValueError(f"expected one spectrum per line energy (got {len(spectra)} and {energies.size})")
    if np.any(~(energies > 0)):
        raise ValueError(f"line energies must be > 0 keV (got {energies.tolist()})")
    densities = {}
    for values in spectra:
        if id(values) not in densities:
            densities[id(values)] = _log_density(values)
    if guess is not None and guess > 0:
        low, high = guess / span, guess * span
    else:
        low = min(densities[id(s)][0][0] / e for s, e in zip(spectra, energies, strict=True))
        high = max(densities[id(s)][0][-1] / e for s, e in zip(spectra, energies, strict=True))
    trials = np.geomspace(low, high, 2000)
    score = np.zeros(trials.size)
    for values, energy in zip(spectra, energies, strict=True):
        centres, density = densities[id(values)]
        score += np.interp(np.log(trials * energy), np.log(centres), density, left=0.0, right=0.0)
    return float(trials[int(np.argmax(score))])


def fit_line_near(values, guess: float, *, neighbours: Sequence[float] = (), bins: int | None = None) -> LineFit:
    """Fit one Gaussian line near ``guess`` (pulse-height units), then its core, clear of ``neighbours``.

    Parameters
    ----------
    values : array_like
        Pulse heights of the run.
    guess : float
        Expected position of the line.
    neighbours : sequence of float
        Expected positions of the other lines of the same run; no window reaches past half-way to them.
    bins : int, optional
        Histogram bins per window (default: about 20 events per bin, 20 to 80 bins).

    Raises
    ------
    ValueError
        When the window holds too few events to fit a line, or the fitted peak leaves the region closer to
        ``guess`` than to a neighbour (the lines are not resolved).
    """
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    below = [0.5 * (n + guess) for n in neighbours if n < guess]
    above = [0.5 * (n + guess) for n in neighbours if n > guess]
    low_limit, high_limit = max(below, default=-np.inf), min(above, default=np.inf)

    def fit_in(centre, half):
        low, high = max(centre - half, low_limit), min(centre + half, high_limit)
        inside = v[(v >= low) & (v < high)]
        if inside.size < 20:
            raise ValueError(f"only {inside.size} events within {low:.5g}–{high:.5g} around the expected line "
                             f"position {guess:.5g}: too few for a line fit")
        n_bins = bins if bins is not None else int(np.clip(inside.size // 20, 20, 80))
        fit = fit_line(inside, bins=n_bins, range=(low, high))
        if not low_limit < fit.peak < high_limit:
            raise ValueError(f"no line found near {guess:.5g}: the fit went to {fit.peak:.5g}, past half-way to the "
                             f"next line ({low_limit:.5g}–{high_limit:.5g}); are the lines resolved?")
        return fit

    fit = fit_in(guess, 0.25 * guess)
    for _ in range(2):  # the core of the line, centred on the last fitted peak
        sigma = fit.fwhm_frac * fit.peak / FWHM_PER_SIGMA
        if not (np.isfinite(sigma) and sigma > 0 and abs(fit.peak - guess) < 0.25 * guess):
            return fit
        fit = fit_in(fit.peak, CORE_HALF_WIDTH_SIGMA * sigma)
    return fit
