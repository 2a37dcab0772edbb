"""One entry point for every test image, by name."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from .._validation import unknown_message
from ._cells import cells
from ._ellipses import porous_disk, random_ellipses, shepp_logan
from ._grid import check_seed, check_shape
from ._natural import natural_image, natural_image_names
from ._smooth import piecewise_smooth
from ._targets import siemens_star

_NATURAL_PREFIX = "natural:"

_GENERATED: dict[str, Callable[..., np.ndarray]] = {
    "cells": lambda shape, seed: cells(shape, seed=seed),
    "piecewise_smooth": lambda shape, seed: piecewise_smooth(shape, seed=seed),
    "porous_disk": lambda shape, seed: porous_disk(shape, seed=seed),
    "random_ellipses": lambda shape, seed: random_ellipses(shape, seed=seed),
    "shepp_logan": lambda shape, seed: shepp_logan(shape),
    "siemens_star": lambda shape, seed: siemens_star(shape),
}


def phantom_names() -> tuple[str, ...]:
    """Names accepted by :func:`make_phantom`, sorted.

    Returns
    -------
    tuple of str
        The generated phantoms ``cells``, ``piecewise_smooth``,
        ``porous_disk``, ``random_ellipses``, ``shepp_logan`` (modified
        contrast) and ``siemens_star`` (36 spokes), and the bundled natural
        images as ``natural:<name>`` (see :func:`natural_image_names`).
    """
    natural = (_NATURAL_PREFIX + name for name in natural_image_names())
    return tuple(sorted((*_GENERATED, *natural)))


def make_phantom(name: str, shape: int | tuple[int, int], *,
                 seed: int | np.random.Generator = 0) -> np.ndarray:
    """Make a test image by name, with each generator's default options.

    Parameters
    ----------
    name : str
        One of :func:`phantom_names`.
    shape : int or (int, int)
        Image size ``(H, W)``; an int means square.
    seed : int or numpy.random.Generator, optional
        Seed for the random phantoms; ``shepp_logan``, ``siemens_star`` and the
        natural images are deterministic and only check it.

    Returns
    -------
    numpy.ndarray
        float64 array of shape ``(H, W)`` in ``[0, 1]``.

    Raises
    ------
    ValueError
        If ``name`` is unknown (the message lists the valid names, sorted, and
        the closest match), or ``shape`` / ``seed`` are invalid.

    Examples
    --------
    >>> make_phantom("porous_disk", (48, 64), seed=4).shape
    (48, 64)
    """
    shape = check_shape(shape)
    check_seed(seed)
    if name in _GENERATED:
        return _GENERATED[name](shape, seed)
    if isinstance(name, str) and name.startswith(_NATURAL_PREFIX) and (
            name[len(_NATURAL_PREFIX):] in natural_image_names()):
        return natural_image(name[len(_NATURAL_PREFIX):], shape)
    raise ValueError(unknown_message("phantom name", name, phantom_names()))
