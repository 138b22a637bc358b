"""Settings of the reconstruction: :class:`ReconConfig`, a frozen dataclass read from and written to TOML.

Change a setting with :func:`dataclasses.replace` (handy when tuning cuts in a notebook)::

    from dataclasses import replace
    from trackfit import ReconConfig

    # the classic two-stage analysis with a start search and second pass of one's own
    config = replace(ReconConfig(), emission_estimator="two-stage", start_search_inner_rms=1.2,
                     second_pass_length_mm=0.04)
    config.write_toml("recon.toml")           # trackfit reconstruct run.h5 -o run_events.h5 --config recon.toml
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, fields, replace
from pathlib import Path

import numpy as np

from .._toml import dumps, parse, read_file
from ..hexgrid import MAX_CHIP_SIDE

__all__ = ["ReconConfig", "SECOND_PASS_CENTRES", "SETTING_RANGES", "RENAMED_SETTINGS", "UNCALIBRATED_COUNTS_PER_KEV",
           "EMISSION_ESTIMATORS", "TWO_STAGE_SETTINGS"]

SECOND_PASS_CENTRES = ("conversion_point", "weighted_centroid")
#: the values of ``emission_estimator`` (trackfit.recon.estimators)
EMISSION_ESTIMATORS = ("two-stage", "adaptive", "skeleton")
#: settings only the two-stage estimate reads (the adaptive one sets them per track from the track size)
TWO_STAGE_SETTINGS = ("start_search_inner_rms", "start_search_outer_rms", "second_pass_length_mm",
                      "second_pass_centre")

#: ADC counts per keV used when neither the settings nor the raw file give a scale: the nominal value of the
#: He/DME design of the simulator presets (gas gain 2000, W = 24 eV, 25 electrons per ADC count), so that such
#: energies are of the right order for that design; tables made with it are marked uncalibrated
UNCALIBRATED_COUNTS_PER_KEV = 3333.3

#: setting names of trackfit 0.1 -> their current names; files using an old name are refused with the new one
RENAMED_SETTINGS = {
    "r_min": "start_search_inner_rms",
    "r_max": "start_search_outer_rms",
    "weight_scale_mm": "second_pass_length_mm",
}
#: one line per setting, written above it by :meth:`ReconConfig.settings_template`
SETTING_NOTES = {
    "threshold_adc": "zero suppression: a pixel takes part when its signal is > threshold_adc (ADC counts); "
                     "about 5 times the pixel noise",
    "min_pixels": "main clusters with fewer pixels get the TOO_FEW_PIXELS status bit (values still computed)",
    "start_search_inner_rms": "two-stage estimate: inner radius of the start-point search, in units of the "
                              "track's rms length sqrt(m2_major_mm2) from the centroid (the adaptive estimate "
                              "sets the start search and the second pass of each track from its size)",
    "start_search_outer_rms": "two-stage estimate: outer radius of the start-point search, same units",
    "second_pass_length_mm": "two-stage estimate: length of the second-pass weights "
                             "exp(-distance / second_pass_length_mm) from the conversion point (mm)",
    "second_pass_centre": 'two-stage estimate: point about which the weighted second moments are taken: '
                          '"conversion_point" or "weighted_centroid"',
    "counts_per_kev": "ADC counts per keV: energy_kev = pulse_height / counts_per_kev; when not set, the raw "
                      "file's /run attribute nominal_counts_per_kev (simulated files), else the energies are "
                      "marked uncalibrated. For measured data, uncomment the line and set your scale (e.g. Fe-55 "
                      "K-alpha peak / 5.895 keV)",
    "saturation_adc": "pixels at or above this signal set the SATURATED status bit (ADC counts)",
    "bad_pixels": "pixels to ignore (hot or dead), as [column, row] pairs, e.g. [[10, 20], [11, 20]]",
    "pixel_map": 'pixel map made by `trackfit pixel-map` (docs/pixel-map-format.md), relative to this file\'s '
                 'folder; "" for none. With a map, pedestals are subtracted from raw files that are not '
                 "pedestal-subtracted, and its hot, dead and noisy pixels are ignored",
    "threshold_noise_rms": "0: every pixel is cut at threshold_adc; > 0 (needs pixel_map): each pixel is cut at "
                           "this many times its own noise from the map",
    "emission_estimator": 'the emission-angle estimate the table offers to the analysis: "adaptive" (per-track '
                          'settings and a head score, adaptive_* columns), "two-stage" (the classic published '
                          'moment analysis, columns emission_rad, conv_x_mm, conv_y_mm, always written) or '
                          '"skeleton" (the centre line of long tracks with scikit-image, skeleton_* columns; slow); '
                          "docs/methods.md section 11",
}

#: accepted range of every numeric setting: (lowest, highest, unit in messages). The settings reach the compiled
#: kernel as machine numbers, so each is checked here, exactly, before any conversion.
SETTING_RANGES: dict[str, tuple[float, float, str]] = {
    # the signal is int16: a threshold above 32767 ADC counts would let no pixel through
    "threshold_adc": (0.0, 32767.0, " ADC counts"),
    # a main cluster has at most as many pixels as the largest chip (hexgrid.MAX_CHIP_SIDE squared)
    "min_pixels": (1, MAX_CHIP_SIDE * MAX_CHIP_SIDE, " pixels"),
    # in units of the track's rms length; no pixel of a track lies 100 rms lengths from its centroid (common
    # practice: the published defaults are 1.5 and 3.5)
    "start_search_inner_rms": (0.0, 100.0, " rms lengths"),
    "start_search_outer_rms": (0.0, 100.0, " rms lengths"),
    # > 0 (checked separately); 1000 mm is far beyond any chip
    "second_pass_length_mm": (0.0, 1000.0, " mm"),
    # wide enough for any readout (the simulator's designs have about 3000); within it energies stay finite and
    # fit the float32 energy_kev column (32767 ADC x 2**30 pixels / 1e-6)
    "counts_per_kev": (1e-6, 1e9, " ADC counts per keV"),
    # an int16 signal reaches at most 32767; 32768 means "never saturated"
    "saturation_adc": (1, 32768, " ADC counts"),
    # per-pixel thresholds are clipped to the int16 range anyway; above 1000 times the noise is a mistake
    "threshold_noise_rms": (0.0, 1000.0, " times the pixel noise"),
}

#: values renamed the same way (setting -> {old value: new value})
RENAMED_VALUES = {"second_pass_centre": {"weighted_barycentre": "weighted_centroid"}}


@dataclass(frozen=True, kw_only=True)
class ReconConfig:
    """Parameters of cleaning and the two-stage moment analysis (``docs/methods.md`` §2).

    Parameters
    ----------
    threshold_adc : float
        Zero suppression: a pixel takes part when its signal is > threshold_adc (ADC counts, >= 0). Default 10:
        5 times a pixel noise of 50 electrons ENC (docs/methods.md §7, from memory) at 25 electrons per ADC count (the
        simulator's readout defaults), the top of the common-practice range of 3 to 5 sigma; set it from the
        pedestal RMS of your chip.
    min_pixels : int
        Main clusters with fewer pixels get the ``TOO_FEW_PIXELS`` status bit (values are still computed).
        Default 6 (common practice: below that the moments of a hexagonal cluster reflect the pixel shape).
    start_search_inner_rms, start_search_outer_rms : float
        Settings of the two-stage estimate (the adaptive estimate chooses its own for each track from its size,
        ``docs/methods.md`` §11). Inner and outer radius of the start-point search, in units of the track's rms
        length: the conversion point is found among start-side pixels at distances between
        ``start_search_inner_rms`` and ``start_search_outer_rms`` times sqrt(m2_major_mm2) from the centroid.
        Defaults 1.5 and 3.5 (from memory of the published method; tune them with the simulator, maximising the
        quality factor mu * sqrt(efficiency)).
    second_pass_length_mm : float
        Two-stage estimate: second-pass weights exp(-distance / second_pass_length_mm) from the conversion point.
        Default 0.05 mm (from memory of the published method; about one pixel pitch).
    second_pass_centre : {"conversion_point", "weighted_centroid"}
        Two-stage estimate: point about which the weighted second moments are taken. Default
        ``"conversion_point"``.
    counts_per_kev : float or None
        Gain: ``energy_kev = pulse_height / counts_per_kev`` (ADC counts per keV, > 0). Default None: taken from
        the raw file's ``/run`` attribute ``nominal_counts_per_kev`` (the simulator writes its design's value,
        gas gain x 1000 / W / electrons per ADC count); a file without one (measured data) is reconstructed with
        the placeholder :data:`UNCALIBRATED_COUNTS_PER_KEV` and its table is marked uncalibrated. The table
        provenance records the value used and its source (``docs/table-format.md``). Set it, or apply a
        calibration (e.g. from an Fe-55 line), for energies in keV of measured data.
    saturation_adc : int
        Pixels at or above this signal set the ``SATURATED`` bit. Default 32767, the largest int16 value; lower it
        to your chip's ADC range minus the pedestal.
    bad_pixels : tuple of (column, row)
        Pixels to ignore (hot or dead). The constructor also accepts a chip-sized boolean array indexed
        ``[row, column]`` (True = bad); it is stored as the list of its pixels, sorted.
    pixel_map : str
        Path of a pixel map (``docs/pixel-map-format.md``, made by ``trackfit pixel-map``); empty for none. With a
        map, raw files that are not pedestal-subtracted get each pixel's pedestal subtracted (rounded to whole
        ADC counts), and its hot, dead and noisy pixels are ignored (together with ``bad_pixels``). In a TOML file
        a relative path is taken relative to the file's folder. The map must come from the same chip as the data.
    threshold_noise_rms : float
        0 (default): every pixel is cut at ``threshold_adc``. > 0 (needs ``pixel_map``): each pixel is hit when its
        signal is > ``threshold_noise_rms`` times its own noise from the map (pixels the map could not judge use
        the chip's median noise).
    emission_estimator : {"two-stage", "adaptive", "skeleton"}
        The emission-angle estimate the table offers to the analysis (``docs/methods.md`` §11). The two-stage
        columns (``emission_rad``, ``conv_x_mm``, ``conv_y_mm``) are always written; ``"adaptive"`` adds the
        ``adaptive_*`` columns (the two-stage analysis with settings scaled by each track's size and a head score
        that also weighs the charge density), ``"skeleton"`` adds those and the ``skeleton_*`` columns (the start
        and first direction of long tracks from their centre line, with scikit-image; about a thousand times
        slower, for the argon design above ~15 keV). Default ``"adaptive"``: the best quality factor measured
        (``docs/methods.md`` §11: 4 % above the two-stage analysis at 5.9 and 8 keV in He/DME, 10 % at 20 keV in
        Ar/DME, equal at 2.7-3.7 keV); ``"two-stage"`` is the classic analysis alone.

    Raises
    ------
    ValueError
        A setting of the wrong type, not finite or outside its range (:data:`SETTING_RANGES`); the message names
        the setting, the range and the value given.

    Examples
    --------
    >>> config = ReconConfig(threshold_adc=15, bad_pixels=[(10, 20)])
    >>> ReconConfig.from_toml(config.to_toml()) == config
    True
    >>> ReconConfig(pixel_map="chip07_map.h5", threshold_noise_rms=5).threshold_noise_rms
    5.0
    """

    threshold_adc: float = 10.0
    min_pixels: int = 6
    start_search_inner_rms: float = 1.5
    start_search_outer_rms: float = 3.5
    second_pass_length_mm: float = 0.05
    second_pass_centre: str = "conversion_point"
    counts_per_kev: float | None = None
    saturation_adc: int = 32767
    bad_pixels: tuple = ()
    pixel_map: str = ""
    threshold_noise_rms: float = 0.0
    emission_estimator: str = "adaptive"

    def __post_init__(self):
        def number(name, value, *, integer=False):
            """The value as a float (int with ``integer``), checked for type, finiteness and its range."""
            low, high, unit = SETTING_RANGES[name]
            kind, low, high = ("an integer", f"{low}", f"{high}") if integer else ("a number", f"{low:g}", f"{high:g}")
            expected = f"'{name}' must be {kind} between {low} and {high}{unit}"
            low, high = SETTING_RANGES[name][:2]
            if isinstance(value, bool | np.bool_) or not isinstance(value, int | float | np.integer | np.floating):
                raise ValueError(f"{expected} (got {value!r})")
            if isinstance(value, float | np.floating):
                if not math.isfinite(value):
                    raise ValueError(f"'{name}' must be finite (got {value!r})")
                if integer and not float(value).is_integer():
                    raise ValueError(f"'{name}' must be an integer (got {value!r})")
            # compare exactly (Python int or float) before converting: 10**400 or 1e20 never reach the kernel
            exact = int(value) if integer or isinstance(value, int | np.integer) else float(value)
            if not low <= exact <= high:
                raise ValueError(f"{expected} (got {value!r})")
            value = int(exact) if integer else float(exact)
            object.__setattr__(self, name, value)
            return value

        number("threshold_adc", self.threshold_adc)
        number("min_pixels", self.min_pixels, integer=True)
        number("start_search_inner_rms", self.start_search_inner_rms)
        if number("start_search_outer_rms", self.start_search_outer_rms) <= self.start_search_inner_rms:
            raise ValueError(f"'start_search_outer_rms' must be > start_search_inner_rms = "
                             f"{self.start_search_inner_rms} (got {self.start_search_outer_rms})")
        if number("second_pass_length_mm", self.second_pass_length_mm) <= 0:
            raise ValueError(f"'second_pass_length_mm' must be > 0 (got {self.second_pass_length_mm})")
        if not isinstance(self.second_pass_centre, str) or self.second_pass_centre not in SECOND_PASS_CENTRES:
            raise ValueError(f"'second_pass_centre' must be one of {SECOND_PASS_CENTRES} "
                             f"(got {self.second_pass_centre!r})")
        if self.counts_per_kev is not None:
            number("counts_per_kev", self.counts_per_kev)
        number("saturation_adc", self.saturation_adc, integer=True)
        object.__setattr__(self, "bad_pixels", self._normalise_bad_pixels(self.bad_pixels))
        if isinstance(self.pixel_map, os.PathLike):
            object.__setattr__(self, "pixel_map", os.fspath(self.pixel_map))
        if not isinstance(self.pixel_map, str):
            raise ValueError(f"'pixel_map' must be the path of a pixel-map file, or empty (got {self.pixel_map!r})")
        number("threshold_noise_rms", self.threshold_noise_rms)
        if not isinstance(self.emission_estimator, str) or self.emission_estimator not in EMISSION_ESTIMATORS:
            raise ValueError(f"'emission_estimator' must be one of {EMISSION_ESTIMATORS} "
                             f"(got {self.emission_estimator!r})")
        if self.threshold_noise_rms > 0 and not self.pixel_map:
            raise ValueError(f"'threshold_noise_rms' = {self.threshold_noise_rms:g} needs a 'pixel_map' with the "
                             "noise of each pixel")

    @staticmethod
    def _normalise_bad_pixels(value) -> tuple:
        arr = np.asarray(value)
        if arr.dtype == bool and arr.ndim == 2:
            rows, columns = np.nonzero(arr)
            pairs = np.column_stack([columns, rows])
        else:
            if arr.size == 0:
                return ()
            if arr.ndim != 2 or arr.shape[1] != 2 or arr.dtype.kind not in "iu":
                raise ValueError("'bad_pixels' must be a list of (column, row) integer pairs or a chip-sized "
                                 f"boolean array indexed [row, column] (got shape {arr.shape}, dtype {arr.dtype})")
            if (arr < 0).any():
                first = arr[arr.min(axis=1) < 0][0].tolist()
                raise ValueError(f"'bad_pixels' must hold non-negative (column, row) pairs (got {first})")
            if int(arr.max()) >= MAX_CHIP_SIDE:  # checked before the cast to int64 (a uint64 value would wrap)
                first = arr[arr.max(axis=1) >= MAX_CHIP_SIDE][0].tolist()
                raise ValueError(f"'bad_pixels' must hold (column, row) pairs below {MAX_CHIP_SIDE}, the largest "
                                 f"chip side (got {first})")
            pairs = arr
        pairs = np.unique(pairs.astype(np.int64), axis=0) if len(pairs) else pairs
        # sort by row, then column (the order of pixels on the chip)
        order = np.lexsort((pairs[:, 0], pairs[:, 1])) if len(pairs) else []
        return tuple((int(c), int(r)) for c, r in pairs[order])

    # ------------------------------------------------------------------ derived
    def energy_scale(self, run_info=None, *, path=None) -> tuple[float, str]:
        """The ADC counts per keV to use for a run, and where they come from.

        Parameters
        ----------
        run_info : mapping, optional
            The ``/run`` attributes of the raw file (``reader.run_info``).
        path : str or Path, optional
            The raw file, named in errors.

        Returns
        -------
        (float, str)
            The scale and its source: ``"settings"`` (:attr:`counts_per_kev` is set), ``"raw file"`` (its
            ``nominal_counts_per_kev``) or ``"none"`` (:data:`UNCALIBRATED_COUNTS_PER_KEV`, energies uncalibrated).

        Raises
        ------
        ValueError
            The raw file's attribute is not a positive number.

        Examples
        --------
        >>> ReconConfig().energy_scale({"nominal_counts_per_kev": 2400.0})
        (2400.0, 'raw file')
        >>> ReconConfig(counts_per_kev=2500).energy_scale({"nominal_counts_per_kev": 2400.0})
        (2500.0, 'settings')
        >>> ReconConfig().energy_scale({})
        (3333.3, 'none')
        """
        if self.counts_per_kev is not None:
            return self.counts_per_kev, "settings"
        from ..io.energy_label import counts_per_kev_from_run

        nominal = counts_per_kev_from_run(run_info or {}, path=path)
        if nominal is not None:
            return nominal, "raw file"
        return UNCALIBRATED_COUNTS_PER_KEV, "none"

    def bad_pixel_map(self, grid) -> np.ndarray:
        """Chip-sized uint8 map, row by row (1 = bad), for ``grid``; empty when there are no bad pixels.

        Raises
        ------
        ValueError
            A bad pixel outside the chip.
        """
        if not self.bad_pixels:
            return np.zeros(0, np.uint8)
        pairs = np.array(self.bad_pixels, dtype=np.int64)
        outside = ~grid.contains(pairs[:, 0], pairs[:, 1])
        if outside.any():
            c, r = pairs[outside][0]
            raise ValueError(f"'bad_pixels' has pixel (column {c}, row {r}) outside the chip of "
                             f"{grid.n_columns} columns x {grid.n_rows} rows")
        flat = np.zeros(grid.n_pixels, np.uint8)
        flat[pairs[:, 1] * grid.n_columns + pairs[:, 0]] = 1
        return flat

    # ------------------------------------------------------------------ TOML
    @classmethod
    def field_names(cls) -> list[str]:
        return [f.name for f in fields(cls)]

    def to_dict(self) -> dict:
        return {name: getattr(self, name) for name in self.field_names()}

    @classmethod
    def from_dict(cls, values: dict, *, source: str = "config") -> ReconConfig:
        """Build from a dict (e.g. parsed TOML); unknown keys are rejected with the list of valid ones."""
        if "recon" in values and isinstance(values["recon"], dict):
            # a settings file (trackfit.tuning) also holds the [selection] table, read by the analysis
            others = sorted(set(values) - {"recon", "selection"})
            if others:
                raise ValueError(f"{source}: unknown key(s) {others} beside the [recon] table; "
                                 "expected only [recon] and [selection]")
            values = values["recon"]
        renamed = [key for key in values if key in RENAMED_SETTINGS]
        if renamed:
            hints = ", ".join(f"'{key}' is now '{RENAMED_SETTINGS[key]}'" for key in renamed)
            raise ValueError(f"{source}: renamed setting(s): {hints}; rename the key(s) in the file")
        for key, mapping in RENAMED_VALUES.items():
            if isinstance(values.get(key), str) and values[key] in mapping:
                raise ValueError(f"{source}: {key} = '{values[key]}' is now '{mapping[values[key]]}'")
        unknown = sorted(set(values) - set(cls.field_names()))
        if unknown:
            raise ValueError(f"{source}: unknown key(s) {unknown}; valid keys are {cls.field_names()}")
        values = dict(values)
        if isinstance(values.get("bad_pixels"), list):  # other values are judged (and refused) by the constructor
            values["bad_pixels"] = [tuple(p) if isinstance(p, list) else p for p in values["bad_pixels"]]
        try:
            return cls(**values)
        except ValueError as err:
            raise ValueError(f"{source}: {err}") from None

    def settings_template(self) -> str:
        """Every setting with its value and a comment saying what it does, as a TOML settings file.

        ``trackfit reconstruct --print-settings`` prints it for the defaults (``docs/examples/recon.toml`` is that
        output); settings that are not set (``counts_per_kev``) appear as commented-out lines. Reading the text
        back gives this config.

        Examples
        --------
        >>> text = ReconConfig().settings_template()
        >>> ReconConfig.from_toml(text) == ReconConfig()
        True
        """
        from .._toml import format_value

        lines = ["# trackfit reconstruction settings (trackfit.ReconConfig): every setting with its default,",
                 "# as printed by `trackfit reconstruct --print-settings`. Use it with",
                 "#     trackfit reconstruct RAW.h5 -o TABLE.h5 --config recon.toml",
                 '#  or trackfit.reconstruct_file("RAW.h5", "TABLE.h5", config="recon.toml")',
                 "#  or trackfit.ReconConfig.read_toml(\"recon.toml\")",
                 "# Keep only the lines you change (missing keys take their defaults; unknown keys are refused).",
                 "# The methods behind each setting: docs/methods.md §2.",
                 "", "[recon]"]
        for name in self.field_names():
            value = getattr(self, name)
            lines.append("")
            lines += [f"# {line}" for line in _wrap(SETTING_NOTES[name])]
            if value is None:
                example = UNCALIBRATED_COUNTS_PER_KEV if name == "counts_per_kev" else ""
                lines.append(f"# {name} = {format_value(example)}")
            else:
                lines.append(f"{name} = {format_value([list(p) for p in value] if name == 'bad_pixels' else value)}")
        return "\n".join(lines) + "\n"

    def to_toml(self) -> str:
        """The full configuration as TOML text (every key, in a ``[recon]`` table)."""
        return dumps({"recon": self.to_dict()}, header="trackfit reconstruction settings (trackfit.ReconConfig)")

    @classmethod
    def from_toml(cls, text: str, *, source: str = "TOML text") -> ReconConfig:
        """Parse TOML text; keys may be at the top level or in a ``[recon]`` table."""
        return cls.from_dict(parse(text, source=source), source=source)

    @classmethod
    def read_toml(cls, path) -> ReconConfig:
        """Read a TOML file; a relative ``pixel_map`` is taken relative to the file's folder."""
        values, source = read_file(path, what="config file")
        config = cls.from_dict(values, source=source)
        path = Path(path)
        if config.pixel_map and not Path(config.pixel_map).is_absolute():
            config = replace(config, pixel_map=str(path.parent / config.pixel_map))
        return config

    def write_toml(self, path) -> Path:
        path = Path(path)
        path.write_text(self.to_toml())
        return path


def _wrap(text: str, width: int = 100) -> list[str]:
    import textwrap

    return textwrap.wrap(text, width=width)
