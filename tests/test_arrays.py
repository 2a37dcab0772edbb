"""The array convention helpers."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from pnpguard._arrays import all_finite, from_tensor, to_tensor


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_all_finite_matches_the_entrywise_test(dtype):
    rng = np.random.default_rng(0)
    big = torch.finfo(dtype).max / 4
    cases = [
        torch.from_numpy(rng.random((8, 8))).to(dtype),
        torch.full((64,), big, dtype=dtype),  # finite entries whose sum overflows
        torch.tensor([1.0, float("nan")], dtype=dtype),
        torch.tensor([float("inf"), -float("inf")], dtype=dtype),
        torch.tensor([1.0, -float("inf")], dtype=dtype),
    ]
    for case in cases:
        # Reference: the entry-wise definition, numpy.isfinite.
        assert all_finite(case) == bool(np.isfinite(case.numpy()).all())


def test_round_trip_keeps_kind_and_copies_numpy():
    image = np.ones((4, 5), dtype=np.float32)
    tensor, kind = to_tensor(image, "image")
    back = from_tensor(tensor * 2, kind)
    assert isinstance(back, np.ndarray) and back.dtype == np.float32
    assert not np.shares_memory(back, image) and image[0, 0] == 1.0
