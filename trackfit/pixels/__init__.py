"""Pixel pedestals, noise and bad pixels measured from the data (``docs/pixel-map-format.md``).

What to use when
----------------
* :func:`measure_pixel_map` - one or more raw event files of a chip (pedestal runs and/or ordinary track runs) to a
  :class:`~trackfit.io.pixelmap.PixelMap`; also ``trackfit pixel-map RAW... -o MAP.h5``.
* :class:`PixelMapSettings` - how noise samples are chosen and how pixels are judged; TOML in and out.
* :func:`~trackfit.io.pixelmap.write_pixel_map` / :func:`~trackfit.io.pixelmap.read_pixel_map` - the map file;
  ``ReconConfig(pixel_map="map.h5")`` applies it in the reconstruction.

Methods: ``docs/methods.md`` §10.
"""

from ..io.pixelmap import CODE_DOCS, MASKED_CODES, PixelCode, PixelMap, read_pixel_map, write_pixel_map
from .measure import measure_pixel_map
from .settings import PixelMapSettings

__all__ = ["measure_pixel_map", "PixelMapSettings", "PixelMap", "PixelCode", "CODE_DOCS", "MASKED_CODES",
           "read_pixel_map", "write_pixel_map"]
