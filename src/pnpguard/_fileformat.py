"""The check every file of our own layout starts with: its format name and version."""

from __future__ import annotations

from typing import Any


def check_format(document: Any, source: str, name: str, version: int) -> dict[str, Any]:
    """Return ``document`` when it is a dict of format ``name``, version ``version``.

    Parameters
    ----------
    document : object
        What was read from the file.
    source : str
        How error messages name the file (for example its quoted path).
    name : str
        The expected ``"format"`` entry.
    version : int
        The ``"format_version"`` this version of pnpguard reads.

    Raises
    ------
    ValueError
        If ``document`` is not a dict whose ``"format"`` is ``name``, or its
        ``"format_version"`` differs from ``version``.
    """
    if not isinstance(document, dict) or document.get("format") != name:
        raise ValueError(f"{source} is not a {name} file")
    if document.get("format_version") != version:
        raise ValueError(
            f"{source} has format version {document.get('format_version')!r}; this version of "
            f"pnpguard reads version {version}"
        )
    return document
