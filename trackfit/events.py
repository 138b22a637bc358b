"""In-memory batches of raw events (ragged arrays) and their validation.

An :class:`EventBatch` holds ``N`` events in the same layout as the raw event file (see ``docs/raw-format.md``):

* ``roi`` int32 ``(N, 4)``: first column, first row, number of columns, number of rows of each event's
  rectangular region of interest on the chip;
* ``start`` int64 ``(N + 1,)``: event ``i``'s pixels are ``signal[start[i]:start[i + 1]]``, row by row
  (rows outer, columns inner);
* ``signal`` int16 ``(M,)``: pulse heights, ADC counts, pedestal-subtracted unless ``pedestal_subtracted`` is
  False (then they are the raw ADC values and a pixel map supplies the pedestals, ``docs/pixel-map-format.md``);
* ``time_s`` float64 ``(N,)`` and ``trigger_id`` int64 ``(N,)``.

Users with another data-acquisition format wrap their arrays in a few lines, for example from a list of 2-D
images (one per event, indexed ``[row, column]``) and the chip coordinates of their lower-left pixel::

    import numpy as np
    from trackfit import EventBatch, HexGrid

    images = [np.array([[0, 12], [30, 7]]), np.array([[5]])]       # ADC counts
    origins = [(120, 200), (10, 11)]                                # (first column, first row)
    batch = EventBatch.from_images(images, origins, grid=HexGrid())

or directly from the ragged arrays with ``EventBatch(roi=..., start=..., signal=..., ...)``.

The arrays may come in any numeric dtype; their values are held exactly or refused. A value the batch's dtype
cannot hold (32768.0 for the int16 ``signal``, 2**63 for the int64 ``trigger_id``, a fraction, NaN, a bool where an
integer is expected) raises :class:`EventBatchError` naming the array, the element and the first bad event
(``.field``, ``.event``); nothing is rounded or wrapped around.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .hexgrid import HexGrid

__all__ = ["Event", "EventBatch", "EventBatchError", "find_bad_events"]


class EventBatchError(ValueError):
    """An event batch whose arrays are inconsistent; the message names the first bad event.

    Attributes
    ----------
    field : str or None
        The array at fault (``"roi"``, ``"start"``, ``"signal"``, ``"time_s"``, ``"trigger_id"``, ``"index"``,
        ``"bad"``, ...), when one is.
    event : int or None
        Batch position of the first bad event, when the fault belongs to an event.
    """

    def __init__(self, message, *, field=None, event=None):
        super().__init__(message)
        self.field = field
        self.event = event

    def __reduce__(self):  # keep the attributes across process pools
        return _rebuild_error, (str(self), self.field, self.event)


def _rebuild_error(message, field, event):
    return EventBatchError(message, field=field, event=event)


@dataclass(frozen=True)
class Event:
    """One event: its pixels with their chip coordinates.

    Attributes
    ----------
    index : int
        Position of the event in its file (or batch).
    roi : ndarray of int32, shape (4,)
        First column, first row, number of columns, number of rows.
    signal : ndarray of int16
        Pulse heights of the ROI pixels, ADC counts, row by row.
    columns, rows : ndarray of int64
        Chip coordinates of each pixel.
    x_mm, y_mm : ndarray of float64
        Pixel centres in chip coordinates, mm.
    time_s : float
    trigger_id : int
    """

    index: int
    roi: np.ndarray
    signal: np.ndarray
    columns: np.ndarray
    rows: np.ndarray
    x_mm: np.ndarray
    y_mm: np.ndarray
    time_s: float
    trigger_id: int
    grid: HexGrid

    def __len__(self):
        return len(self.signal)

    def image(self) -> np.ndarray:
        """The ROI as a 2-D array indexed ``[row - first_row, column - first_column]``."""
        return self.signal.reshape(int(self.roi[3]), int(self.roi[2]))

    def __repr__(self):
        c0, r0, nc, nr = (int(v) for v in self.roi)
        return (
            f"Event(index={self.index}, trigger_id={self.trigger_id}, time_s={self.time_s:.6f}, "
            f"roi=columns {c0}..{c0 + nc - 1} x rows {r0}..{r0 + nr - 1}, n_pixels={len(self.signal)}, "
            f"sum={int(self.signal.sum(dtype=np.int64))} ADC)"
        )


def find_bad_events(roi, start, n_signal, grid: HexGrid, first_index: int = 0):
    """Check the ragged layout of events, vectorised.

    Parameters
    ----------
    roi : ndarray, shape (N, 4)
    start : ndarray, shape (N + 1,)
        Offsets into the signal array, absolute (they may begin at any value >= 0).
    n_signal : int
        Length of the whole signal array the offsets point into.
    grid : HexGrid
    first_index : int
        Index of the first event, used in the returned indices.

    Returns
    -------
    indices : ndarray of int64
        Event indices (offset by ``first_index``) that are malformed, increasing.
    reasons : list of str
        One human-readable reason per bad event; it begins with the name of the offending array in quotes
        (``'start'`` or ``'roi'``), which is also the name of the dataset in a raw event file.
    """
    roi = np.asarray(roi)
    start = np.asarray(start)
    lo, hi = start[:-1], start[1:]
    checks = [
        (hi < lo, "'start': start is decreasing (start[i + 1] < start[i])"),
        ((lo < 0) | (hi > n_signal), f"'start': pixel range outside the signal array of length {n_signal}"),
        ((roi[:, 2] < 0) | (roi[:, 3] < 0), "'roi': ROI has a negative size"),
        (
            roi[:, 2].astype(np.int64) * roi[:, 3].astype(np.int64) != (hi - lo),
            "'roi': ROI area (n_columns * n_rows) differs from the pixel count start[i + 1] - start[i]",
        ),
        (
            (roi[:, 0] < 0)
            | (roi[:, 1] < 0)
            | (roi[:, 0].astype(np.int64) + roi[:, 2] > grid.n_columns)
            | (roi[:, 1].astype(np.int64) + roi[:, 3] > grid.n_rows),
            f"'roi': ROI outside the chip of {grid.n_columns} columns x {grid.n_rows} rows",
        ),
    ]
    bad = np.zeros(len(roi), dtype=bool)
    for mask, _ in checks:
        bad |= mask
    indices = np.flatnonzero(bad)
    reasons = []
    for i in indices:
        why = [text for mask, text in checks if mask[i]]
        c0, r0, nc, nr = (int(v) for v in roi[i])
        reasons.append(
            f"{'; '.join(why)}: roi=({c0}, {r0}, {nc}, {nr}), start[i]={int(lo[i])}, start[i + 1]={int(hi[i])}"
        )
    return indices + first_index, reasons


#: largest integer magnitude below which every integer is exact in float64 (53-bit significand)
_FLOAT64_EXACT_INT = 2**53


def _misfits(arr: np.ndarray, target: np.dtype):
    """Where ``arr`` cannot be held exactly in ``target``: a boolean mask, a text when its dtype never can, or None
    when every value fits (found from the extremes, without a mask, for integer input).

    Every check is exact and done before any cast: integer limits are compared as integers (or as the powers of
    two that bound them, which every float holds exactly), floats must be finite and integral to become integers,
    and integers must round-trip to become float64.
    """
    kind = arr.dtype.kind
    if target.kind == "b":
        return None if kind == "b" else f"booleans (got dtype {arr.dtype})"
    if target.kind == "i":
        info = np.iinfo(target)
        what = f"integers from {info.min} to {info.max}"
        if kind == "i":
            if arr.min() >= info.min and arr.max() <= info.max:
                return None
            return (arr < info.min) | (arr > info.max)
        if kind == "u":
            return None if arr.max() <= np.uint64(info.max) else arr > np.uint64(info.max)
        if kind == "f":
            work = arr.astype(np.result_type(arr.dtype, np.float64))  # exact: float16/32 -> float64
            with np.errstate(invalid="ignore"):
                return (~np.isfinite(work) | (np.floor(work) != work) | (work < float(info.min))
                        | (work >= float(info.max + 1)))
        if kind == "O":
            def fits(v):
                if isinstance(v, bool | np.bool_):
                    return False
                if isinstance(v, int | np.integer):
                    return info.min <= int(v) <= info.max
                if isinstance(v, float | np.floating):
                    return math.isfinite(v) and float(v).is_integer() and info.min <= int(v) <= info.max
                return False

            return np.array([not fits(v) for v in arr.flat], bool).reshape(arr.shape)
        return f"{what} (got dtype {arr.dtype})"
    # float64
    if kind == "f":
        if arr.dtype.itemsize <= 8:
            return None
        with np.errstate(over="ignore", invalid="ignore"):
            cast = arr.astype(np.float64)
            return (cast != arr) & ~np.isnan(arr)
    if kind in "iu":
        if arr.dtype.itemsize <= 4:
            return None
        cast = arr.astype(np.float64)
        bad = cast >= (2.0**64 if kind == "u" else 2.0**63)
        ok = ~bad
        bad[ok] = cast[ok].astype(arr.dtype) != arr[ok]
        return bad
    if kind == "O":
        def exact(v):
            if isinstance(v, bool | np.bool_):
                return False
            if isinstance(v, float | np.floating):
                return True
            if isinstance(v, int | np.integer):
                return abs(int(v)) <= _FLOAT64_EXACT_INT or (abs(int(v)) < 2**1024 and int(float(v)) == int(v))
            return False

        return np.array([not exact(v) for v in arr.flat], bool).reshape(arr.shape)
    return f"numbers (got dtype {arr.dtype})"


def _exact_array(name, value, dtype, ndim, where):
    """``value`` as a contiguous ``dtype`` array, refused with :class:`EventBatchError` unless held exactly.

    ``where(k)`` describes flat element ``k``: ``(text, batch position or None)``.
    """
    target = np.dtype(dtype)
    try:
        arr = np.asarray(value)
    except (ValueError, TypeError, OverflowError) as err:  # ragged nested lists and the like
        raise EventBatchError(f"'{name}' must be a {ndim}-D array of {target.name} ({err})", field=name) from None
    if arr.ndim != ndim:
        raise EventBatchError(f"'{name}' must be {ndim}-D (got shape {arr.shape})", field=name)
    if arr.dtype == target:
        return np.ascontiguousarray(arr)
    if arr.size == 0:
        if arr.dtype.kind not in "biufO":
            raise EventBatchError(f"'{name}' must be {target.name} (got dtype {arr.dtype})", field=name)
        return np.zeros(arr.shape, target)
    bad = _misfits(arr, target)
    expected = {"b": "booleans", "i": f"{target.name} values", "f": "float64 values"}[target.kind]
    if isinstance(bad, str):
        text, position = where(0)
        raise EventBatchError(f"'{name}' must hold {bad}: first bad value at {text}", field=name, event=position)
    if bad is not None and bad.any():
        flat = np.flatnonzero(bad.ravel())
        k = int(flat[0])
        value = arr.flat[k]
        shown = value.item() if isinstance(value, np.generic) else value
        text, position = where(k)
        if target.kind == "i":
            info = np.iinfo(target)
            expected += f" (integers from {info.min} to {info.max})"
        else:
            expected += " (each exactly representable in float64)"
        more = f"; {len(flat) - 1} more bad values" if len(flat) > 1 else ""
        raise EventBatchError(f"'{name}' must hold {expected}: {text} is {shown!r} ({arr.dtype}){more}",
                              field=name, event=position)
    if arr.dtype.kind == "O":
        values = [int(v) if target.kind == "i" else float(v) for v in arr.flat]
        return np.array(values, target).reshape(arr.shape)
    with np.errstate(over="ignore", invalid="ignore"):  # every value was checked to be exact
        return np.ascontiguousarray(arr.astype(target))


def _as_array(name, value, dtype, ndim):
    """``value`` as an exact ``dtype`` array; errors name the element (no event layout known)."""
    def where(k):
        return f"{name}[{k}]", None

    return _exact_array(name, value, dtype, ndim, where)


@dataclass(frozen=True, eq=False)
class EventBatch:
    """A batch of raw events held as ragged arrays (the raw-file layout).

    Parameters
    ----------
    roi : array_like of int32, shape (N, 4)
    start : array_like of int64, shape (N + 1,)
        ``start[0]`` need not be 0; event ``i`` is ``signal[start[i]:start[i + 1]]``.
    signal : array_like of int16, shape (M,)
    time_s : array_like of float64, shape (N,), optional
        Defaults to zeros.
    trigger_id : array_like of int64, shape (N,), optional
        Defaults to ``index``.
    grid : HexGrid, optional
        The chip (default :class:`HexGrid` ()).
    index : array_like of int64, shape (N,), optional
        Position of each event in its file (default ``arange(N)``).
    bad : array_like of bool, shape (N,), optional
        Events that were malformed in the input and were replaced by empty placeholders when read with
        ``strict=False``; downstream stages flag them instead of dropping them.
    truth : dict of str to ndarray, optional
        Per-event simulation truth, each of length N.
    validate : bool
        Check the ragged layout (default True); raises :class:`EventBatchError` naming the first bad event.
    pedestal_subtracted : bool
        True (default): ``signal`` holds pedestal-subtracted pulse heights. False: raw ADC values, pedestals
        included (the reconstruction then needs a pixel map with the pedestals).
    """

    roi: np.ndarray
    start: np.ndarray
    signal: np.ndarray
    time_s: np.ndarray | None = None
    trigger_id: np.ndarray | None = None
    grid: HexGrid = field(default_factory=HexGrid)
    index: np.ndarray | None = None
    bad: np.ndarray | None = None
    truth: dict | None = None
    validate: bool = field(default=True, repr=False)
    pedestal_subtracted: bool = True

    def __post_init__(self):
        if not isinstance(self.grid, HexGrid):
            raise EventBatchError(f"'grid' must be a HexGrid (got {type(self.grid).__name__})", field="grid")
        index = None
        if self.index is not None:
            index = _exact_array("index", self.index, np.int64, 1,
                                 lambda k: (f"index[{k}] (batch position {k})", k))

        def event_at(position, what):
            named = index is not None and position < len(index)
            return (f"event {int(index[position]) if named else position} (batch position {position}), {what}",
                    position)

        roi_names = ("first column", "first row", "number of columns", "number of rows")
        roi = _exact_array("roi", self.roi, np.int32, 2,
                           lambda k: event_at(k // 4, f"roi[{k // 4}, {k % 4}] ({roi_names[k % 4]})"))
        if roi.shape[1:] != (4,) and roi.size:
            raise EventBatchError(f"'roi' must have shape (N, 4) (got {roi.shape})", field="roi")
        roi = roi.reshape(-1, 4)
        n = len(roi)
        if index is None:
            index = np.arange(n, dtype=np.int64)
        elif len(index) != n:
            raise EventBatchError(f"'index' must have one entry per event, N = {n} (got {len(index)})",
                                  field="index")

        def start_entry(k):
            if k < n:
                return event_at(k, f"start[{k}] (where the event's pixels begin)")
            return event_at(n - 1, f"start[{k}] (where the last event's pixels end)") if n else (f"start[{k}]", None)

        start = _exact_array("start", self.start, np.int64, 1, start_entry)
        if len(start) != n + 1:
            raise EventBatchError(f"'start' must have N + 1 = {n + 1} entries for {n} events (got {len(start)})",
                                  field="start")

        def pixel_owner(k):
            # the event whose pixel range holds signal[k] (when the offsets increase; else only the position)
            if n and np.all(start[1:] >= start[:-1]) and start[0] <= k < start[-1]:
                i = int(np.searchsorted(start, k, side="right")) - 1
                return event_at(i, f"signal[{k}] (pixel {k - int(start[i])} of the event)")
            return f"signal[{k}] (outside every event's pixel range)", None

        signal = _exact_array("signal", self.signal, np.int16, 1, pixel_owner)
        per_event = {}
        for name, value, dtype in (("time_s", self.time_s, np.float64), ("trigger_id", self.trigger_id, np.int64),
                                   ("bad", self.bad, np.bool_)):
            if value is None:
                continue
            arr = _exact_array(name, value, dtype, 1, lambda k, name=name: event_at(k, f"{name}[{k}]")
                               if k < n else (f"{name}[{k}]", None))
            if len(arr) != n:
                raise EventBatchError(f"'{name}' must have one entry per event, N = {n} (got {len(arr)})",
                                      field=name)
            per_event[name] = arr
        time_s = per_event.get("time_s", np.zeros(n))
        trigger_id = per_event.get("trigger_id", index.copy())
        bad = per_event.get("bad", np.zeros(n, dtype=bool))
        truth = {}
        for key, values in (self.truth or {}).items():
            values = np.asarray(values)
            if values.ndim != 1 or len(values) != n:
                raise EventBatchError(f"truth '{key}' must be 1-D with N = {n} entries (got shape {values.shape})",
                                      field=f"truth/{key}")
            truth[key] = values
        if not isinstance(self.pedestal_subtracted, bool | np.bool_):
            raise EventBatchError(f"'pedestal_subtracted' must be True or False (got {self.pedestal_subtracted!r})",
                                  field="pedestal_subtracted")
        for name, value in (("roi", roi), ("start", start), ("signal", signal), ("time_s", time_s),
                            ("trigger_id", trigger_id), ("index", index), ("bad", bad), ("truth", truth),
                            ("pedestal_subtracted", bool(self.pedestal_subtracted))):
            object.__setattr__(self, name, value)
        if self.validate:
            indices, reasons = find_bad_events(roi, start, len(signal), self.grid)
            if len(indices):
                i = int(indices[0])
                raise EventBatchError(
                    f"event {int(index[i])} (batch position {i}) is malformed: {reasons[0]}"
                    + (f" ({len(indices) - 1} more bad events)" if len(indices) > 1 else ""),
                    field=reasons[0].split("'")[1], event=i,
                )

    # ------------------------------------------------------------------ construction helpers
    @classmethod
    def from_images(cls, images, origins, *, grid=None, time_s=None, trigger_id=None, truth=None,
                    pedestal_subtracted=True):
        """Build a batch from per-event 2-D images.

        Parameters
        ----------
        images : sequence of 2-D array_like
            Pulse heights indexed ``[row - first_row, column - first_column]``, ADC counts.
        origins : array_like, shape (N, 2)
            ``(first_column, first_row)`` of each image on the chip.
        grid : HexGrid, optional
        time_s, trigger_id, truth, pedestal_subtracted : optional, as for :class:`EventBatch`.
        """
        images = [np.asarray(img) for img in images]
        try:
            ndim = min(max(np.ndim(origins), 1), 2)
        except ValueError:  # ragged: _as_array names it
            ndim = 2
        origins = _as_array("origins", origins, np.int64, ndim)
        if origins.size % 2 or (origins.ndim == 2 and origins.shape[1] != 2) or origins.ndim > 2:
            raise EventBatchError(f"'origins' must have shape (N, 2) (got {origins.shape})", field="origins")
        origins = origins.reshape(-1, 2)
        if len(origins) != len(images):
            raise EventBatchError(f"got {len(images)} images but {len(origins)} origins", field="origins")
        for i, img in enumerate(images):
            if img.ndim != 2:
                raise EventBatchError(f"image {i} must be 2-D [row, column] (got shape {img.shape})", field="images",
                                      event=i)
        shapes = np.array([img.shape for img in images], dtype=np.int64).reshape(-1, 2)
        roi = np.column_stack([origins, shapes[:, 1], shapes[:, 0]]) if len(images) else np.zeros((0, 4))
        start = np.concatenate([[0], np.cumsum(shapes[:, 0] * shapes[:, 1])])
        signal = np.concatenate([img.ravel() for img in images]) if images else np.zeros(0, np.int16)
        return cls(roi=roi, start=start, signal=signal, time_s=time_s, trigger_id=trigger_id,
                   grid=grid or HexGrid(), truth=truth, pedestal_subtracted=pedestal_subtracted)

    @classmethod
    def empty(cls, grid=None) -> EventBatch:
        return cls(roi=np.zeros((0, 4), np.int32), start=np.zeros(1, np.int64), signal=np.zeros(0, np.int16),
                   grid=grid or HexGrid())

    # ------------------------------------------------------------------ access
    def __len__(self):
        return len(self.roi)

    @property
    def n_pixels(self) -> np.ndarray:
        """Number of ROI pixels of each event."""
        return np.diff(self.start)

    def event(self, i: int) -> Event:
        """Event at batch position ``i``, with the chip coordinates of its pixels."""
        n = len(self)
        if not -n <= i < n:
            raise IndexError(f"event position {i} out of range for a batch of {n} events")
        i = i % n
        c0, r0, nc, nr = (int(v) for v in self.roi[i])
        rows, columns = np.divmod(np.arange(nc * nr, dtype=np.int64), max(nc, 1))
        columns = columns + c0
        rows = rows + r0
        x_mm, y_mm = self.grid.pixel_centre_mm(columns, rows)
        return Event(
            index=int(self.index[i]),
            roi=self.roi[i].copy(),
            signal=self.signal[self.start[i]:self.start[i + 1]].copy(),
            columns=columns,
            rows=rows,
            x_mm=x_mm,
            y_mm=y_mm,
            time_s=float(self.time_s[i]),
            trigger_id=int(self.trigger_id[i]),
            grid=self.grid,
        )

    def __iter__(self):
        for i in range(len(self)):
            yield self.event(i)

    def select(self, positions) -> EventBatch:
        """A new batch with the events at the given positions (boolean mask or integer indices)."""
        positions = np.asarray(positions)
        if positions.dtype == bool:
            positions = np.flatnonzero(positions)
        n_pix = self.n_pixels[positions]
        new_start = np.concatenate([[0], np.cumsum(n_pix)]).astype(np.int64)
        # gather the pixel ranges without a Python loop
        owner = np.repeat(np.arange(len(positions)), n_pix)
        offsets = np.arange(new_start[-1], dtype=np.int64) - new_start[:-1][owner]
        signal = self.signal[self.start[positions][owner] + offsets]
        return EventBatch(
            roi=self.roi[positions], start=new_start, signal=signal, time_s=self.time_s[positions],
            trigger_id=self.trigger_id[positions], grid=self.grid, index=self.index[positions],
            bad=self.bad[positions], truth={k: v[positions] for k, v in self.truth.items()}, validate=False,
            pedestal_subtracted=self.pedestal_subtracted,
        )

    def compact(self) -> EventBatch:
        """The same events with ``start[0] == 0`` and no unused signal values."""
        if self.start[0] == 0 and self.start[-1] == len(self.signal):
            return self
        return self.select(np.arange(len(self)))

    @classmethod
    def concatenate(cls, batches) -> EventBatch:
        """Join batches of the same chip into one."""
        batches = [b.compact() for b in batches]
        if not batches:
            return cls.empty()
        grid = batches[0].grid
        if any(b.grid != grid for b in batches):
            raise EventBatchError("cannot concatenate batches of different chips (geometry differs)")
        if any(b.pedestal_subtracted != batches[0].pedestal_subtracted for b in batches):
            raise EventBatchError("cannot concatenate pedestal-subtracted batches with raw (not subtracted) ones")
        keys = set(batches[0].truth)
        if any(set(b.truth) != keys for b in batches):
            raise EventBatchError("cannot concatenate batches with different truth columns")
        offsets = np.cumsum([0] + [len(b.signal) for b in batches])
        start = np.concatenate([b.start[:-1] + off for b, off in zip(batches, offsets[:-1], strict=True)]
                               + [[offsets[-1]]])
        return cls(
            roi=np.concatenate([b.roi for b in batches]),
            start=start,
            signal=np.concatenate([b.signal for b in batches]),
            time_s=np.concatenate([b.time_s for b in batches]),
            trigger_id=np.concatenate([b.trigger_id for b in batches]),
            grid=grid,
            index=np.concatenate([b.index for b in batches]),
            bad=np.concatenate([b.bad for b in batches]),
            truth={k: np.concatenate([b.truth[k] for b in batches]) for k in keys},
            validate=False,
            pedestal_subtracted=batches[0].pedestal_subtracted,
        )

    def __repr__(self):
        n = len(self)
        if n == 0:
            return "EventBatch(0 events)"
        npix = self.n_pixels
        return (
            f"EventBatch({n} events, indices {int(self.index[0])}..{int(self.index[-1])}, "
            f"{len(self.signal)} pixels, ROI size {int(npix.min())}..{int(npix.max())} "
            f"(mean {npix.mean():.0f}), {int(self.bad.sum())} bad, truth={sorted(self.truth) or None}"
            + ("" if self.pedestal_subtracted else ", not pedestal-subtracted") + ")"
        )
