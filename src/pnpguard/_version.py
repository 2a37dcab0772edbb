"""The package version, read without importing the package as a whole."""

from __future__ import annotations

from importlib import metadata

#: The version in ``pyproject.toml``; used when pnpguard runs from a source tree
#: without being installed (a test keeps the two equal).
SOURCE_VERSION = "0.1.0"


def package_version() -> str:
    """The installed distribution's version, or :data:`SOURCE_VERSION` when it is not installed."""
    try:
        return metadata.version("pnpguard")
    except metadata.PackageNotFoundError:
        return SOURCE_VERSION
