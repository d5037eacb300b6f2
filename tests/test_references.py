"""The outside values the tests use are written down in the repository, with their sources.

Every citation of a section of docs/references.md (the file's name, then the section's
title in double quotes) in the tests and the code names a section that exists, and
nothing points at files a clone of the repository does not have.
"""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
REFERENCES = ROOT / "docs" / "references.md"
CITATION = re.compile(r'docs/references\.md`*,?\s*(?:#\s*)?"([^"]+)"')


def _sources() -> list[Path]:
    folders = [ROOT / "tests", ROOT / "server", ROOT / "docs"]
    files = [p for folder in folders for p in folder.rglob("*") if p.suffix in (".py", ".md")]
    return files + [ROOT / "README.md", ROOT / "DEVELOPERS.md"]


def test_every_cited_section_of_the_references_exists():
    headings = {
        line[3:].strip()
        for line in REFERENCES.read_text(encoding="utf-8").splitlines()
        if line.startswith("## ")
    }
    cited = {}
    for path in _sources():
        text = path.read_text(encoding="utf-8")
        for match in CITATION.finditer(text.replace("\n#", " ").replace("\n", " ")):
            cited.setdefault(" ".join(match.group(1).split()), path.name)
    assert len(cited) >= 5, cited  # the tests do cite it
    missing = {section: where for section, where in cited.items() if section not in headings}
    assert missing == {}, missing


def test_every_reference_value_says_how_sure_it_is():
    text = REFERENCES.read_text(encoding="utf-8")
    sections = re.split(r"^## ", text, flags=re.M)[1:]
    assert len(sections) >= 8
    labels = ("read in the source", "read in a quotation", "computed", "from memory")
    for section in sections:
        assert any(label in section.lower() for label in labels), section.splitlines()[0]
        assert "Tests:" in section, section.splitlines()[0]


def test_nothing_points_outside_the_repository():
    """A clone has no shared specification or reference folder; nothing may cite one."""
    outside = re.compile(r"shared/(spec|references)|/work/")
    offenders = [
        f"{p.relative_to(ROOT)}:{n}"
        for p in _sources()
        for n, line in enumerate(p.read_text(encoding="utf-8").splitlines(), 1)
        if outside.search(line) and p != Path(__file__)
    ]
    assert offenders == []


def test_property_tests_run_under_the_profile_docs_security_describes():
    """docs/security.md: derandomized by default, fresh examples with HYPOTHESIS_PROFILE=random;
    no test may pin its own randomness and so override the profile."""
    from hypothesis import settings

    from tests.hypothesis_profiles import RANDOM_FACTOR, chosen, examples

    docs = (ROOT / "docs" / "security.md").read_text(encoding="utf-8")
    assert "HYPOTHESIS_PROFILE=random" in docs and "derandomized" in docs
    assert settings.default.derandomize is (chosen() == "ci")
    assert settings.default.database is None
    assert examples(10) == (10 if chosen() == "ci" else 10 * RANDOM_FACTOR)
    pinned = [
        p.name
        for p in (ROOT / "tests").glob("test_*.py")
        if p.name != Path(__file__).name and "derandomize=" in p.read_text(encoding="utf-8")
    ]
    assert pinned == []
