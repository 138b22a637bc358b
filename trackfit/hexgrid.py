"""Geometry of the hexagonal pixel grid of the readout chip.

The chip is a rectangle of ``n_columns x n_rows`` pointy-top hexagonal pixels laid out in horizontal rows.
Neighbouring pixels in a row are one ``pitch_mm`` apart, rows are ``pitch_mm * sqrt(3) / 2`` apart, and every
other row is offset by ``+pitch_mm / 2`` in x (which parity is offset is a property of the chip: ``shifted_rows``).
The chip centre is the origin of the (x, y) frame in millimetres; x grows with the column, y with the row.

Three coordinate systems are used:

* offset coordinates ``(column, row)``: what the readout reports;
* axial coordinates ``(q, r)`` with ``r = row``; the cube coordinates ``(q, r, s = -q - r)`` make distances,
  neighbours and rounding simple (standard hexagonal-grid algebra);
* chip coordinates ``(x_mm, y_mm)``.

All conversions are vectorised over numpy arrays of any shape.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

__all__ = ["HexGrid", "AXIAL_DIRECTIONS", "PITCH_RANGE_MM", "MAX_CHIP_SIDE"]

SQRT3 = float(np.sqrt(3.0))

#: Accepted range of ``pitch_mm``: 0.1 micrometre to 10 mm. Pixel chips of these detectors have pitches of tens of
#: micrometres; outside this range a value is a mistake (a unit slip, a damaged file), and far outside it positions
#: and moments leave the float range.
PITCH_RANGE_MM = (1e-4, 10.0)
#: Largest ``n_columns`` and ``n_rows``: 32768 = 2**15, so that a chip has at most 2**30 pixels and every pixel
#: index, ROI area and count of pixels or clusters fits a signed 32-bit integer (the index type of the kernels and
#: of the ``n_pixels``, ``n_clusters`` and ``n_conv_pixels`` table columns). A chip-sized map of that size takes
#: 1 GiB per byte of pixel data.
MAX_CHIP_SIDE = 1 << 15

#: The six neighbour steps in axial coordinates (dq, dr), counter-clockwise from +x.
AXIAL_DIRECTIONS = np.array([(1, 0), (0, 1), (-1, 1), (-1, 0), (0, -1), (1, -1)], dtype=np.int64)


@dataclass(frozen=True, kw_only=True)
class HexGrid:
    """A chip of pointy-top hexagonal pixels in horizontal rows.

    Parameters
    ----------
    pitch_mm : float
        Centre-to-centre distance of neighbouring pixels, mm (default 0.050), finite and within
        :data:`PITCH_RANGE_MM` (1e-4 to 10 mm).
    n_columns, n_rows : int
        Chip size in pixels (default 300 x 352): integers from 1 to :data:`MAX_CHIP_SIDE` (32768), so that pixel
        indices fit 32-bit integers. Integral floats (300.0) are accepted.
    shifted_rows : {"odd", "even"}
        Which rows are offset by ``+pitch_mm / 2`` in x.

    Raises
    ------
    ValueError
        A parameter of the wrong type or outside its range; the message names it and the value given.

    Examples
    --------
    >>> grid = HexGrid()
    >>> round(grid.row_pitch_mm * 1000, 2)
    43.3
    >>> col, row = grid.nearest_pixel(0.0, 0.0)
    >>> bool(grid.contains(col, row))
    True
    """

    pitch_mm: float = 0.050
    n_columns: int = 300
    n_rows: int = 352
    shifted_rows: str = "odd"
    # derived offsets, filled in __post_init__
    _x0_mm: float = field(init=False, repr=False, compare=False)
    _y0_mm: float = field(init=False, repr=False, compare=False)

    def __post_init__(self):
        pitch = self.pitch_mm
        if isinstance(pitch, bool | np.bool_) or not isinstance(pitch, int | float | np.integer | np.floating):
            raise ValueError(f"'pitch_mm' must be a number of mm (got {pitch!r})")
        # compared as Python numbers: exact for huge ints too (numpy.isfinite refuses ints beyond 64 bits)
        exact = int(pitch) if isinstance(pitch, int | np.integer) else float(pitch)
        if not ((isinstance(exact, int) or math.isfinite(exact)) and PITCH_RANGE_MM[0] <= exact <= PITCH_RANGE_MM[1]):
            raise ValueError(f"'pitch_mm' must be a finite number of mm between {PITCH_RANGE_MM[0]:g} and "
                             f"{PITCH_RANGE_MM[1]:g} (got {pitch!r})")
        for name in ("n_columns", "n_rows"):
            value = getattr(self, name)
            if isinstance(value, bool | np.bool_) or not isinstance(value, int | float | np.integer | np.floating):
                raise ValueError(f"'{name}' must be an integer (got {value!r})")
            if isinstance(value, float | np.floating) and not (math.isfinite(value) and float(value).is_integer()):
                raise ValueError(f"'{name}' must be an integer (got {value!r})")
            if not 1 <= int(value) <= MAX_CHIP_SIDE:
                raise ValueError(f"'{name}' must be an integer between 1 and {MAX_CHIP_SIDE} (got {value!r})")
            object.__setattr__(self, name, int(value))
        if not isinstance(self.shifted_rows, str) or self.shifted_rows not in ("odd", "even"):
            raise ValueError(f"'shifted_rows' must be 'odd' or 'even' (got {self.shifted_rows!r})")
        object.__setattr__(self, "pitch_mm", float(self.pitch_mm))
        # The origin is the centre of the bounding box of all pixel centres (both parities present).
        shift = 0.5 if self.n_rows > 1 else (0.5 if self.shifted_rows == "even" else 0.0)
        object.__setattr__(self, "_x0_mm", self.pitch_mm * (self.n_columns - 1 + shift) / 2.0)
        object.__setattr__(self, "_y0_mm", self.row_pitch_mm * (self.n_rows - 1) / 2.0)

    # ------------------------------------------------------------------ derived sizes
    @property
    def row_pitch_mm(self) -> float:
        """Distance between neighbouring rows, ``pitch_mm * sqrt(3) / 2``."""
        return self.pitch_mm * SQRT3 / 2.0

    @property
    def pixel_area_mm2(self) -> float:
        """Area of one hexagonal pixel, ``sqrt(3) / 2 * pitch_mm**2``."""
        return SQRT3 / 2.0 * self.pitch_mm**2

    @property
    def hex_size_mm(self) -> float:
        """Centre-to-corner distance of a pixel, ``pitch_mm / sqrt(3)``."""
        return self.pitch_mm / SQRT3

    @property
    def n_pixels(self) -> int:
        return self.n_columns * self.n_rows

    @property
    def shape(self) -> tuple[int, int]:
        """``(n_rows, n_columns)``, the shape of a chip-sized image indexed ``[row, column]``."""
        return (self.n_rows, self.n_columns)

    @property
    def extent_mm(self) -> tuple[float, float, float, float]:
        """``(x_min, x_max, y_min, y_max)`` of the pixel centres, mm."""
        x_max = self.pitch_mm * (self.n_columns - 1 + 0.5) - self._x0_mm
        return (-self._x0_mm, x_max, -self._y0_mm, self._y0_mm)

    @property
    def _parity(self) -> int:
        """Row parity that is shifted by +pitch/2: 1 for "odd", 0 for "even"."""
        return 1 if self.shifted_rows == "odd" else 0

    # ------------------------------------------------------------------ offset <-> axial
    def to_axial(self, column, row):
        """Offset ``(column, row)`` to axial ``(q, r)`` (integer arrays)."""
        column = np.asarray(column, dtype=np.int64)
        row = np.asarray(row, dtype=np.int64)
        if self.shifted_rows == "odd":
            q = column - (row - (row & 1)) // 2
        else:
            q = column - (row + (row & 1)) // 2
        return q, row.copy()

    def from_axial(self, q, r):
        """Axial ``(q, r)`` to offset ``(column, row)`` (integer arrays)."""
        q = np.asarray(q, dtype=np.int64)
        r = np.asarray(r, dtype=np.int64)
        if self.shifted_rows == "odd":
            column = q + (r - (r & 1)) // 2
        else:
            column = q + (r + (r & 1)) // 2
        return column, r.copy()

    @staticmethod
    def axial_to_cube(q, r):
        """Axial ``(q, r)`` to cube ``(q, r, s)`` with ``q + r + s = 0``."""
        q = np.asarray(q)
        r = np.asarray(r)
        return q, r, -q - r

    @staticmethod
    def cube_to_axial(q, r, s):
        """Cube ``(q, r, s)`` to axial ``(q, r)``; ``s`` is only checked for consistency."""
        q, r, s = np.asarray(q), np.asarray(r), np.asarray(s)
        if np.any(q + r + s != 0):
            raise ValueError("cube coordinates must satisfy q + r + s == 0")
        return q, r

    @staticmethod
    def cube_round(qf, rf):
        """Round fractional axial coordinates to the nearest hexagon (cube rounding)."""
        qf = np.asarray(qf, dtype=np.float64)
        rf = np.asarray(rf, dtype=np.float64)
        sf = -qf - rf
        q, r, s = np.rint(qf), np.rint(rf), np.rint(sf)
        dq, dr, ds = np.abs(q - qf), np.abs(r - rf), np.abs(s - sf)
        fix_q = (dq > dr) & (dq > ds)
        fix_r = ~fix_q & (dr > ds)
        q = np.where(fix_q, -r - s, q)
        r = np.where(fix_r, -q - s, r)
        return q.astype(np.int64), r.astype(np.int64)

    # ------------------------------------------------------------------ axial/offset <-> mm
    def axial_to_xy(self, q, r):
        """Centre of axial pixel ``(q, r)`` in chip coordinates, mm."""
        q = np.asarray(q, dtype=np.float64)
        r = np.asarray(r, dtype=np.float64)
        x = self.pitch_mm * (q + 0.5 * r + 0.5 * (1 - self._parity)) - self._x0_mm
        y = self.row_pitch_mm * r - self._y0_mm
        return x, y

    def xy_to_axial(self, x_mm, y_mm):
        """Fractional axial coordinates of points ``(x_mm, y_mm)``."""
        x = np.asarray(x_mm, dtype=np.float64) + self._x0_mm - 0.5 * (1 - self._parity) * self.pitch_mm
        y = np.asarray(y_mm, dtype=np.float64) + self._y0_mm
        rf = y / self.row_pitch_mm
        qf = x / self.pitch_mm - 0.5 * rf
        return qf, rf

    def pixel_centre_mm(self, column, row):
        """Centre of pixel ``(column, row)`` in chip coordinates ``(x_mm, y_mm)``.

        Works for any integers, also outside the chip (the lattice continues).
        """
        column = np.asarray(column, dtype=np.int64)
        row = np.asarray(row, dtype=np.int64)
        shifted = (row & 1) == self._parity
        x = self.pitch_mm * (column + 0.5 * shifted) - self._x0_mm
        y = self.row_pitch_mm * row - self._y0_mm
        return x, y

    def nearest_pixel(self, x_mm, y_mm):
        """Pixel ``(column, row)`` whose hexagon contains the point (cube rounding).

        The result may lie outside the chip; test it with :meth:`contains`.
        """
        qf, rf = self.xy_to_axial(x_mm, y_mm)
        q, r = self.cube_round(qf, rf)
        return self.from_axial(q, r)

    # ------------------------------------------------------------------ topology
    def hex_distance(self, column_a, row_a, column_b, row_b):
        """Number of steps between two pixels on the 6-neighbour graph."""
        qa, ra = self.to_axial(column_a, row_a)
        qb, rb = self.to_axial(column_b, row_b)
        dq, dr = qa - qb, ra - rb
        return (np.abs(dq) + np.abs(dr) + np.abs(dq + dr)) // 2

    def neighbours(self, column, row):
        """The six neighbours of each pixel, counter-clockwise from +x.

        Returns
        -------
        columns, rows : ndarray of int64, shape ``(*np.shape(column), 6)``
            May include pixels outside the chip; test them with :meth:`contains`.
        """
        q, r = self.to_axial(column, row)
        nq = q[..., None] + AXIAL_DIRECTIONS[:, 0]
        nr = r[..., None] + AXIAL_DIRECTIONS[:, 1]
        return self.from_axial(nq, nr)

    def contains(self, column, row):
        """True where ``(column, row)`` is a pixel of the chip."""
        column = np.asarray(column)
        row = np.asarray(row)
        return (column >= 0) & (column < self.n_columns) & (row >= 0) & (row < self.n_rows)

    def all_pixels(self):
        """``(columns, rows)`` of every pixel, row by row (rows outer, columns inner)."""
        rows, columns = np.divmod(np.arange(self.n_pixels, dtype=np.int64), self.n_columns)
        return columns, rows

    def hexagon_vertices_mm(self, x_mm, y_mm):
        """Corners of the hexagons centred on the points, shape ``(n, 6, 2)`` (for drawing)."""
        angles = np.deg2rad(30.0 + 60.0 * np.arange(6))
        x = np.asarray(x_mm, dtype=np.float64).reshape(-1, 1)
        y = np.asarray(y_mm, dtype=np.float64).reshape(-1, 1)
        size = self.hex_size_mm
        return np.stack([x + size * np.cos(angles), y + size * np.sin(angles)], axis=-1)

    # ------------------------------------------------------------------ persistence
    def to_dict(self) -> dict:
        """The four defining parameters, as stored in ``/geometry`` of our files."""
        return {
            "pitch_mm": self.pitch_mm,
            "n_columns": self.n_columns,
            "n_rows": self.n_rows,
            "shifted_rows": self.shifted_rows,
        }

    @classmethod
    def from_dict(cls, values) -> HexGrid:
        """Inverse of :meth:`to_dict`; accepts numpy scalars and bytes (HDF5 attributes).

        The values are checked by the constructor as given: numbers stored as text, arrays and out-of-range values
        are refused with a ValueError naming the parameter (never converted first).
        """
        def plain(value):
            if isinstance(value, bytes):
                try:
                    return value.decode()
                except UnicodeDecodeError:
                    return value
            return value.item() if isinstance(value, np.generic) else value

        return cls(pitch_mm=plain(values["pitch_mm"]), n_columns=plain(values["n_columns"]),
                   n_rows=plain(values["n_rows"]), shifted_rows=plain(values["shifted_rows"]))
