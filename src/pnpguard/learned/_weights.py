"""Saving and loading network weights in one safe, self-describing format.

A weights file is written by :func:`torch.save` and holds only a dictionary of
strings, numbers, lists and tensors::

    {"format": "pnpguard-weights", "format_version": 1,
     "architecture": "ResidualCNN" or "AveragedCNN",
     "config": {constructor arguments},
     "training": {settings of the run that produced the weights},
     "state_dict": {parameter name: tensor}}

It is read back with ``torch.load(..., weights_only=True)``, which refuses
anything but tensors and plain containers, so loading a file never runs code
stored in it.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import torch
from torch import nn

from .._fileformat import check_format

FORMAT = "pnpguard-weights"
FORMAT_VERSION = 1


def save_weights(
    path: str | Path,
    model: nn.Module,
    *,
    architecture: str,
    training: dict[str, Any],
) -> Path:
    """Write ``model``'s weights and configuration to ``path``.

    Parameters
    ----------
    path : str or pathlib.Path
        Destination file (conventionally ending in ``.pt``).
    model : torch.nn.Module
        A network with a ``config()`` method returning its constructor arguments.
    architecture : str
        Class name recorded in the file.
    training : dict
        Plain settings of the training run (numbers, strings, lists).

    Returns
    -------
    pathlib.Path
        The path written.
    """
    path = Path(path)
    state = {name: tensor.detach().cpu().clone() for name, tensor in model.state_dict().items()}
    payload = {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "architecture": architecture,
        "config": dict(model.config()),
        "training": dict(training),
        "state_dict": state,
    }
    path.parent.mkdir(parents=True, exist_ok=True)
    torch.save(payload, path)
    return path


def read_weights(path: str | Path) -> dict[str, Any]:
    """Read a weights file safely and check its layout.

    Parameters
    ----------
    path : str or pathlib.Path
        A file written by :func:`save_weights`.

    Returns
    -------
    dict
        The payload described in the module docstring.

    Raises
    ------
    FileNotFoundError
        If ``path`` does not exist.
    ValueError
        If the file is not a pnpguard weights file of a supported version.
    """
    path = Path(path)
    if not path.is_file():
        raise FileNotFoundError(f"`path` {str(path)!r} is not a file")
    payload = torch.load(path, map_location="cpu", weights_only=True)
    check_format(payload, f"`path` {str(path)!r}", FORMAT, FORMAT_VERSION)
    expected = {"architecture": str, "config": dict, "training": dict, "state_dict": dict}
    missing = sorted(key for key, kind in expected.items() if not isinstance(payload.get(key), kind))
    if missing:
        raise ValueError(f"`path` {str(path)!r} lacks valid entries {missing}")
    for name, tensor in payload["state_dict"].items():
        if not isinstance(tensor, torch.Tensor):
            raise TypeError(f"`path` {str(path)!r}: entry {name!r} is not a tensor")
        if not bool(torch.isfinite(tensor).all()):
            raise ValueError(f"`path` {str(path)!r}: entry {name!r} has non-finite values")
    return payload
