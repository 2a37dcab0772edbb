"""Validation of arguments, with messages that name the argument.

Names that must be one of a set (phantoms, tasks, suites, shipped denoisers)
are rejected with the valid ones listed, sorted, and the closest match.
"""

from __future__ import annotations

import difflib
from collections.abc import Iterable
from typing import Any


def unknown_message(what: str, value: Any, valid: Iterable[str]) -> str:
    """``unknown <what> <value>; valid: <sorted list>; did you mean <closest>?``.

    The closest match is :func:`difflib.get_close_matches` of ``str(value)``
    among the valid names; the hint is left out when nothing is close.
    """
    names = sorted(valid)
    close = difflib.get_close_matches(str(value), names, n=1)
    hint = f"; did you mean {close[0]!r}?" if close else ""
    return f"unknown {what} {value!r}; valid: {', '.join(map(repr, names))}{hint}"
