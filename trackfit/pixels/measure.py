"""Measure a pixel map from raw event files, streaming (``trackfit pixel-map``).

1. When the files are not pedestal-subtracted, a first pass keeps the first ``reference_samples`` values of every
   pixel; their 5 % quantile plus 1.645 times the chip's typical noise is a coarse pedestal that centres the
   histograms of the second pass (robust to track charge, which always lies above the pedestal).
2. The second pass histograms the noise samples of every pixel relative to that reference: in pedestal runs
   (``trigger_mode = "random"``) every pixel of every event; in self-triggered runs the pixels farther than
   ``track_clearance_pixels`` from every track pixel (the ROI margin), where a track pixel exceeds the reference by
   ``track_seed_noise_rms`` times the chip's typical noise and has a neighbour that does too.
3. Median and MAD of each histogram give the pedestal and the noise (1.4826 x MAD x n / (n - 0.8)) with their
   standard errors (:mod:`trackfit.pixels.robust`); the samples above ``occupancy_noise_rms`` times the pixel's
   noise give its occupancy; :mod:`trackfit.pixels.classify` assigns the codes.

Memory is bounded by the chip, not the files: a histogram of ``histogram_bins`` 32-bit counts per pixel (40 MB for
the default 300 x 352 chip), plus one batch of events.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from ..io.fingerprint import RawFingerprint
from ..io.pixelmap import PixelMap, PixelMapMismatchError, SourceRun
from ..io.raw import open_raw
from . import _kernels
from .classify import classify_pixels
from .robust import (
    MAD_TO_SIGMA,
    MEDIAN_STANDARD_ERROR,
    SIGMA_STANDARD_ERROR,
    clipped_noise,
    count_above,
    histogram_median_mad,
    histogram_quantile,
    lower_quantile,
    small_sample_factor,
)
from .settings import PixelMapSettings

__all__ = ["measure_pixel_map", "BATCH_PIXELS"]

#: ROI pixels per batch read from a file (events per batch follow from the file's mean ROI size)
BATCH_PIXELS = 4_000_000
_BIG = np.iinfo(np.int32).max


def _batch_size(reader, batch_pixels):
    if len(reader) == 0:
        return 1
    mean_area = max(1.0, reader.n_pixels_total / len(reader))
    return int(min(65_536, max(1, batch_pixels // mean_area)))


class _Inputs:
    """The raw files of one measurement: checked to share a chip and a pedestal convention."""

    def __init__(self, paths):
        self.paths = [Path(p) for p in paths]
        if not self.paths:
            raise ValueError("give at least one raw event file")
        self.n_events, self.trigger_modes, self.subtracted = [], [], []
        self.grid = None
        for path in self.paths:
            with open_raw(path, strict=False) as reader:
                if self.grid is None:
                    self.grid, first = reader.grid, path
                elif reader.grid != self.grid:
                    a, b = self.grid.to_dict(), reader.grid.to_dict()
                    differ = ", ".join(f"{key} {a[key]!r} vs {b[key]!r}" for key in a if a[key] != b[key])
                    raise PixelMapMismatchError(f"raw files '{first}' and '{path}' come from different chips "
                                                f"({differ}); a pixel map describes one chip")
                self.n_events.append(len(reader))
                self.trigger_modes.append(reader.trigger_mode)
                self.subtracted.append(reader.pedestal_subtracted)
        if len(set(self.subtracted)) > 1:
            mixed = ", ".join(f"'{p}': {'subtracted' if s else 'not subtracted'}"
                              for p, s in zip(self.paths, self.subtracted, strict=True))
            raise ValueError(f"the raw files mix pedestal-subtracted and raw ADC signal ({mixed}); measure a map "
                             "from files of one kind")
        self.pedestal_subtracted = self.subtracted[0]

    def first_batch(self, batch_pixels):
        """The first batch of the first file (a look at the typical noise before the histograms are set up)."""
        with open_raw(self.paths[0], strict=False) as reader:
            return reader.read_batch(0, min(len(reader), _batch_size(reader, batch_pixels)), with_truth=False)

    def batches(self, batch_pixels, progress):
        """Yield (file index, batch) over every file, in order."""
        for index, path in enumerate(self.paths):
            with open_raw(path, strict=False) as reader:
                size = _batch_size(reader, batch_pixels)
                for batch in reader.iter_batches(size, with_truth=False, prefetch=True):
                    yield index, batch
                    progress(len(batch))


def _progress(progress, total, label):
    if callable(progress):
        return progress, lambda: None
    if not progress:
        return (lambda n: None), (lambda: None)
    from tqdm.auto import tqdm

    bar = tqdm(total=total, unit="ev", unit_scale=True, desc=label, dynamic_ncols=True)
    return bar.update, bar.close


def measure_pixel_map(raw_paths, settings: PixelMapSettings | None = None, *, progress=False,
                      batch_pixels: int = BATCH_PIXELS) -> PixelMap:
    """Pedestal, noise, occupancy and bad-pixel code of every pixel, from one or more raw files of one chip.

    Parameters
    ----------
    raw_paths : path or sequence of paths
        Raw event files (``docs/raw-format.md``) of the same chip, all pedestal-subtracted or all not. Pedestal
        runs (``trigger_mode = "random"``) and self-triggered track runs may be mixed.
    settings : PixelMapSettings, optional
    progress : bool or callable
        A progress bar (tqdm), or ``progress(n_events)`` called after each batch.
    batch_pixels : int
        ROI pixels per batch read (memory of one batch: 2 bytes each).

    Returns
    -------
    PixelMap
        With ``sources`` (name, content fingerprint, events, trigger mode, pedestal convention of each file),
        ``settings`` and the chip-level ``statistics`` the codes were decided with.

    Raises
    ------
    PixelMapMismatchError
        The files come from different chips.
    ValueError
        They mix pedestal-subtracted and raw ADC signal; or a file is malformed (see :func:`trackfit.open_raw`).

    References
    ----------
    ``docs/methods.md`` §10 (median and MAD, their standard errors, the binomial test of hot pixels).
    """
    settings = settings or PixelMapSettings()
    if isinstance(raw_paths, str | Path):
        raw_paths = [raw_paths]
    inputs = _Inputs(raw_paths)
    grid = inputs.grid
    n_pixels = grid.n_pixels
    passes = 1 if inputs.pedestal_subtracted else 2
    update, close = _progress(progress, passes * sum(inputs.n_events), "pixel map")
    try:
        # ---- reference: 0 for subtracted files, else a coarse pedestal from the first samples of each pixel
        if inputs.pedestal_subtracted:
            reference = np.zeros(n_pixels)
            chip_noise = clipped_noise(inputs.first_batch(batch_pixels).signal)
        else:
            store = np.zeros((n_pixels, settings.reference_samples), np.int16)
            count = np.zeros(n_pixels, np.int64)
            for _, batch in inputs.batches(batch_pixels, update):
                _kernels.collect_reference_samples(0, len(batch), batch.roi, batch.start, batch.signal, batch.bad,
                                                   grid.n_columns, grid.n_rows, store, count)
            low = lower_quantile(store, count, 0.05)
            sampled = np.isfinite(low)
            stored = np.minimum(count, settings.reference_samples)
            kept = (np.arange(settings.reference_samples)[None, :] < stored[:, None]) & sampled[:, None]
            chip_noise = clipped_noise((store - np.where(sampled, low, 0.0)[:, None])[kept])
            del store
            # the 5 % quantile of Gaussian noise lies 1.645 sigma below its median (scipy.stats.norm.ppf(0.05))
            reference = low + 1.6449 * chip_noise
            reference[~sampled] = np.median(reference[sampled]) if sampled.any() else 0.0
        reference = np.ascontiguousarray(np.rint(reference), dtype=np.int32)
        bin_width = max(1, int(math.floor(chip_noise / 2.0)))
        n_regular = settings.histogram_bins - 2
        first_edge = -(n_regular // 2) * bin_width
        seed_threshold = int(math.floor(settings.track_seed_noise_rms * chip_noise))

        # ---- histograms of the noise samples
        hist = np.zeros((n_pixels, settings.histogram_bins), np.uint32)
        low = np.full(n_pixels, _BIG, np.int32)
        high = np.full(n_pixels, -_BIG, np.int32)
        near_track = np.zeros(n_pixels, np.int64)
        fingerprints = [RawFingerprint() for _ in inputs.paths]
        parity = 1 if grid.shifted_rows == "odd" else 0
        for index, batch in inputs.batches(batch_pixels, update):
            fingerprints[index].update(batch)
            clearance = settings.track_clearance_pixels if inputs.trigger_modes[index] == "self" else -1
            _kernels.accumulate_samples(0, len(batch), batch.roi, batch.start, batch.signal, batch.bad, reference,
                                        grid.n_columns, grid.n_rows, parity, seed_threshold, clearance, first_edge,
                                        bin_width, hist, low, high, near_track)
    finally:
        close()

    # ---- estimates
    n, median_rel, mad, outside = histogram_median_mad(hist, first_edge, bin_width)
    constant = (n > 0) & (low == high)
    pedestal = np.where(constant, low, reference + median_rel)
    noise = np.where(constant, 0.0, MAD_TO_SIGMA * mad * small_sample_factor(n))
    root_n = np.sqrt(np.where(n > 0, n, np.nan))
    pedestal_error = MEDIAN_STANDARD_ERROR * noise / root_n
    noise_error = SIGMA_STANDARD_ERROR * noise / root_n
    lower, _ = histogram_quantile(hist, first_edge, bin_width, 0.25)
    upper, upper_outside = histogram_quantile(hist, first_edge, bin_width, 0.75)
    # the occupancy threshold takes the narrower of the noise and the lower half-width: spikes of a hot pixel
    # widen only the upper half of its distribution (the lower quartile of Gaussian noise is 0.6745 sigma below)
    lower_width = (median_rel - lower) / 0.6745
    occupancy_noise = np.where(constant, 0.0, np.fmin(noise, lower_width))
    threshold_rel = pedestal + settings.occupancy_noise_rms * occupancy_noise - reference
    n_above = count_above(hist, first_edge, bin_width, threshold_rel)
    # a pixel whose values mostly lie above the range fires in most samples: count those (a lower bound)
    n_above = np.where(outside > 0, hist[:, -1], n_above)
    # a threshold beyond the histogram range (noise above about range / occupancy_noise_rms) cannot be counted:
    # every value above the range is counted instead (an upper bound) and the pixel is judged by its noise only
    occupancy_known = threshold_rel < first_edge - 0.5 + n_regular * bin_width
    with np.errstate(invalid="ignore", divide="ignore"):
        quartile_ratio = np.where(upper_outside > 0, np.inf, (upper - median_rel) / (median_rel - lower))
        occupancy = np.where(n > 0, n_above / np.where(n > 0, n, 1), np.nan)
    shape = grid.shape
    code, statistics = classify_pixels(
        grid, n_samples=n.reshape(shape).astype(np.int64), noise_adc=noise.reshape(shape),
        noise_error_adc=noise_error.reshape(shape), n_above=n_above.reshape(shape), constant=constant.reshape(shape),
        outside=outside.reshape(shape), occupancy_known=occupancy_known.reshape(shape),
        quartile_ratio=quartile_ratio.reshape(shape), settings=settings)
    statistics.update({
        "chip_noise_first_pass_adc": float(chip_noise),
        "track_seed_threshold_adc": seed_threshold,
        "histogram_bin_width_adc": bin_width,
        "histogram_first_edge_adc": first_edge,
        "n_skipped_near_tracks": int(near_track.sum()),
    })
    warnings = []
    judged = n.reshape(shape) >= settings.min_samples
    if judged.any() and np.count_nonzero(constant.reshape(shape) & judged) > 0.5 * judged.sum():
        warnings.append("most judged pixels show one value in every sample: zero-suppressed data? Their noise "
                        "cannot be measured; use a pedestal run or data without zero suppression")
    if np.count_nonzero(~judged) > 0.5 * n_pixels:
        warnings.append(f"{np.count_nonzero(~judged)} of {n_pixels} pixels have fewer than {settings.min_samples} "
                        "samples and are not judged: add a pedestal run or a longer run with a wider beam")
    statistics["warnings"] = warnings
    sources = tuple(SourceRun(name=path.name, fingerprint=fp.hexdigest(), n_events=int(n_events),
                              trigger_mode=mode, pedestal_subtracted=bool(inputs.pedestal_subtracted))
                    for path, fp, n_events, mode in zip(inputs.paths, fingerprints, inputs.n_events,
                                                        inputs.trigger_modes, strict=True))
    nan_where_empty = {"pedestal_adc": pedestal, "pedestal_error_adc": pedestal_error, "noise_adc": noise,
                       "noise_error_adc": noise_error}
    arrays = {name: np.where(n > 0, values, np.nan).reshape(shape) for name, values in nan_where_empty.items()}
    return PixelMap(grid=grid, **arrays, occupancy=occupancy.reshape(shape), n_samples=n.reshape(shape),
                    n_above=n_above.reshape(shape), code=code, settings=settings.to_dict(), statistics=statistics,
                    sources=sources)
