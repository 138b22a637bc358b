"""Every Python example in docs/*.md runs as written (in an empty folder, the blocks of a page in order, sharing their
names) and makes what it says it makes."""

import re
from pathlib import Path

import pytest

DOCS = Path(__file__).resolve().parents[2] / "docs"
WITH_CODE = sorted(p.name for p in DOCS.glob("*.md") if "```python" in p.read_text())
#: doc -> (file the example writes, text it prints)
PRODUCTS = {
    "raw-format.md": ("converted.h5", ""),
    "calibration-format.md": ("example-cal.h5", "5.895"),
    "simulator.md": ("run.h5", ""),
    "pixel-map-format.md": ("chip_map.h5", "hot 4, dead 4"),
    "bring-your-own-data.md": ("converted_frames.h5", "2000 events"),
    "planner.md": ("plan.json", "MDP99"),
    "reliability.md": ("split_run.h5", "1 event read"),
}


def test_every_doc_with_code_is_checked():
    assert set(WITH_CODE) <= set(PRODUCTS), f"add the new doc(s) to PRODUCTS: {set(WITH_CODE) - set(PRODUCTS)}"


@pytest.mark.parametrize("doc", WITH_CODE)
def test_python_examples_run(doc, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    namespace = {}
    for code in re.findall(r"```python\n(.*?)```", (DOCS / doc).read_text(), flags=re.S):
        exec(compile(code, f"{doc} example", "exec"), namespace)
    product, printed = PRODUCTS[doc]
    assert (tmp_path / product).exists()
    assert printed in capsys.readouterr().out
