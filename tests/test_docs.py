"""The contributor documents point only at files of this repository, and the theory
document covers every formula the guarantees are computed from."""

from __future__ import annotations

import inspect
import re
from pathlib import Path

import pytest

from pnpguard.guarantee import _theorems

ROOT = Path(__file__).resolve().parent.parent
DOCUMENTS = [ROOT / "README.md", ROOT / "DEVELOPERS.md", *sorted((ROOT / "docs").glob("*.md"))]

# Markdown link targets `[text](target)` and code spans naming a markdown file.
_LINK = re.compile(r"\]\(([^)#\s]+)[^)]*\)")
_CODE_MD = re.compile(r"`([^`\s]+\.md)`")


def referenced_files(document: Path) -> list[str]:
    text = document.read_text()
    targets = _LINK.findall(text) + _CODE_MD.findall(text)
    return [t for t in targets if "://" not in t and not t.startswith("mailto:")]


@pytest.mark.parametrize("document", DOCUMENTS, ids=lambda p: p.relative_to(ROOT).as_posix())
def test_referenced_files_are_inside_the_repository(document):
    for target in referenced_files(document):
        resolved = (document.parent / target).resolve()
        assert resolved.is_relative_to(ROOT), f"{document.name} points outside the repository: {target}"
        assert resolved.exists(), f"{document.name} points at a missing file: {target}"


def test_developers_guide_links_the_theory_document():
    assert "docs/theory.md" in referenced_files(ROOT / "DEVELOPERS.md")


def test_theory_document_has_a_section_for_each_formula():
    text = (ROOT / "docs" / "theory.md").read_text()
    formulas = [name for name, _ in inspect.getmembers(_theorems, inspect.isfunction)
                if not name.startswith("_") and inspect.getmodule(_) is _theorems]
    assert formulas
    missing = [name for name in formulas if f"`{name}`" not in text]
    assert not missing, f"docs/theory.md does not mention {missing}"
