"""The python example of docs/simulator.md runs as written, and the doc lists every truth column."""

import re
from pathlib import Path

from trackfit.simulate import TRUTH_COLUMNS

DOC = Path(__file__).resolve().parents[2] / "docs" / "simulator.md"


def test_example_runs(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    blocks = re.findall(r"```python\n(.*?)```", DOC.read_text(), flags=re.S)
    assert blocks
    for code in blocks:
        exec(compile(code, "simulator.md example", "exec"), {})
    assert (tmp_path / "run.h5").exists()


def test_truth_columns_are_documented():
    text = DOC.read_text()
    for name in TRUTH_COLUMNS:
        assert f"`{name}`" in text, name
