"""The code examples of the documentation run as written."""

import re
from pathlib import Path

import pytest

DOCS = Path(__file__).resolve().parents[2] / "docs"


def _python_blocks(path):
    return re.findall(r"```python\n(.*?)```", path.read_text(), flags=re.S)


@pytest.mark.parametrize("doc", ["raw-format.md"])
def test_python_examples_run(doc, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    blocks = _python_blocks(DOCS / doc)
    assert blocks, f"{doc} has no python example"
    for code in blocks:
        exec(compile(code, f"{doc} example", "exec"), {})
