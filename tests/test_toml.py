"""The TOML writer: whatever it writes, the standard library's tomllib (the reference reader) reads back equal."""

import math
import tomllib

import pytest
from hypothesis import given
from hypothesis import strategies as st

from trackfit._toml import dumps, format_value

keys = st.text(alphabet=st.characters(codec="utf-8", exclude_categories=("Cs",)), min_size=1, max_size=12)
scalars = st.one_of(st.booleans(), st.integers(-(2**63), 2**63 - 1), st.floats(allow_nan=False),
                    st.text(alphabet=st.characters(codec="utf-8", exclude_categories=("Cs", "Cc")), max_size=20))
values = st.one_of(scalars, st.lists(scalars, max_size=4), st.lists(st.lists(st.integers(), max_size=3), max_size=3))
tables = st.recursive(st.dictionaries(keys, values, max_size=5),
                      lambda inner: st.dictionaries(keys, st.one_of(values, inner), max_size=4), max_leaves=12)


@given(tables)
def test_round_trip_through_tomllib(data):
    assert tomllib.loads(dumps(data)) == data


def test_keys_with_a_trailing_newline_are_quoted():
    """A bare-key pattern ending in ``$`` also matches before a final newline; tomllib then refuses the text."""
    assert tomllib.loads(dumps({"0\n": False, "a": {"b\n": 1}})) == {"0\n": False, "a": {"b\n": 1}}


def test_special_floats_and_header():
    text = dumps({"a": math.inf, "b": -math.inf, "c": math.nan, "skip": None}, header="line one\nline two")
    assert text.startswith("# line one\n# line two\n")
    parsed = tomllib.loads(text)
    assert parsed["a"] == math.inf and parsed["b"] == -math.inf and math.isnan(parsed["c"]) and "skip" not in parsed


def test_unsupported_values_are_named():
    with pytest.raises(TypeError, match="cannot write a complex"):
        format_value(1j)


def test_readers_name_the_file_and_the_problem(tmp_path):
    import pytest

    from trackfit._toml import parse, read_file

    bad = tmp_path / "bad.toml"
    bad.write_text("a = = 1\n")
    with pytest.raises(ValueError, match=r"settings file '.*bad.toml': not valid TOML"):
        read_file(bad)
    with pytest.raises(FileNotFoundError, match="observation file '.*missing.toml' does not exist"):
        read_file(tmp_path / "missing.toml", what="observation file")
    with pytest.raises(KeyError):
        parse("x = [", source="inline", error=KeyError)
    good = tmp_path / "good.toml"
    good.write_text("[recon]\nthreshold_adc = 7\n")
    assert read_file(good) == ({"recon": {"threshold_adc": 7}}, f"settings file '{good}'")
