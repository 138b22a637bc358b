"""Pixel maps: per-pixel pedestal, noise, occupancy and a bad-pixel code of one chip (``docs/pixel-map-format.md``).

:class:`PixelMap` is the in-memory form; :func:`write_pixel_map` and :func:`read_pixel_map` the HDF5 file
(``trackfit_format = "pixel-map"``, format version 1). The map is measured from raw event files by
:func:`trackfit.pixels.measure_pixel_map` (``trackfit pixel-map``) and used by the reconstruction
(``ReconConfig.pixel_map``): pedestal subtraction of raw files that are not pedestal-subtracted, masking of the bad
pixels, and optionally a threshold of k times each pixel's own noise.

Every array is chip-sized and indexed ``[row, column]`` (``HexGrid.shape``).
"""

from __future__ import annotations

import enum
from dataclasses import dataclass, field
from pathlib import Path

import h5py
import numpy as np

from ..hexgrid import HexGrid
from ._partial import PartialFileWriter
from .errors import FileFormatError
from .fingerprint import crc32
from .kinds import open_kind
from .structure import CheckedFile, grid_from_attributes

__all__ = ["PixelMap", "PixelCode", "SourceRun", "PixelMapFormatError", "PixelMapMismatchError", "read_pixel_map",
           "write_pixel_map", "CODE_DOCS", "MASKED_CODES", "MAP_ARRAYS", "FORMAT_NAME", "FORMAT_VERSION"]

FORMAT_NAME = "pixel-map"
FORMAT_VERSION = 1


class PixelCode(enum.IntEnum):
    """Bad-pixel code of the ``code`` array (one value per pixel; :data:`CODE_DOCS` says what each means)."""

    OK = 0
    HOT = 1
    DEAD = 2
    NOISY = 3
    FEW_SAMPLES = 4


#: what each code means and how it is decided (the measurement settings are named in ``docs/pixel-map-format.md``)
CODE_DOCS = {
    PixelCode.OK: "judged and usable",
    PixelCode.HOT: "above threshold (occupancy_noise_rms x its noise) in significantly more samples than the "
                   "chip's reference occupancy: binomial tail probability below hot_p_value",
    PixelCode.DEAD: "every sample has the same value (zero noise, zero occupancy) while its neighbours are alive "
                    "(their median noise >= dead_neighbour_fraction x the chip's median noise)",
    PixelCode.NOISY: "noise above noisy_spread_rms robust standard deviations over the chip's median noise, with "
                     "the excess over the median at least noisy_significance times its own uncertainty",
    PixelCode.FEW_SAMPLES: "fewer than min_samples noise samples: not judged (not a flag of a bad pixel); its "
                           "estimates, where there are any, carry their large uncertainties",
}

#: codes the reconstruction masks
MASKED_CODES = (PixelCode.HOT, PixelCode.DEAD, PixelCode.NOISY)

#: chip-sized arrays of the ``/pixels`` group -> dtype
MAP_ARRAYS = {
    "pedestal_adc": np.dtype(np.float32),
    "pedestal_error_adc": np.dtype(np.float32),
    "noise_adc": np.dtype(np.float32),
    "noise_error_adc": np.dtype(np.float32),
    "occupancy": np.dtype(np.float32),
    "n_samples": np.dtype(np.int64),
    "n_above": np.dtype(np.int64),
    "code": np.dtype(np.uint8),
}

_SOURCE_FIELDS = ("name", "fingerprint", "n_events", "trigger_mode", "pedestal_subtracted")


class PixelMapFormatError(FileFormatError):
    """A pixel-map file that does not follow the format; names the file and the dataset."""


class PixelMapMismatchError(ValueError):
    """A pixel map used with a raw file (or batch) of another chip; the message lists what differs."""


@dataclass(frozen=True)
class SourceRun:
    """One raw file a map was measured from."""

    name: str
    fingerprint: str
    n_events: int
    trigger_mode: str
    pedestal_subtracted: bool


def _describe_grid(grid: HexGrid) -> str:
    return (f"{grid.n_columns} columns x {grid.n_rows} rows, pitch {grid.pitch_mm:g} mm, "
            f"shifted rows {grid.shifted_rows}")


@dataclass(frozen=True, kw_only=True, eq=False)
class PixelMap:
    """Per-pixel pedestal, noise, occupancy and bad-pixel code of a chip.

    Parameters
    ----------
    grid : HexGrid
        The chip; every array has shape ``grid.shape`` = ``(n_rows, n_columns)``.
    pedestal_adc, pedestal_error_adc : ndarray of float32
        Pedestal (median of the noise samples) and its standard error, ADC counts; NaN where never sampled.
        Zero-centred for pedestal-subtracted inputs (then it is the residual offset).
    noise_adc, noise_error_adc : ndarray of float32
        Noise (1.4826 x median absolute deviation) and its standard error, ADC counts rms; NaN where never sampled.
    occupancy : ndarray of float32
        Fraction of the pixel's samples above its pedestal + ``occupancy_noise_rms`` x its noise; NaN where never
        sampled.
    n_samples, n_above : ndarray of int64
        Noise samples of each pixel and how many of them were above that threshold.
    code : ndarray of uint8
        :class:`PixelCode` of each pixel.
    settings : dict
        Measurement settings (``trackfit.pixels.PixelMapSettings`` as a flat dict).
    statistics : dict
        Chip-level numbers the codes were decided with (median noise, reference occupancy, ...).
    sources : tuple of SourceRun
        The raw files the map was measured from.
    path : str, optional
        File the map was read from (not part of its content).
    """

    grid: HexGrid
    pedestal_adc: np.ndarray
    pedestal_error_adc: np.ndarray
    noise_adc: np.ndarray
    noise_error_adc: np.ndarray
    occupancy: np.ndarray
    n_samples: np.ndarray
    n_above: np.ndarray
    code: np.ndarray
    settings: dict = field(default_factory=dict)
    statistics: dict = field(default_factory=dict)
    sources: tuple = ()
    path: str | None = None

    def __post_init__(self):
        if not isinstance(self.grid, HexGrid):
            raise TypeError(f"'grid' must be a HexGrid (got {type(self.grid).__name__})")
        for name, dtype in MAP_ARRAYS.items():
            arr = np.asarray(getattr(self, name))
            if arr.shape != self.grid.shape:
                raise ValueError(f"pixel map array '{name}' must have the chip's shape (n_rows, n_columns) = "
                                 f"{self.grid.shape} (got {arr.shape})")
            arr = np.ascontiguousarray(arr, dtype=dtype)
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)
        unknown = np.setdiff1d(np.unique(self.code), [int(c) for c in PixelCode])
        if len(unknown):
            raise ValueError(f"pixel map 'code' holds unknown values {unknown.tolist()}; known codes are "
                             f"{ {c.name: int(c) for c in PixelCode} }")
        object.__setattr__(self, "sources", tuple(s if isinstance(s, SourceRun) else SourceRun(**s)
                                                  for s in self.sources))
        object.__setattr__(self, "settings", dict(self.settings))
        object.__setattr__(self, "statistics", dict(self.statistics))

    # ------------------------------------------------------------------ identity
    @property
    def fingerprint(self) -> str:
        """CRC-32 of the arrays (little-endian, in :data:`MAP_ARRAYS` order): ``"crc32:<8 hex digits>"``."""
        crc = 0
        for name, dtype in MAP_ARRAYS.items():
            crc = crc32(np.ascontiguousarray(getattr(self, name), dtype=dtype.newbyteorder("<")), crc)
        return f"crc32:{crc:08x}"

    # ------------------------------------------------------------------ derived
    @property
    def masked(self) -> np.ndarray:
        """Boolean ``[row, column]`` array of the pixels the reconstruction ignores (codes in :data:`MASKED_CODES`)."""
        return np.isin(self.code, [int(c) for c in MASKED_CODES])

    @property
    def judged(self) -> np.ndarray:
        """Pixels with enough samples to be judged (code other than ``FEW_SAMPLES``)."""
        return self.code != PixelCode.FEW_SAMPLES

    def counts(self) -> dict[str, int]:
        """Number of pixels of each code, by code name."""
        values = np.bincount(self.code.ravel(), minlength=len(PixelCode))
        return {c.name: int(values[int(c)]) for c in PixelCode}

    def _chip_median(self, values) -> float:
        ok = (self.code == PixelCode.OK) & np.isfinite(values)
        if not ok.any():
            ok = np.isfinite(values)
        return float(np.median(values[ok])) if ok.any() else 0.0

    def pedestal_for_subtraction(self) -> np.ndarray:
        """Pedestal of every pixel as used by the reconstruction, float64 ``[row, column]``.

        The pixel's own estimate wherever it was sampled at all; the median over the chip's ``OK`` pixels where it
        was never sampled.
        """
        pedestal = self.pedestal_adc.astype(np.float64)
        return np.where(np.isfinite(pedestal), pedestal, self._chip_median(pedestal))

    def noise_for_threshold(self) -> np.ndarray:
        """Noise of every pixel for per-pixel thresholds, float64 ``[row, column]``.

        The pixel's own estimate where it was judged (enough samples); the median noise of the ``OK`` pixels for
        ``FEW_SAMPLES`` pixels and wherever the estimate is missing.
        """
        noise = self.noise_adc.astype(np.float64)
        use_own = self.judged & np.isfinite(noise)
        return np.where(use_own, noise, self._chip_median(noise))

    def check_grid(self, grid: HexGrid, what: str = "the data") -> None:
        """Raise :class:`PixelMapMismatchError` when ``grid`` is not the map's chip, listing what differs."""
        if grid == self.grid:
            return
        mine, theirs = self.grid.to_dict(), grid.to_dict()
        differ = [f"{key} {mine[key]!r} (map) vs {theirs[key]!r}" for key in mine if mine[key] != theirs[key]]
        name = f"pixel map '{self.path}'" if self.path else "the pixel map"
        raise PixelMapMismatchError(f"{name} was measured on another chip than {what}: {', '.join(differ)} "
                                    f"(map: {_describe_grid(self.grid)}; {what}: {_describe_grid(grid)})")

    # ------------------------------------------------------------------ summaries
    def summary(self) -> dict:
        """Counts of each code and the distributions of noise, pedestal and samples (plain numbers)."""
        judged = self.judged & np.isfinite(self.noise_adc)
        ok = (self.code == PixelCode.OK) & np.isfinite(self.noise_adc)

        def quantiles(values):
            values = values[np.isfinite(values)]
            if not len(values):
                return [float("nan")] * 3
            return [float(v) for v in np.quantile(values, [0.05, 0.5, 0.95])]

        noise_ok = self.noise_adc[ok].astype(np.float64)
        spread = 1.482602 * float(np.median(np.abs(noise_ok - np.median(noise_ok)))) if len(noise_ok) else np.nan
        return {
            "n_pixels": int(self.grid.n_pixels),
            "codes": self.counts(),
            "n_judged": int(judged.sum()),
            "n_never_sampled": int(np.count_nonzero(self.n_samples == 0)),
            "noise_adc_quantiles_5_50_95": quantiles(self.noise_adc[ok]),
            "noise_adc_robust_spread": spread,
            "pedestal_adc_quantiles_5_50_95": quantiles(self.pedestal_adc[ok]),
            "samples_quantiles_5_50_95": quantiles(self.n_samples.astype(np.float64).ravel()),
            "statistics": dict(self.statistics),
        }

    def summary_text(self) -> str:
        """A short text summary: codes, noise and pedestal distributions, samples, sources."""
        s = self.summary()
        codes = ", ".join(f"{name.lower().replace('_', ' ')} {n}" for name, n in s["codes"].items())
        n5, n50, n95 = s["noise_adc_quantiles_5_50_95"]
        p5, p50, p95 = s["pedestal_adc_quantiles_5_50_95"]
        m5, m50, m95 = s["samples_quantiles_5_50_95"]
        st = self.statistics
        lines = [
            f"pixel map     {self.path or '(in memory)'}, {self.fingerprint}",
            f"chip          {_describe_grid(self.grid)} ({self.grid.n_pixels} pixels)",
            f"codes         {codes}",
            f"noise         OK pixels: median {n50:.3f} ADC, 5-95 % {n5:.3f}..{n95:.3f} ADC, robust spread "
            f"{s['noise_adc_robust_spread']:.3f} ADC",
            f"pedestal      OK pixels: median {p50:.2f} ADC, 5-95 % {p5:.2f}..{p95:.2f} ADC",
            f"samples       per pixel 5-50-95 %: {m5:.0f} / {m50:.0f} / {m95:.0f}; "
            f"{s['n_never_sampled']} pixels never sampled",
        ]
        if "occupancy_reference" in st:
            lines.append(f"occupancy     reference {st['occupancy_reference']:.3g} above "
                         f"{self.settings.get('occupancy_noise_rms', float('nan')):g} x noise; hot when the "
                         f"binomial tail < {self.settings.get('hot_p_value', float('nan')):g}")
        if "noisy_threshold_adc" in st:
            lines.append(f"noisy above   {st['noisy_threshold_adc']:.3f} ADC")
        for source in self.sources:
            kind = "random triggers" if source.trigger_mode == "random" else "self-triggered"
            sub = "pedestal-subtracted" if source.pedestal_subtracted else "raw ADC"
            lines.append(f"source        {source.name}: {source.n_events} events, {kind}, {sub}")
        for warning in st.get("warnings", []) or []:
            lines.append(f"warning       {warning}")
        return "\n".join(lines)

    def __repr__(self):
        counts = ", ".join(f"{k.lower()}={v}" for k, v in self.counts().items())
        return (f"PixelMap({self.grid.n_columns} x {self.grid.n_rows} pixels, {counts}, "
                f"{len(self.sources)} source run(s), {self.fingerprint})")

    def _repr_html_(self):
        rows = "".join(f"<tr><td><pre style='margin:0'>{line}</pre></td></tr>"
                       for line in self.summary_text().splitlines())
        return f"<table><caption>PixelMap</caption>{rows}</table>"


# ---------------------------------------------------------------------- file
def _attr(value):
    if isinstance(value, list | tuple):
        arr = np.asarray(value)
        return arr.astype(object).astype(h5py.string_dtype()) if arr.dtype.kind == "U" else arr
    return value


class _PixelMapWriter(PartialFileWriter):
    format_name = FORMAT_NAME
    format_version = FORMAT_VERSION


def write_pixel_map(path, pixel_map: PixelMap, *, overwrite: bool = False, created_utc: str | None = None) -> Path:
    """Write a pixel map file (written as a partial file and renamed when complete).

    Returns
    -------
    Path
    """
    writer = _PixelMapWriter()
    f = writer._open(path, overwrite=overwrite, created_utc=created_utc)
    try:
        f.attrs["content_fingerprint"] = pixel_map.fingerprint
        geometry = f.create_group("geometry")
        for key, value in pixel_map.grid.to_dict().items():
            geometry.attrs[key] = value
        pixels = f.create_group("pixels")
        for name in MAP_ARRAYS:
            pixels.create_dataset(name, data=getattr(pixel_map, name), compression="gzip", compression_opts=4,
                                  shuffle=True)
        pixels["code"].attrs["meaning"] = "; ".join(f"{int(c)} = {c.name.lower()}: {CODE_DOCS[c]}"
                                                    for c in PixelCode)
        for group_name, values in (("settings", pixel_map.settings), ("statistics", pixel_map.statistics)):
            group = f.create_group(group_name)
            for key, value in values.items():
                group.attrs[key] = _attr(value)
        sources = f.create_group("sources")
        columns = {name: [getattr(s, name) for s in pixel_map.sources] for name in _SOURCE_FIELDS}
        string = h5py.string_dtype()
        sources.create_dataset("name", data=np.array(columns["name"], dtype=object), dtype=string)
        sources.create_dataset("fingerprint", data=np.array(columns["fingerprint"], dtype=object), dtype=string)
        sources.create_dataset("n_events", data=np.array(columns["n_events"], dtype=np.int64))
        sources.create_dataset("trigger_mode", data=np.array(columns["trigger_mode"], dtype=object), dtype=string)
        sources.create_dataset("pedestal_subtracted", data=np.array(columns["pedestal_subtracted"], dtype=bool))
    except BaseException as err:
        writer.fail(err)
    return writer.close()


def read_pixel_map(path, *, allow_external: bool = False) -> PixelMap:
    """Read and check a pixel map file.

    ``allow_external=True`` accepts data stored in other files (external links, external storage, virtual
    datasets), refused by default.

    Raises
    ------
    FileNotFoundError
        No such file.
    PixelMapFormatError
        Not a regular file, not an HDF5 file, another kind of trackfit file, an unknown format version, data in
        other files, absurd chip geometry, a missing or misshapen dataset, an attribute of the wrong type, an
        unknown code, or content that no longer matches the fingerprint written with it.
    """
    path = Path(path)
    f, attrs = open_kind(path, FORMAT_NAME, what="pixel map", error=PixelMapFormatError, versions=(FORMAT_VERSION,),
                         allow_external=allow_external)
    with f:
        checked = CheckedFile(f, path, PixelMapFormatError, allow_external=allow_external)
        checked.group("/geometry")
        grid = grid_from_attributes(checked.attributes("/geometry"), checked.failer("/geometry"))
        arrays = {}
        for name, dtype in MAP_ARRAYS.items():
            ds = checked.dataset(f"/pixels/{name}")
            if ds.shape != grid.shape:
                checked.fail(f"expected the chip's shape (n_rows, n_columns) = {grid.shape}, found {ds.shape}",
                             ds.name)
            checked.dataset(ds.name, dtype=dtype)
            arrays[name] = checked.read(ds)
        settings = checked.attributes("/settings") if checked.group("/settings", required=False) else {}
        statistics = checked.attributes("/statistics") if checked.group("/statistics", required=False) else {}
        sources = []
        if checked.group("/sources", required=False) is not None:
            columns = {}
            for name, kinds in (("name", "SO"), ("fingerprint", "SO"), ("n_events", "iu"), ("trigger_mode", "SO"),
                                ("pedestal_subtracted", "b")):
                ds = checked.dataset(f"/sources/{name}", ndim=1, max_size=1_000_000)
                if ds.dtype.kind not in kinds or (kinds == "SO" and h5py.check_string_dtype(ds.dtype) is None):
                    checked.fail(f"expected {'text' if kinds == 'SO' else 'integers' if kinds == 'iu' else 'booleans'}"
                                 f", found dtype {ds.dtype}", ds.name)
                with checked.guard(ds.name):
                    columns[name] = ds.asstr()[()] if kinds == "SO" else ds[()]
            lengths = {len(v) for v in columns.values()}
            if len(lengths) != 1:
                checked.fail(f"the source-run lists differ in length "
                             f"({ {k: len(v) for k, v in columns.items()} })", "/sources")
            sources = [SourceRun(name=str(columns["name"][i]), fingerprint=str(columns["fingerprint"][i]),
                                 n_events=int(columns["n_events"][i]), trigger_mode=str(columns["trigger_mode"][i]),
                                 pedestal_subtracted=bool(columns["pedestal_subtracted"][i]))
                       for i in range(lengths.pop())]
        stored = attrs.get("content_fingerprint")
    try:
        pixel_map = PixelMap(grid=grid, **arrays, settings=settings, statistics=statistics, sources=tuple(sources),
                             path=str(path))
    except ValueError as err:
        raise PixelMapFormatError(path, str(err), dataset="/pixels/code") from None
    if stored != pixel_map.fingerprint:
        raise PixelMapFormatError(path, f"the arrays do not match the content fingerprint written with them "
                                  f"({stored!r} stored, {pixel_map.fingerprint!r} computed): the file was changed "
                                  "or damaged after it was written", dataset="/pixels")
    return pixel_map
