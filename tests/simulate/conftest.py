"""Fixtures of the simulator tests: small configs that run in a fraction of a second."""

import dataclasses

import pytest

pytest.importorskip("xraydb")

from sim_helpers import small_chip  # noqa: E402

from trackfit.simulate import load_preset  # noqa: E402


@pytest.fixture
def hedme():
    return load_preset("hedme-1atm-1cm")


@pytest.fixture
def hedme_6kev_pencil(hedme):
    config = hedme.with_monochromatic(energy_kev=6.0)
    return small_chip(dataclasses.replace(config, source=dataclasses.replace(config.source, beam="pencil")))
