"""Sample images of the check and the scale of its perturbations."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import torch

from .._arrays import ArrayKind, to_tensor
from ..denoisers import Denoiser


def split_samples(sample: Any) -> tuple[list[torch.Tensor], ArrayKind]:
    """The sample images as ``(1, C, H, W)`` tensor copies, and the kind of array given."""
    items = list(sample) if isinstance(sample, (list, tuple)) else [sample]
    if not items:
        raise ValueError("`sample` is empty: give at least one image")
    tensors, kinds = [], []
    for number, item in enumerate(items):
        name = "sample" if len(items) == 1 else f"sample[{number}]"
        tensor, kind = to_tensor(item, name)
        tensors.extend(
            [tensor.reshape(1, 1, *tensor.shape)] if tensor.ndim == 2 else list(tensor.split(1))
        )
        kinds.append(kind)
    # Images of different sizes are fine: each is a base point of its own.
    dtypes = {t.dtype for t in tensors}
    if len(dtypes) > 1:
        raise ValueError(f"`sample` images must share one dtype, got {sorted(map(str, dtypes))}")
    return [t.clone() for t in tensors], kinds[0]


def reference_sigma(denoiser: Denoiser, samples: Sequence[torch.Tensor]) -> float:
    """Perturbation unit: the denoiser's ``sigma``, else a tenth of the samples' spread."""
    if denoiser.sigma is not None:
        return denoiser.sigma
    spread = max(float(s.double().std()) for s in samples)
    return 0.1 * spread if spread > 0 else 0.1
