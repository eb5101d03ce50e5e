"""The project carries its own science: citations point into docs/, at sections that exist.

Code, tests, benchmarks, examples, configs and the top-level documents cite the
theory as ``docs/theory.md §2.4`` (one section sign per section) and the
architecture as ``docs/design.md``. These checks fail on a citation of a
document outside the repository and on a section number that is not a heading
of docs/theory.md.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
SCIENCE_DOC = ROOT / "docs" / "theory.md"
ARCHITECTURE_DOC = ROOT / "docs" / "design.md"
SCANNED_DIRS = ("src", "tests", "benchmarks", "examples", "configs")
SCANNED_FILES = ("README.md", "DEVELOPERS.md", "Makefile", "docs/design.md")
SKIP_SUFFIXES = {".pyc", ".png", ".npz", ".npy", ".gz"}

# Citations of the team notes that lived outside the repository. The first letter
# sits in a character class so that a plain grep for the old names does not list
# this file as one of their readers.
OUTSIDE = [
    re.compile(r"\b[T]HEORY\b"),  # with or without ".md"
    re.compile(r"\b[D]ESIGN\.md\b"),
    re.compile(r"\b[S]TYLE\.md\b"),
    re.compile(r"\.\./[s]hared\b"),
    re.compile(r"\b[s]hared/"),
]
# "docs/theory.md §2.4", "docs/theory.md §2.7, §2.9", "docs/theory.md §1.1 and §2.8"
CITATION = re.compile(r"docs/theory\.md((?:\s*(?:,|and|or)?\s*§\s*\d+(?:\.\d+)*)+)")
SECTION = re.compile(r"§\s*(\d+(?:\.\d+)*)")
HEADING = re.compile(r"^#{1,6}\s+(\d+(?:\.\d+)*)\.?\s", re.MULTILINE)


def _files() -> list[Path]:
    out = []
    for name in SCANNED_DIRS:
        for path in sorted((ROOT / name).rglob("*")):
            if path.is_file() and "__pycache__" not in path.parts and path.suffix not in SKIP_SUFFIXES:
                out.append(path)
    out += [ROOT / name for name in SCANNED_FILES if (ROOT / name).is_file()]
    return out


def _text(path: Path) -> str:
    return path.read_bytes().decode("utf-8", errors="ignore")


def theory_sections(text: str) -> set[str]:
    """Section numbers of the headings of a Markdown text: '## 2. Methods' -> '2', '### 2.10 ...' -> '2.10'."""
    return set(HEADING.findall(text))


def cited_sections(text: str) -> list[tuple[int, str]]:
    """(line, section) of every ``docs/theory.md §X.Y`` citation in ``text``."""
    out = []
    for m in CITATION.finditer(text):
        line = text.count("\n", 0, m.start()) + 1
        out += [(line, s) for s in SECTION.findall(m.group(1))]
    return out


def outside_citations(text: str) -> list[tuple[int, str]]:
    out = []
    for number, line in enumerate(text.splitlines(), 1):
        for pattern in OUTSIDE:
            m = pattern.search(line)
            if m:
                out.append((number, m.group(0)))
    return out


def test_docs_exist_and_are_linked():
    assert SCIENCE_DOC.is_file() and ARCHITECTURE_DOC.is_file()
    for name in ("README.md", "DEVELOPERS.md"):
        text = _text(ROOT / name)
        assert "docs/theory.md" in text and "docs/design.md" in text, name


def test_theory_keeps_its_section_numbers():
    # The numbering every citation relies on: 0, 1.1-1.3, 2.1-2.10, 3.1-3.3, 4, 5.
    expected = {"0", "1", "1.1", "1.2", "1.3", "2", *(f"2.{k}" for k in range(1, 11)),
                "3", "3.1", "3.2", "3.3", "4", "5"}
    found = theory_sections(_text(SCIENCE_DOC))
    assert expected <= found, sorted(expected - found)


def test_parsers_on_known_text():
    # The parsers themselves, on text whose answer is known, so the checks below can fail.
    doc = "# Title\n## 2. Methods\n### 2.10 Summary\n### 3.1 Definitions [DER]\n"
    assert theory_sections(doc) == {"2", "2.10", "3.1"}
    text = "a (docs/theory.md §2.7, §2.9)\nb docs/theory.md §1.1 and §2.8.\nc §9.9 alone"
    assert cited_sections(text) == [(1, "2.7"), (1, "2.9"), (2, "1.1"), (2, "2.8")]
    # The old names are built from pieces here, so that this file itself passes the check.
    old_name, folder = "THEO" + "RY", "sha" + "red"
    hits = outside_citations(f"see {old_name}.md 2.4 and ../{folder}/x")
    assert [hit for _, hit in hits] == [old_name, f"../{folder}", f"{folder}/"]


@pytest.mark.parametrize("path", _files(), ids=lambda p: str(p.relative_to(ROOT)))
def test_no_citation_outside_the_repository(path):
    hits = outside_citations(_text(path))
    assert not hits, "; ".join(f"{path.relative_to(ROOT)}:{line}: {hit}" for line, hit in hits)


def test_cited_theory_sections_exist():
    sections = theory_sections(_text(SCIENCE_DOC))
    missing = [f"{path.relative_to(ROOT)}:{line}: §{s}" for path in _files()
               for line, s in cited_sections(_text(path)) if s not in sections]
    assert not missing, "docs/theory.md has no such section: " + "; ".join(missing)
