"""The repository's own physics notes (docs/physics.md): every section the code cites exists.

Code, configs and captions cite the notes by section ("§5b"); the sections keep their numbers so
that a citation stays right. Outside reference: the files of this repository.
"""

from __future__ import annotations

import re

from rig_process import REPO

NOTES = REPO / "docs" / "physics.md"
CITATION = re.compile(r"(?:PHYSICS\.md|docs/physics\.md)[ ,]*(?:§|section |sec\. |s\.) ?(\d+b?)")


def _sections() -> set[str]:
    return set(re.findall(r"^## (\d+b?)\. ", NOTES.read_text(encoding="utf-8"), re.MULTILINE))


def test_the_notes_have_the_sections_one_to_seven_and_5b() -> None:
    """§1 to §7 and §5b, in that order."""
    found = re.findall(r"^## (\d+b?)\. ", NOTES.read_text(encoding="utf-8"), re.MULTILINE)
    assert found == ["1", "2", "3", "4", "5", "5b", "6", "7"]


def test_every_cited_section_exists() -> None:
    """Each section number cited in the code, configs, tests and docs is a section of the notes."""
    sections = _sections()
    cited: dict[str, list[str]] = {}
    for folder in ("autotune", "drivers_sim", "configs", "tests", "examples", "benchmarks"):
        for path in (REPO / folder).rglob("*"):
            if path.suffix in (".py", ".toml", ".md") and path.is_file():
                for number in CITATION.findall(path.read_text(encoding="utf-8")):
                    cited.setdefault(number, []).append(str(path.relative_to(REPO)))
    for path in (REPO / "README.md", REPO / "DEVELOPERS.md"):
        for number in CITATION.findall(path.read_text(encoding="utf-8")):
            cited.setdefault(number, []).append(path.name)
    assert cited, "no citation found: the pattern no longer matches the code's citations"
    missing = {n: files for n, files in cited.items() if n not in sections}
    assert not missing, missing


def test_every_formula_section_names_a_source() -> None:
    """Sections 2 to 5b each name at least one published source (a journal or a book with its
    year) or say the result is our own derivation."""
    text = NOTES.read_text(encoding="utf-8")
    parts = re.split(r"^## ", text, flags=re.MULTILINE)
    for part in parts:
        number = part.split(".", 1)[0]
        if number in ("2", "3", "4", "5", "5b"):
            assert re.search(r"\(\d{4}\)|\d{4}\)", part), number


def test_every_document_named_is_in_the_repository() -> None:
    """Every Markdown file that code, configs, tests or documents name exists in this
    repository (notes kept outside it were cited 95 times; a reader could open none)."""
    named = re.compile(r"(?<![\w/.-])([\w./-]+\.md)\b")
    missing: dict[str, list[str]] = {}
    paths = [p for folder in ("autotune", "drivers_sim", "configs", "tests", "examples",
                              "benchmarks", "docs") for p in (REPO / folder).rglob("*")]
    paths += [REPO / "README.md", REPO / "DEVELOPERS.md"]
    for path in paths:
        if path.suffix not in (".py", ".toml", ".md") or not path.is_file():
            continue
        for name in named.findall(path.read_text(encoding="utf-8")):
            candidates = (REPO / name, path.parent / name, REPO / "docs" / name)
            if not any(candidate.is_file() for candidate in candidates):
                missing.setdefault(name, []).append(str(path.relative_to(REPO)))
    assert not missing, missing
