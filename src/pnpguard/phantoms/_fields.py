"""Smooth random fields defined on continuous phantom coordinates."""

from __future__ import annotations

import math

import numpy as np


class SmoothField:
    """Random sum of plane waves with unit variance: sqrt(2/K) sum_k cos(w_k . z + phase_k).

    Frequencies are drawn uniformly in ``[low, high]`` cycles per phantom unit,
    directions uniformly. The field is evaluated on a grid: called with ``x`` of
    shape ``(1, n)`` and ``y`` of shape ``(m, 1)`` (as ``render`` passes them) it
    returns the ``(m, n)`` values, using two small matrix products since each
    wave is separable.
    """

    def __init__(self, rng: np.random.Generator, low: float, high: float, modes: int = 24):
        freq = 2.0 * math.pi * rng.uniform(low, high, modes)
        direction = rng.uniform(0.0, 2.0 * math.pi, modes)
        self.u, self.v = freq * np.cos(direction), freq * np.sin(direction)
        self.phase = rng.uniform(0.0, 2.0 * math.pi, modes)
        self.scale = math.sqrt(2.0 / modes)

    def __call__(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        # cos(a + b) = cos a cos b - sin a sin b with a = u x + phase, b = v y.
        a = np.outer(self.u, x.ravel()) + self.phase[:, None]
        b = np.outer(y.ravel(), self.v)
        return self.scale * (np.cos(b) @ np.cos(a) - np.sin(b) @ np.sin(a))
