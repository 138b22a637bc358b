"""EventBatch holds exactly the values it is given, or refuses them naming the field and the first bad event.

The expected outcome of every generated array is recomputed here element by element with Python's own numbers
(arbitrary-precision ints, IEEE doubles, whose comparisons with ints are exact), independently of the vectorised
numpy checks in ``trackfit.events``: an integer field accepts a value when it is a non-bool integer, or a finite
integral float, inside the field's range (``numpy.iinfo``); ``time_s`` accepts a non-bool number that float64 holds
exactly.
"""

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays, from_dtype

from trackfit import EventBatch, HexGrid
from trackfit.events import EventBatchError

#: fields, their dtype in the batch, and the elements per event of the input (0: one event holds them all)
FIELDS = {"signal": np.int16, "roi": np.int32, "start": np.int64, "trigger_id": np.int64, "index": np.int64,
          "time_s": np.float64}

INPUT_DTYPES = [np.bool_, np.int8, np.int16, np.int32, np.int64, np.uint8, np.uint16, np.uint32, np.uint64,
                np.float16, np.float32, np.float64, object]

#: values at and around every limit the fields have, and the usual troublemakers
BOUNDARY_INTS = [0, 1, -1, 127, 128, 255, 256, 32767, 32768, -32768, -32769, 65535, 65536, 2**31 - 1, 2**31, -2**31,
                 -2**31 - 1, 2**53, 2**53 + 1, 2**63 - 1, 2**63, -2**63, -2**63 - 1, 2**64 - 1, 2**64, 10**30]
BOUNDARY_FLOATS = [0.5, -0.0, 32767.0, 32768.0, -32768.0, -32769.0, 32767.5, 2.0**31, -2.0**31, 2.0**53,
                   2.0**53 + 2, 2.0**63, -2.0**63, 2.0**64, 1e300, math.inf, -math.inf, math.nan]


def _representable(value, dtype) -> bool:
    dtype = np.dtype(dtype)
    if dtype.kind in "iu":
        return isinstance(value, int) and np.iinfo(dtype).min <= value <= np.iinfo(dtype).max
    if dtype.kind == "f":
        with np.errstate(over="ignore"):
            try:
                cast = np.array(value, dtype).item()
            except OverflowError:
                return False
        return cast == value or (isinstance(value, float) and math.isnan(value) and math.isnan(cast))
    return False


def _elements(dtype):
    if dtype is object:
        return st.one_of(st.integers(-2**70, 2**70), st.sampled_from(BOUNDARY_INTS + BOUNDARY_FLOATS), st.floats(),
                         st.booleans(), st.none(), st.text(max_size=2))
    if dtype is np.bool_:
        return st.booleans()
    special = [v for v in BOUNDARY_INTS + BOUNDARY_FLOATS if _representable(v, dtype)]
    return st.one_of(from_dtype(np.dtype(dtype)), st.sampled_from(special))


@st.composite
def field_inputs(draw):
    """(field, input array) for one field of a batch, of any input dtype, with boundary values mixed in."""
    name = draw(st.sampled_from(sorted(FIELDS)))
    dtype = draw(st.sampled_from(INPUT_DTYPES))
    n = draw(st.integers(1, 5))
    size = 4 * n if name == "roi" else n
    if dtype is object:
        values = draw(st.lists(_elements(object), min_size=size, max_size=size))
        arr = np.empty(size, object)
        arr[:] = values
    else:
        arr = draw(arrays(dtype, size, elements=_elements(dtype)))
    return name, (arr.reshape(n, 4) if name == "roi" else arr)


def _fits(value, target) -> bool:
    """Independent rule: is ``value`` (a Python scalar) held exactly by the field dtype ``target``?"""
    if isinstance(value, bool | np.bool_):
        return False
    if np.dtype(target).kind == "i":
        info = np.iinfo(target)
        if isinstance(value, int):
            return info.min <= value <= info.max
        if isinstance(value, float):
            return math.isfinite(value) and value == math.floor(value) and info.min <= int(value) <= info.max
        return False
    if isinstance(value, float):
        return True
    if isinstance(value, int):
        try:
            return int(float(value)) == value
        except OverflowError:
            return False
    return False


def _batch_with(name, arr):
    """A batch whose field ``name`` is ``arr`` and whose other fields are valid (layout not validated)."""
    if name == "roi":
        n = arr.shape[0]
        return EventBatch(roi=arr, start=np.zeros(n + 1, np.int64), signal=np.zeros(0, np.int16), validate=False)
    if name == "start":
        n = len(arr) - 1
        return EventBatch(roi=np.zeros((n, 4), np.int32), start=arr, signal=np.zeros(0, np.int16), validate=False)
    if name == "signal":
        m = len(arr)
        return EventBatch(roi=[[0, 0, m, 1]], start=[0, m], signal=arr, grid=HexGrid(n_columns=max(m, 1)))
    n = len(arr)
    return EventBatch(roi=np.zeros((n, 4), np.int32), start=np.zeros(n + 1, np.int64), signal=np.zeros(0, np.int16),
                      validate=False, **{name: arr})


def _expected_event(name, k, n_events):
    """Batch position of the event that element ``k`` of the field belongs to (None: a batch without events)."""
    if n_events == 0:
        return None
    if name == "signal":
        return 0
    if name == "roi":
        return k // 4
    if name == "start":
        return min(k, n_events - 1)
    return k


@settings(max_examples=400, deadline=None, derandomize=True, suppress_health_check=[HealthCheck.too_slow])
@given(field_inputs())
def test_every_field_is_exact_or_refused_at_the_first_bad_event(case):
    name, arr = case
    target = FIELDS[name]
    values = list(arr.ravel()) if arr.dtype == object else arr.ravel().tolist()
    good = [_fits(v, target) for v in values]
    event("accepted" if all(good) else "refused")
    if all(good):
        batch = _batch_with(name, arr)
        held = getattr(batch, name)
        assert held.dtype == np.dtype(target)
        if np.dtype(target).kind == "i":
            assert [int(v) for v in held.ravel().tolist()] == [int(v) for v in values]
        else:
            assert all(h == float(v) or (math.isnan(h) and math.isnan(float(v)))
                       for h, v in zip(held.tolist(), values, strict=True))
        return
    with pytest.raises(EventBatchError) as err:
        _batch_with(name, arr)
    first_bad = good.index(False)
    n_events = arr.shape[0] - 1 if name == "start" else arr.shape[0]
    expected = _expected_event(name, first_bad, n_events)
    assert err.value.field == name and err.value.event == expected
    assert f"'{name}'" in str(err.value) and f"{name}[" in str(err.value)
    if expected is not None:
        assert f"(batch position {expected})" in str(err.value)


@pytest.mark.parametrize("name, value, accepted", [
    # the limits themselves: exactly at the edge is held, one past it refused (numpy.iinfo)
    ("signal", np.float16(32767.0), False),   # float16 rounds 32767 to 32768: the array holds 32768.0
    ("signal", np.float32(32767.0), True),
    ("signal", np.float16(32768.0), False),   # used to wrap to -32768
    ("signal", np.float64(-32768.0), True),
    ("signal", np.float64(-32769.0), False),
    ("signal", np.float64(7.5), False),
    ("trigger_id", 2**63 - 1, True),           # a Python int at the int64 limit
    ("trigger_id", 2**63, False),              # becomes uint64: refused
    ("trigger_id", np.float64(2.0**63), False),  # used to wrap to -2**63
    ("trigger_id", np.float64(-2.0**63), True),
    ("trigger_id", 2**80, False),              # an object array
    ("trigger_id", np.uint64(2**64 - 1), False),
    ("time_s", 2**53, True),
    ("time_s", 2**53 + 1, False),              # float64 would round it
    ("time_s", np.longdouble(1) / 3, False),   # float64 would round it
    ("time_s", np.float16(0.1), True),
])
def test_values_at_the_limits(name, value, accepted):
    arr = np.array([value])
    if accepted:
        held = getattr(_batch_with(name, arr), name)
        assert held[0] == value
    else:
        with pytest.raises(EventBatchError, match=rf"'{name}' must hold .*event 0 \(batch position 0\)"):
            _batch_with(name, arr)


def test_messages_name_the_event_index_and_the_pixel():
    with pytest.raises(EventBatchError) as err:
        EventBatch(roi=[[0, 0, 1, 1], [0, 0, 2, 1]], start=[0, 1, 3], signal=np.array([1, 2, 40000], np.int64),
                   index=[10, 11])
    assert str(err.value).startswith("'signal' must hold int16 values (integers from -32768 to 32767): event 11 "
                                     "(batch position 1), signal[2] (pixel 1 of the event) is 40000 (int64)")
    with pytest.raises(EventBatchError, match=r"'bad' must hold booleans \(got dtype int64\)"):
        EventBatch(roi=[[0, 0, 1, 1]], start=[0, 1], signal=[1], bad=[1])
    with pytest.raises(EventBatchError, match=r"'roi' must hold .*roi\[0, 3\] \(number of rows\) is nan"):
        EventBatch(roi=[[0, 0, 1, np.nan]], start=[0, 1], signal=[1])
    with pytest.raises(EventBatchError, match=r"'origins' must hold int64 values .*origins\[1\] is 2.5"):
        EventBatch.from_images([np.ones((1, 1))], [(1, 2.5)])
    with pytest.raises(EventBatchError, match=r"'grid' must be a HexGrid"):
        EventBatch(roi=[[0, 0, 1, 1]], start=[0, 1], signal=[1], grid="chip")


def test_the_error_keeps_its_field_and_event_across_processes():
    import pickle

    err = pickle.loads(pickle.dumps(EventBatchError("text", field="signal", event=3)))
    assert (str(err), err.field, err.event) == ("text", "signal", 3)
