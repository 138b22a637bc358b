"""Source lines and atomic tables of the presets come from xraydb (docs/simulator.md, Tables)."""

import numpy as np
import pytest

from trackfit.simulate import load_preset
from trackfit.simulate.gas import require_xraydb


@pytest.mark.parametrize("name", ["hedme-1atm-1cm", "dme-0.8atm-1cm"])
def test_fe55_lines_are_xraydb_mn_k_lines(name):
    xraydb = require_xraydb()
    lines = xraydb.xray_lines("Mn", "K")
    source = load_preset(name).source
    expected = sorted((round(line.energy / 1000.0, 4), line.intensity) for line in lines.values())
    got = sorted(zip(source.line_energies_kev, source.line_weights, strict=True))
    np.testing.assert_allclose(np.array(got), np.array(expected), rtol=1e-5)


def test_kbeta_over_kalpha_is_xraydb_value_not_the_decay_table():
    # xraydb (Elam) Mn K line intensities: Kβ/Kα = 0.142; the Fe-55 emission per decay of the X-ray Data Booklet
    # (2.85 / 24.4 = 0.117) is another table: the presets use xraydb's (docs/simulator.md)
    source = load_preset("hedme-1atm-1cm").source
    e, w = np.array(source.line_energies_kev), np.array(source.line_weights)
    ratio = w[e > 6.2].sum() / w[e < 6.2].sum()
    assert ratio == pytest.approx(0.142, abs=0.001)
    assert abs(ratio - 2.85 / 24.4) > 0.02


def test_fluorescence_yields_are_xraydb_values():
    # the table used for ω_K (xraydb): C 0.0014, O 0.0058, Ar 0.109 (Krause 1979 gives Ar 0.118 [from memory])
    xraydb = require_xraydb()
    assert xraydb.xray_edge("C", "K").fyield == pytest.approx(0.0014, abs=1e-4)
    assert xraydb.xray_edge("O", "K").fyield == pytest.approx(0.0058, abs=1e-4)
    assert xraydb.xray_edge("Ar", "K").fyield == pytest.approx(0.109, abs=1e-3)
