"""Settings of the pixel-map measurement: :class:`PixelMapSettings`, a frozen dataclass, TOML in and out."""

from __future__ import annotations

import math
from dataclasses import dataclass, fields

from .._toml import dumps, parse, read_file

__all__ = ["PixelMapSettings"]


@dataclass(frozen=True, kw_only=True)
class PixelMapSettings:
    """How noise samples are chosen and how pixels are judged (``docs/pixel-map-format.md``, ``docs/methods.md`` §10).

    Parameters
    ----------
    min_samples : int
        Pixels with fewer noise samples are not judged (code ``FEW_SAMPLES``). Default 50.
    track_seed_noise_rms : float
        In self-triggered runs a pixel belongs to a track when it exceeds its reference by this many times the
        chip's typical noise and has a 6-neighbour that does too (isolated pixels, such as the spikes of a hot
        pixel, are not tracks). Default 4.
    track_clearance_pixels : int
        Samples within this many pixel steps of a track pixel are not used (the charge cloud's tails). Default 2.
        Random-trigger runs (pedestal runs) use every pixel of every event.
    occupancy_noise_rms : float
        A sample is "above threshold" when it exceeds the pixel's pedestal by this many times its own noise.
        Default 5.
    hot_p_value : float
        A pixel is hot when the binomial probability of at least its number of samples above threshold, given its
        number of samples and the chip's reference occupancy, is below this. Default 1e-9.
    hot_skew_ratio : float
        A pixel is also hot when the distance from its median to its upper quartile is more than this many times
        the distance to its lower quartile (equal for Gaussian noise): a pixel that fires in so many samples
        that its median and MAD follow the spikes. Default 4.
    noisy_spread_rms : float
        A pixel is noisy when its noise exceeds the median noise of the chip by more than this many robust standard
        deviations of the chip's noise distribution (1.4826 x MAD over the judged pixels) ... Default 8.
    noisy_significance : float
        ... and its excess over the median is at least this many times its own standard error. Default 4.
    dead_neighbour_fraction : float
        A pixel whose samples are all identical is dead when the median noise of its judged neighbours is at least
        this fraction of the chip's median noise. Default 0.5.
    reference_samples : int
        Samples per pixel kept by the first pass over files that are not pedestal-subtracted (coarse pedestal that
        centres the histograms: their 5 % quantile). Default 64.
    histogram_bins : int
        Bins per pixel of the value histograms (two of them collect the values below and above the range).
        Default 96.

    Examples
    --------
    >>> settings = PixelMapSettings(min_samples=100)
    >>> PixelMapSettings.from_toml(settings.to_toml()) == settings
    True
    """

    min_samples: int = 50
    track_seed_noise_rms: float = 4.0
    track_clearance_pixels: int = 2
    occupancy_noise_rms: float = 5.0
    hot_p_value: float = 1e-9
    hot_skew_ratio: float = 4.0
    noisy_spread_rms: float = 8.0
    noisy_significance: float = 4.0
    dead_neighbour_fraction: float = 0.5
    reference_samples: int = 64
    histogram_bins: int = 96

    def __post_init__(self):
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, bool) or not isinstance(value, int | float):
                raise ValueError(f"'{f.name}' must be a number (got {value!r})")
            if f.type == "int" or f.type is int:
                if int(value) != value:
                    raise ValueError(f"'{f.name}' must be an integer (got {value!r})")
                object.__setattr__(self, f.name, int(value))
            else:
                if not math.isfinite(value):
                    raise ValueError(f"'{f.name}' must be finite (got {value!r})")
                object.__setattr__(self, f.name, float(value))
        checks = [
            ("min_samples", self.min_samples >= 1, ">= 1"),
            ("track_seed_noise_rms", self.track_seed_noise_rms > 0, "> 0"),
            ("track_clearance_pixels", self.track_clearance_pixels >= 0, ">= 0"),
            ("occupancy_noise_rms", self.occupancy_noise_rms > 0, "> 0"),
            ("hot_p_value", 0 < self.hot_p_value < 1, "between 0 and 1"),
            ("hot_skew_ratio", self.hot_skew_ratio > 1, "> 1"),
            ("noisy_spread_rms", self.noisy_spread_rms > 0, "> 0"),
            ("noisy_significance", self.noisy_significance >= 0, ">= 0"),
            ("dead_neighbour_fraction", 0 <= self.dead_neighbour_fraction <= 1, "between 0 and 1"),
            ("reference_samples", 8 <= self.reference_samples <= 4096, "between 8 and 4096"),
            ("histogram_bins", 16 <= self.histogram_bins <= 4096, "between 16 and 4096"),
        ]
        for name, ok, requirement in checks:
            if not ok:
                raise ValueError(f"'{name}' must be {requirement} (got {getattr(self, name)!r})")

    @classmethod
    def field_names(cls) -> list[str]:
        return [f.name for f in fields(cls)]

    def to_dict(self) -> dict:
        return {name: getattr(self, name) for name in self.field_names()}

    @classmethod
    def from_dict(cls, values: dict, *, source: str = "settings") -> PixelMapSettings:
        """Build from a dict (keys at the top level or in a ``[pixel_map]`` table); unknown keys are refused."""
        if "pixel_map" in values and isinstance(values["pixel_map"], dict):
            others = sorted(set(values) - {"pixel_map"})
            if others:
                raise ValueError(f"{source}: unknown key(s) {others} beside the [pixel_map] table")
            values = values["pixel_map"]
        unknown = sorted(set(values) - set(cls.field_names()))
        if unknown:
            raise ValueError(f"{source}: unknown key(s) {unknown}; valid keys are {cls.field_names()}")
        try:
            return cls(**values)
        except ValueError as err:
            raise ValueError(f"{source}: {err}") from None

    def to_toml(self) -> str:
        return dumps({"pixel_map": self.to_dict()},
                     header="trackfit pixel-map settings (trackfit.pixels.PixelMapSettings)")

    @classmethod
    def from_toml(cls, text: str, *, source: str = "TOML text") -> PixelMapSettings:
        return cls.from_dict(parse(text, source=source), source=source)

    @classmethod
    def read_toml(cls, path) -> PixelMapSettings:
        values, source = read_file(path, what="settings file")
        return cls.from_dict(values, source=source)
