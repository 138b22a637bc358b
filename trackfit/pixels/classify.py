"""Bad-pixel codes from the per-pixel estimates: dead, hot, noisy, not judged (``docs/methods.md`` §10).

The rules (each pixel gets the first that applies):

1. ``FEW_SAMPLES``: fewer than ``min_samples`` noise samples - not judged;
2. ``DEAD``: every sample has the same value while the judged neighbours are alive (their median noise is at least
   ``dead_neighbour_fraction`` times the chip's median noise); also a pixel whose values mostly lie below the
   histogram range (stuck far below its reference);
3. ``HOT``: the number k of its n samples above ``occupancy_noise_rms`` times its noise is improbable for the chip:
   binomial tail ``P(K >= k | n, p_ref) < hot_p_value``, with ``p_ref`` the pooled occupancy of the pixels that are
   not hot (iterated), and at least the Gaussian tail beyond ``occupancy_noise_rms``; or its upper quartile lies
   more than ``hot_skew_ratio`` times farther from its median than its lower quartile (a pixel firing in so many
   samples, a third or more, that its median and MAD follow the spikes); or its values mostly lie above the
   histogram range;
4. ``NOISY``: noise above ``median + noisy_spread_rms x spread`` (1.4826 x MAD of the noise of the judged pixels that
   are not dead or hot) and ``noise - median >= noisy_significance x its standard error``; also a judged pixel
   whose noise is too wide for the histogram range (NaN);
5. ``OK``.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from ..hexgrid import HexGrid
from ..io.pixelmap import PixelCode
from .robust import MAD_TO_SIGMA
from .settings import PixelMapSettings

__all__ = ["classify_pixels", "neighbour_median"]


def neighbour_median(grid: HexGrid, values, usable) -> np.ndarray:
    """Median of ``values`` over each pixel's usable 6-neighbours on the chip (NaN where it has none).

    Parameters
    ----------
    values, usable : ndarray, shape ``grid.shape``
    """
    columns, rows = grid.all_pixels()
    nc, nr = grid.neighbours(columns, rows)
    on_chip = grid.contains(nc, nr)
    index = np.where(on_chip, nr * grid.n_columns + nc, 0)
    flat_values = np.asarray(values, dtype=np.float64).ravel()
    take = on_chip & np.asarray(usable).ravel()[index] & np.isfinite(flat_values[index])
    neighbour = np.where(take, flat_values[index], np.inf)
    neighbour.sort(axis=1)
    count = take.sum(axis=1)
    rows_ = np.arange(len(count))
    lo = np.clip((count - 1) // 2, 0, 5)
    hi = np.clip(count // 2, 0, 5)
    with np.errstate(invalid="ignore"):
        median = 0.5 * (neighbour[rows_, lo] + neighbour[rows_, hi])
    return np.where(count > 0, median, np.nan).reshape(grid.shape)


def classify_pixels(grid: HexGrid, *, n_samples, noise_adc, noise_error_adc, n_above, constant, outside,
                    settings: PixelMapSettings, occupancy_known=None, quartile_ratio=None):
    """Code of every pixel and the chip-level numbers the codes were decided with.

    Parameters
    ----------
    grid : HexGrid
    n_samples, noise_adc, noise_error_adc, n_above : ndarray, shape ``grid.shape``
    constant : ndarray of bool
        Every sample of the pixel had the same value (its noise is 0).
    outside : ndarray of int8
        -1 / +1 where most values lay below / above the histogram range.
    settings : PixelMapSettings
    occupancy_known : ndarray of bool, optional
        False where the occupancy threshold lay beyond the histogram range (``n_above`` is then an upper bound and
        the pixel is not tested for being hot). Default: known everywhere.
    quartile_ratio : ndarray, optional
        (upper quartile - median) / (median - lower quartile) of each pixel (inf where the upper quartile lies
        above the histogram range). Default: not used.

    Returns
    -------
    code : ndarray of uint8, shape ``grid.shape``
    statistics : dict
    """
    n = np.asarray(n_samples, dtype=np.int64)
    noise = np.asarray(noise_adc, dtype=np.float64)
    noise_error = np.asarray(noise_error_adc, dtype=np.float64)
    k = np.asarray(n_above, dtype=np.int64)
    code = np.full(grid.shape, int(PixelCode.OK), np.uint8)
    judged = n >= settings.min_samples
    live = judged & ~constant & (outside == 0) & np.isfinite(noise)
    chip_noise = float(np.median(noise[live])) if live.any() else 0.0

    # dead: constant where the neighbours are alive - unless most pixels are constant (zero-suppressed data, where
    # "constant" means "quiet", and dead pixels cannot be told apart)
    neighbours = neighbour_median(grid, noise, judged)
    alive_around = np.nan_to_num(neighbours, nan=-1.0) >= settings.dead_neighbour_fraction * chip_noise
    mostly_constant = np.count_nonzero(constant & judged) > 0.5 * max(1, np.count_nonzero(judged))
    dead = judged & ((constant & alive_around & (chip_noise > 0) & ~mostly_constant) | (outside < 0))

    # hot: binomial tail against the pooled occupancy of the other pixels
    p_floor = float(stats.norm.sf(settings.occupancy_noise_rms))
    known = np.ones(grid.shape, bool) if occupancy_known is None else np.asarray(occupancy_known, bool)
    candidates = judged & ~dead & (outside == 0) & known
    skewed = np.zeros(grid.shape, bool)
    if quartile_ratio is not None:
        with np.errstate(invalid="ignore"):
            skewed = judged & ~dead & ~constant & (np.asarray(quartile_ratio) > settings.hot_skew_ratio)
    hot = judged & ((outside > 0) | skewed)
    p_pool = 0.0
    for _ in range(4):
        pool = candidates & ~hot
        total = int(n[pool].sum())
        p_pool = float(k[pool].sum()) / total if total else 0.0
        p_ref = max(p_pool, p_floor)
        tail = np.ones(grid.shape)
        tail[candidates] = stats.binom.sf(k[candidates] - 1, n[candidates], p_ref)
        new_hot = (candidates & (tail < settings.hot_p_value)) | (judged & ((outside > 0) | skewed))
        if np.array_equal(new_hot, hot):
            break
        hot = new_hot
    p_ref = max(p_pool, p_floor)

    # noisy: far above the chip's noise distribution, and significantly so for this pixel's statistics
    rest = live & ~dead & ~hot
    median = float(np.median(noise[rest])) if rest.any() else 0.0
    spread = MAD_TO_SIGMA * float(np.median(np.abs(noise[rest] - median))) if rest.any() else 0.0
    noisy_threshold = median + settings.noisy_spread_rms * spread
    with np.errstate(invalid="ignore"):
        noisy = judged & ~dead & ~hot & (
            ((noise > noisy_threshold) & (noise - median >= settings.noisy_significance * noise_error))
            | (~np.isfinite(noise) & (outside == 0) & ~constant))

    code[noisy] = PixelCode.NOISY
    code[hot] = PixelCode.HOT
    code[dead] = PixelCode.DEAD
    code[~judged] = PixelCode.FEW_SAMPLES
    statistics = {
        "noise_median_adc": median,
        "noise_spread_adc": spread,
        "noisy_threshold_adc": noisy_threshold,
        "occupancy_pooled": p_pool,
        "occupancy_gaussian_tail": p_floor,
        "occupancy_reference": p_ref,
        "dead_neighbour_noise_adc": settings.dead_neighbour_fraction * chip_noise,
        "n_judged": int(judged.sum()),
    }
    return code, statistics
