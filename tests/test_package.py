"""Package-level behaviour: version, lazy subpackages, a light ``trackfit --version``."""

import subprocess
import sys

import pytest

import trackfit


def test_version_matches_the_metadata():
    from importlib.metadata import version

    assert trackfit.__version__ == version("trackfit")


def test_subpackages_load_on_first_use():
    assert trackfit.analysis.mdp99(100, modulation_factor=1.0) > 0
    assert "hedme-1atm-1cm" in trackfit.simulate.list_presets()
    with pytest.raises(AttributeError, match="no_such_thing"):
        getattr(trackfit, "no_such_thing")  # noqa: B009


def test_version_flag_imports_nothing_heavy():
    code = ("import sys; from trackfit.cli import main; main(['--version']); "
            "print(sorted(m for m in sys.modules if m in ('numba', 'h5py', 'matplotlib', 'scipy')))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.splitlines()[0].startswith("trackfit ")
    assert out.splitlines()[1] == "[]"


def test_every_extra_named_in_a_message_or_doc_is_declared():
    # ImportError messages and docs say 'pip install "trackfit[NAME]"': NAME must be a declared extra that the
    # dev extra pulls in (so the test suite runs with it)
    import re
    import tomllib
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    extras = tomllib.loads((root / "pyproject.toml").read_text())["project"]["optional-dependencies"]
    dev = {name for spec in extras["dev"] for group in re.findall(r"^trackfit\[([\w,]+)\]", spec)
           for name in group.split(",")}
    texts = [p.read_text() for p in [*(root / "trackfit").rglob("*.py"), root / "README.md", root / "DEVELOPERS.md"]]
    named = {name for text in texts for group in re.findall(r'pip install "trackfit\[([\w,]+)\]"', text)
             for name in group.split(",") if name != "dev"}
    assert {"pandas", "xray", "dask"} <= named
    assert named <= set(extras) and named <= dev, (named, set(extras), dev)
