"""Shared test utilities (dense matrices of operators, random data)."""

from __future__ import annotations

import numpy as np
import torch


def dense_matrix(op) -> np.ndarray:
    """The matrix of a pnpguard operator, column by column (float64)."""
    h, w = op.in_shape
    basis = torch.eye(h * w, dtype=torch.float64).reshape(h * w, h, w)
    columns = op.apply(basis).reshape(h * w, -1)
    return columns.T.numpy()


def assert_close(actual, expected, *, rtol: float, atol: float = 0.0, what: str = "values") -> None:
    """Like numpy's allclose, with a message that locates the worst entry."""
    actual = np.asarray(actual, dtype=np.float64)
    expected = np.asarray(expected, dtype=np.float64)
    assert actual.shape == expected.shape, f"{what}: shape {actual.shape} != {expected.shape}"
    error = np.abs(actual - expected)
    allowed = atol + rtol * np.abs(expected)
    bad = error > allowed
    if bad.any():
        index = np.unravel_index(np.argmax(error - allowed), error.shape)
        raise AssertionError(
            f"{what}: {int(bad.sum())} of {bad.size} entries differ; worst at {index}: "
            f"{actual[index]!r} vs {expected[index]!r} (abs diff {error[index]:.3e}, "
            f"max abs diff {error.max():.3e})"
        )
