"""docs/simulator.md lists every truth column (tests/docs runs its Python example)."""

from pathlib import Path

from trackfit.simulate import TRUTH_COLUMNS

DOC = Path(__file__).resolve().parents[2] / "docs" / "simulator.md"


def test_truth_columns_are_documented():
    text = DOC.read_text()
    for name in TRUTH_COLUMNS:
        assert f"`{name}`" in text, name
