"""Which pixels of one event form its main cluster: for event displays (``trackfit show``) and for checking a
reconstruction by eye.

The reconstruction kernel finds the main cluster inside its compiled loop and keeps only its size; this module
labels every pixel of one event the same way (pixels above ``threshold_adc`` that are not bad, 6-neighbour connected
components of the hexagonal grid, the cluster with the largest summed signal wins, ties go to the cluster whose
first pixel in row order comes first), so a display can mark the pixels that the reconstruction ignored. It works
one event at a time with ``scipy.ndimage.label`` on the ROI sheared into axial coordinates, where the hexagonal
neighbours become an ordinary image neighbourhood.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from ..events import Event
from .config import ReconConfig

__all__ = ["EventClusters", "event_clusters", "event_as_reconstructed", "label_clusters"]

#: 6-neighbour structure in axial coordinates (q, r): neighbours (q +- 1, r), (q, r +- 1), (q - 1, r + 1),
#: (q + 1, r - 1); indexed [dr + 1, dq + 1]
_HEX_NEIGHBOURS = np.array([[0, 1, 1], [1, 1, 1], [1, 1, 0]], dtype=bool)


@dataclass(frozen=True)
class EventClusters:
    """Cluster labels of the pixels of one event.

    Attributes
    ----------
    labels : ndarray of int, shape (n_roi_pixels,)
        Per ROI pixel, in the event's pixel order: 0 for pixels that take no part (at or below the threshold, or
        bad), else the number of its cluster (1 ... n_clusters).
    main : int
        Label of the main cluster (0 when no pixel takes part).
    """

    labels: np.ndarray
    main: int

    @property
    def n_clusters(self) -> int:
        return int(self.labels.max(initial=0))

    @property
    def in_main(self) -> np.ndarray:
        """True for the pixels of the main cluster (the ones the reconstruction uses)."""
        return (self.labels == self.main) & (self.main > 0)

    @property
    def outside_main(self) -> np.ndarray:
        """True for pixels above the threshold that belong to another cluster (ignored by the reconstruction)."""
        return (self.labels > 0) & ~self.in_main


def event_as_reconstructed(event: Event, config: ReconConfig | None = None, *,
                           pedestal_subtracted: bool = True) -> tuple[Event, np.ndarray, np.ndarray]:
    """The pixels of one event as the reconstruction sees them, for displays.

    Parameters
    ----------
    event : Event
    config : ReconConfig, optional
        Its ``bad_pixels``, ``threshold_adc`` and pixel map (``pixel_map``, ``threshold_noise_rms``) are used.
    pedestal_subtracted : bool
        Whether the event's file is pedestal-subtracted (``reader.pedestal_subtracted``); when it is not, the
        pedestals of the config's pixel map are subtracted (rounded half to even, as the reconstruction does).

    Returns
    -------
    (Event, ndarray of bool, ndarray of float64)
        The event with the signal the reconstruction uses, the ROI pixels it ignores (bad pixels of the config and
        masked pixels of the map), and the threshold of each ROI pixel in ADC counts (a pixel takes part when its
        signal is above it).

    Raises
    ------
    ValueError
        The file is not pedestal-subtracted and the config names no pixel map.
    """
    import dataclasses

    config = config or ReconConfig()
    c0, r0, nc, nr = (int(v) for v in event.roi)
    rows, cols = np.arange(r0, r0 + nr), np.arange(c0, c0 + nc)
    ignored = np.zeros((nr, nc), dtype=bool)
    threshold = np.full((nr, nc), float(math.floor(config.threshold_adc)))
    if config.bad_pixels:
        bad = config.bad_pixel_map(event.grid).reshape(event.grid.n_rows, event.grid.n_columns).astype(bool)
        ignored |= bad[np.ix_(rows, cols)]
    signal = np.asarray(event.signal)
    if config.pixel_map:
        from ..io.pixelmap import read_pixel_map

        pixel_map = read_pixel_map(config.pixel_map)
        pixel_map.check_grid(event.grid, f"event {event.index}")
        ignored |= pixel_map.masked[np.ix_(rows, cols)]
        if config.threshold_noise_rms > 0:
            threshold = np.floor(config.threshold_noise_rms * pixel_map.noise_for_threshold()[np.ix_(rows, cols)])
        if not pedestal_subtracted:
            pedestal = pixel_map.pedestal_for_subtraction()[np.ix_(rows, cols)].ravel()
            signal = np.clip(np.rint(signal - pedestal), -32768, 32767).astype(np.int16)
    elif not pedestal_subtracted:
        raise ValueError(f"event {event.index} holds raw ADC values (its file is not pedestal-subtracted): give a "
                         "pixel map with the pedestals (ReconConfig.pixel_map, or --pixel-map on the command line)")
    return dataclasses.replace(event, signal=signal), ignored.ravel(), threshold.ravel()


def event_clusters(event: Event, config: ReconConfig | None = None, *,
                   pedestal_subtracted: bool = True) -> EventClusters:
    """Label the pixels of one event as the reconstruction sees them.

    Parameters
    ----------
    event : Event
        From ``reader[i]`` or ``batch.event(i)``.
    config : ReconConfig, optional
        Its ``threshold_adc``, ``bad_pixels`` and pixel map are used (default ``ReconConfig()``).
    pedestal_subtracted : bool
        Whether the event's file is pedestal-subtracted (see :func:`event_as_reconstructed`).

    Returns
    -------
    EventClusters

    Examples
    --------
    >>> import numpy as np
    >>> from trackfit import EventBatch, HexGrid
    >>> image = np.zeros((3, 6), np.int16); image[1, :2] = [50, 60]; image[1, 4] = 200
    >>> event = EventBatch.from_images([image], [(10, 10)], grid=HexGrid()).event(0)
    >>> clusters = event_clusters(event)
    >>> clusters.n_clusters, int(clusters.in_main.sum()), int(clusters.outside_main.sum())
    (2, 1, 2)
    """
    return label_clusters(*event_as_reconstructed(event, config, pedestal_subtracted=pedestal_subtracted))


def label_clusters(event: Event, ignored: np.ndarray, threshold: np.ndarray) -> EventClusters:
    """:func:`event_clusters` of an event already as the reconstruction sees it (the three outputs of
    :func:`event_as_reconstructed`), for a caller that also needs them."""
    c0, r0, nc, nr = (int(v) for v in event.roi)
    labels = np.zeros(nc * nr, dtype=np.int64)
    if nc * nr == 0:
        return EventClusters(labels=labels, main=0)
    image = np.asarray(event.signal).reshape(nr, nc)
    hit = (image > threshold.reshape(nr, nc)) & ~ignored.reshape(nr, nc)
    if not hit.any():
        return EventClusters(labels=labels, main=0)
    rows = np.arange(r0, r0 + nr)
    q_first = event.grid.to_axial(np.full(nr, c0), rows)[0]
    shift = q_first - q_first.min()
    sheared = np.zeros((nr, nc + int(shift.max())), dtype=bool)
    rr, cc = np.nonzero(hit)
    sheared[rr, cc + shift[rr]] = True
    sheared_labels, n_clusters = ndimage.label(sheared, structure=_HEX_NEIGHBOURS)
    pixel_labels = sheared_labels[rr, cc + shift[rr]]
    charge = np.bincount(pixel_labels, weights=image[rr, cc].astype(np.float64), minlength=n_clusters + 1)[1:]
    first_pixel = np.full(n_clusters, np.iinfo(np.int64).max)
    np.minimum.at(first_pixel, pixel_labels - 1, rr * nc + cc)
    main = int(np.lexsort((first_pixel, -charge))[0]) + 1
    labels[rr * nc + cc] = pixel_labels
    return EventClusters(labels=labels, main=main)
