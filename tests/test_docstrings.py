"""Every docstring example in the package runs and shows what it prints (doctest).

Each module's examples run in a copy of the module's namespace, as
``python -m doctest`` would run them, with the suite's torch settings
(``conftest.py``); examples must not depend on the thread count or on timing.
"""

from __future__ import annotations

import doctest
import importlib
import pkgutil
import re

import pytest

import pnpguard

#: ``python -m pnpguard`` runs the command line when imported: no docstrings to run there.
_NOT_IMPORTED = {"pnpguard.__main__"}


def _module_names() -> list[str]:
    found = pkgutil.walk_packages(pnpguard.__path__, prefix=f"{pnpguard.__name__}.")
    return sorted({pnpguard.__name__} | {info.name for info in found} - _NOT_IMPORTED)


MODULES = _module_names()
#: A numpydoc "Examples" section heading.
_EXAMPLES_HEADING = re.compile(r"^\s*Examples\n\s*-{8}\s*$", re.MULTILINE)


def _docstring_tests(name: str) -> list[doctest.DocTest]:
    return doctest.DocTestFinder(exclude_empty=False).find(importlib.import_module(name), name)


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples_run(name):
    runner = doctest.DocTestRunner(optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    output: list[str] = []
    for test in _docstring_tests(name):
        runner.run(test, out=output.append)
    assert runner.failures == 0, f"{runner.failures} of {runner.tries} examples in {name} failed:\n" + "".join(output)


@pytest.mark.parametrize("name", MODULES)
def test_every_examples_section_has_examples(name):
    # an "Examples" section written without ">>>" prompts would never run
    empty = [
        test.name
        for test in _docstring_tests(name)
        if test.docstring and _EXAMPLES_HEADING.search(test.docstring) and not test.examples
    ]
    assert not empty, f"Examples sections without doctest examples: {empty}"


def test_the_walk_reaches_the_modules_with_examples():
    # guards against a walk that silently finds nothing (the package's own doctests exist)
    with_examples = [name for name in MODULES if any(test.examples for test in _docstring_tests(name))]
    for expected in ("pnpguard.metrics", "pnpguard.denoisers._wrap", "pnpguard.bench"):
        assert expected in with_examples
