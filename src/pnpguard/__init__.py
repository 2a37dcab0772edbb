"""pnpguard: convergent plug-and-play image reconstruction.

Measure a denoiser (averagedness, Lipschitz constants), turn the measurements
into admissible step sizes through published theorems or refuse with a reason,
and monitor every run's fixed-point residual.

The public names are imported on first use (PEP 562): ``import pnpguard``
alone loads no torch, so the command line starts quickly; the first attribute
access (``pnpguard.forward_backward``, ``from pnpguard import *``) imports
:mod:`pnpguard._api`, which holds the export list.
"""

from __future__ import annotations

import importlib
import importlib.util
from typing import Any

from ._version import package_version

__version__ = package_version()


def __getattr__(name: str) -> Any:
    if name.startswith("_") and name != "__all__":
        raise AttributeError(f"module 'pnpguard' has no attribute {name!r}")
    if importlib.util.find_spec(f"pnpguard.{name}") is not None:  # a subpackage: import it alone
        return importlib.import_module(f"pnpguard.{name}")
    _api = importlib.import_module("pnpguard._api")
    exported = {key: getattr(_api, key) for key in _api.__all__}
    globals().update(exported, __all__=_api.__all__)
    if name in globals():
        return globals()[name]
    raise AttributeError(f"module 'pnpguard' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__getattr__("__all__")))
