"""The project is self-contained: no file points outside the repository, and citations of docs/methods.md resolve.

Scanned: every text file of the repository (code, tests, docs, notebooks, benchmarks, presets, sample-data READMEs,
CI scripts) - the files git tracks or would track, or, outside a git checkout, every file below the root except
caches and build outputs. This file is skipped by the pattern checks (it has to spell the patterns it looks for).
"""

import re
import subprocess
from functools import cache
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
METHODS = ROOT / "docs" / "methods.md"
#: the sections of docs/methods.md, by number (code, tests and docs cite them as "docs/methods.md §N")
SECTIONS = {
    1: "hexagonal pixel grid",
    2: "two-stage moment analysis",
    3: "modulation curve",
    4: "stokes parameters",
    5: "spurious modulation",
    6: "energy",
    7: "simulator physics",
    8: "lab sources",
    9: "check values",
    10: "detector fidelity",
    11: "beyond the two-stage moments",
}
BINARY_SUFFIXES = {".h5", ".hdf5", ".png", ".jpg", ".jpeg", ".gif", ".pdf", ".npz", ".npy", ".pkl", ".whl", ".gz"}
SKIP_DIRS = {".git", "__pycache__", ".ruff_cache", ".pytest_cache", ".ipynb_checkpoints", ".venv", "build", "dist",
             "trackfit_output"}

#: references to places outside the repository
OUTSIDE = {
    "absolute path outside the repository": re.compile(
        r"(?<![\w.])(?:/(?:work|home|Users|root|mnt|srv|opt|tmp|scratch)/[\w.-]|~/[\w.-]|[A-Za-z]:\\\\?[\w.-])"),
    "a notes file that is not part of the repository": re.compile(r"physics[ _-]?notes|physics\.md", re.I),
    "a shared folder beside the repository": re.compile(r"(?<![\w-])shared/[\w.-]"),
}
#: words about how the project is organised, which the project itself never speaks of
PROCESS_WORDS = re.compile(r"(?<![a-z])(?:issues?|sessions?|worktrees?)(?![a-z])|\bworking tree\b", re.I)
PARENT_PATH = re.compile(r"(?:\.\./)+[\w./-]*")
DOC_PATH = re.compile(r"(?<![\w/.-])docs/[\w./-]*\w\.(?:md|toml|py|ipynb)\b")
SECTION_SIGN = re.compile(r"§\s*(\d+)")
SECTION_WORD = re.compile(r"\bsections?\s+(\d+(?:\s*(?:-|–|,|/|and)\s*\d+)*)", re.I)


@cache
def repository_files() -> tuple[Path, ...]:
    try:
        listed = subprocess.run(["git", "ls-files", "-z", "--cached", "--others", "--exclude-standard"], cwd=ROOT,
                                capture_output=True, check=True, timeout=60)
        paths = [ROOT / name for name in listed.stdout.decode().split("\0") if name]
    except (OSError, subprocess.SubprocessError):
        paths = [p for p in ROOT.rglob("*") if p.is_file()
                 and not any(part in SKIP_DIRS or part.endswith(".egg-info") for part in p.relative_to(ROOT).parts)]
    return tuple(sorted(p for p in paths if p.is_file() and p.suffix.lower() not in BINARY_SUFFIXES
                        and not any(part in SKIP_DIRS for part in p.relative_to(ROOT).parts)))


@cache
def text_of(path: Path) -> str | None:
    try:
        return path.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        return None


def scanned():
    this = Path(__file__).resolve()
    for path in repository_files():
        text = text_of(path)
        if text is not None and path.resolve() != this:
            yield path, text


def numbers(spec: str) -> list[int]:
    """'3-4 and 9' -> [3, 4, 9]."""
    out = []
    for part in re.split(r"\s*(?:,|/|and)\s*", spec):
        bounds = [int(b) for b in re.split(r"\s*[-–]\s*", part) if b]
        out += list(range(bounds[0], bounds[-1] + 1)) if bounds else []
    return out


def methods_citations():
    """(file, line number, cited section) for every citation of docs/methods.md in the repository.

    A section sign always refers to docs/methods.md (the project uses it for nothing else); "section N" counts when
    its line, or the line before, names docs/methods.md.
    """
    for path, text in scanned():
        lines = text.splitlines()
        for k, line in enumerate(lines):
            for match in SECTION_SIGN.finditer(line):
                yield path, k + 1, int(match.group(1))
            near_methods = "methods.md" in line or (k > 0 and "methods.md" in lines[k - 1])
            if near_methods:
                for match in SECTION_WORD.finditer(line):
                    for number in numbers(match.group(1)):
                        yield path, k + 1, number


def methods_sections() -> dict[int, str]:
    return {int(m.group(1)): m.group(2).strip().lower()
            for m in re.finditer(r"^## §(\d+) (.+)$", METHODS.read_text(encoding="utf-8"), flags=re.M)}


def test_the_scan_sees_the_whole_project():
    names = {p.relative_to(ROOT).as_posix() for p, _ in scanned()}
    for expected in ("README.md", "DEVELOPERS.md", "docs/methods.md", "pyproject.toml", "sample_data/README.md",
                     "trackfit/recon/config.py", "trackfit/presets/hedme-1atm-1cm.toml", "tests/test_readme.py",
                     "notebooks/_build.py", "notebooks/01_first_look.ipynb", "benchmarks/bench_simulate.py"):
        assert expected in names


def test_methods_has_the_numbered_sections_in_order():
    sections = methods_sections()
    assert list(sections) == list(SECTIONS), f"docs/methods.md sections are {list(sections)}, expected 1 to 11"
    for number, words in SECTIONS.items():
        assert words in sections[number], f"§{number} of docs/methods.md is {sections[number]!r}, expected {words!r}"


def test_every_methods_citation_names_an_existing_section():
    sections = methods_sections()
    citations = list(methods_citations())
    # the package, the tests and the other docs all cite it (a sanity check of the scan itself)
    cited_from = {path.relative_to(ROOT).parts[0] for path, _, _ in citations}
    assert {"trackfit", "tests", "docs"} <= cited_from
    bad = [f"{path.relative_to(ROOT)}:{line}: §{number}" for path, line, number in citations if number not in sections]
    assert not bad, "citations of sections that docs/methods.md does not have:\n" + "\n".join(bad)


@pytest.mark.parametrize("what", sorted(OUTSIDE))
def test_no_reference_outside_the_repository(what):
    pattern = OUTSIDE[what]
    found = [f"{path.relative_to(ROOT)}:{text.count(chr(10), 0, m.start()) + 1}: {m.group(0)!r}"
             for path, text in scanned() for m in pattern.finditer(text)]
    assert not found, f"{what}:\n" + "\n".join(found)


def test_relative_paths_stay_inside_the_repository():
    found = []
    for path, text in scanned():
        for match in PARENT_PATH.finditer(text):
            target = (path.parent / match.group(0)).resolve()
            if not target.is_relative_to(ROOT):
                line = text.count("\n", 0, match.start()) + 1
                found.append(f"{path.relative_to(ROOT)}:{line}: {match.group(0)!r}")
    assert not found, "relative paths leading out of the repository:\n" + "\n".join(found)


def test_every_named_docs_file_exists():
    missing = sorted({f"{path.relative_to(ROOT)}: {m.group(0)}" for path, text in scanned()
                      for m in DOC_PATH.finditer(text) if not (ROOT / m.group(0)).is_file()})
    assert not missing, "files under docs/ that are named but do not exist:\n" + "\n".join(missing)


def test_no_process_words():
    found = [f"{path.relative_to(ROOT)}:{text.count(chr(10), 0, m.start()) + 1}: {m.group(0)!r}"
             for path, text in scanned() for m in PROCESS_WORDS.finditer(text)]
    assert not found, "words about how the work was organised:\n" + "\n".join(found)


@pytest.mark.parametrize("text, expected", [
    ("docs/methods.md §1 / §9 [derived]", [1, 9]),
    ("(docs/methods.md sections 3-4 and 9)", [3, 4, 9]),
    ("see docs/methods.md section 6", [6]),
])
def test_citation_parser(text, expected):
    # the parser that the checks above rely on finds each cited section
    found = [int(m.group(1)) for m in SECTION_SIGN.finditer(text)]
    found += [n for m in SECTION_WORD.finditer(text) for n in numbers(m.group(1))]
    assert sorted(found) == expected
    # and the pattern checks catch what they are meant to catch
    assert OUTSIDE["absolute path outside the repository"].search("see " + "/ho" + "me/someone/notes.txt")
    assert OUTSIDE["a shared folder beside the repository"].search("../" + "shared/x.md")
    assert PROCESS_WORDS.search("as " + "iss" + "ue 5 asks")
