"""The examples in the docstrings of trackfit.analysis run as written (doctest, standard library)."""

import doctest
import importlib

import pytest

MODULES = ["selection", "stokes", "sources", "spectrum", "modulation", "calfile", "gainmap", "gaintime", "spurious",
           "modfactor", "polarimetry", "calibrate", "figures"]


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name):
    module = importlib.import_module(f"trackfit.analysis.{name}")
    result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.failed == 0
