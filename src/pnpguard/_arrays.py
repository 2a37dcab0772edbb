"""Array conventions shared by every public function.

Public functions accept numpy arrays or torch tensors shaped ``(H, W)`` or
``(N, C, H, W)`` and return the same kind, dtype and device they were given.
Internally everything is a torch tensor whose trailing two axes are the image.
Integer, boolean, complex and half-precision inputs are rejected rather than
converted, because a silent cast would change the meaning of the intensities.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Union

import numpy as np
import torch

ArrayLike = Union[np.ndarray, torch.Tensor]

_FLOAT_DTYPES = (torch.float32, torch.float64)


@dataclass(frozen=True)
class ArrayKind:
    """What a caller passed in, so that results can be handed back alike.

    Attributes
    ----------
    is_numpy : bool
        True for a numpy array, False for a torch tensor.
    dtype : torch.dtype
        Floating dtype of the input.
    device : torch.device
        Device of the input (CPU for numpy).
    """

    is_numpy: bool
    dtype: torch.dtype
    device: torch.device


def _dtype_name(x: Any) -> str:
    return str(getattr(x, "dtype", type(x).__name__)).replace("torch.", "")


def to_tensor(
    x: Any,
    name: str,
    *,
    ndims: tuple[int, ...] = (2, 4),
    check_finite: bool = True,
) -> tuple[torch.Tensor, ArrayKind]:
    """Convert a numpy array or torch tensor to a float tensor, validating it.

    Parameters
    ----------
    x : numpy.ndarray or torch.Tensor
        The caller's array. It is never modified.
    name : str
        Argument name used in error messages.
    ndims : tuple of int, optional
        Accepted numbers of dimensions.
    check_finite : bool, optional
        Reject NaN or infinite entries.

    Returns
    -------
    tensor : torch.Tensor
        float32 or float64 tensor (shares memory with ``x`` where possible;
        callers must not write into it).
    kind : ArrayKind
        What to convert results back to.

    Raises
    ------
    TypeError
        If ``x`` is not an array or its dtype is not float32 or float64.
    ValueError
        If the number of dimensions is not accepted or entries are not finite.
    """
    if isinstance(x, torch.Tensor):
        tensor = x.detach()
        is_numpy = False
    elif isinstance(x, np.ndarray):
        if x.dtype not in (np.float32, np.float64):
            raise TypeError(_dtype_message(name, x))
        tensor = torch.from_numpy(np.ascontiguousarray(x))
        is_numpy = True
    else:
        raise TypeError(
            f"`{name}` must be a numpy array or a torch tensor, got {type(x).__name__}"
        )
    if tensor.dtype not in _FLOAT_DTYPES:
        raise TypeError(_dtype_message(name, x))
    if tensor.ndim not in ndims:
        expected = " or ".join(_layout_name(n) for n in ndims)
        raise ValueError(
            f"`{name}` must be shaped {expected}, got shape {tuple(tensor.shape)}"
        )
    if check_finite and not all_finite(tensor):
        bad = int((~torch.isfinite(tensor)).sum())
        raise ValueError(f"`{name}` has {bad} non-finite entries (NaN or inf)")
    return tensor, ArrayKind(is_numpy, tensor.dtype, tensor.device)


def all_finite(tensor: torch.Tensor) -> bool:
    """True when every entry is finite.

    A NaN or an infinity makes the sum non-finite, so a finite sum proves every
    entry finite at the cost of one reduction; only a non-finite sum (which a
    sum of huge finite values can also produce) needs the entry-wise test.
    """
    if bool(torch.isfinite(tensor.sum())):
        return True
    return bool(torch.isfinite(tensor).all())


def _layout_name(ndim: int) -> str:
    return {2: "(H, W)", 3: "(C, H, W)", 4: "(N, C, H, W)"}.get(ndim, f"{ndim}-D")


def _dtype_message(name: str, x: Any) -> str:
    return (
        f"`{name}` has dtype {_dtype_name(x)}; expected float32 or float64. "
        "Convert explicitly (e.g. `image.astype(np.float64) / 255` for 8-bit data) "
        "so that the intensity scale is your decision."
    )


def from_tensor(tensor: torch.Tensor, kind: ArrayKind) -> ArrayLike:
    """Return ``tensor`` as the kind of array described by ``kind``."""
    tensor = tensor.detach().to(dtype=kind.dtype)
    if kind.is_numpy:
        return tensor.cpu().numpy().copy()
    return tensor.to(kind.device)


def as_float_tensor(x: Any, name: str, *, dtype: torch.dtype = torch.float64) -> torch.Tensor:
    """Convert a small parameter array (a PSF, a mask) to a finite tensor.

    Unlike :func:`to_tensor` this accepts any real numeric dtype, including
    booleans and integers, because parameters such as masks are naturally
    integer valued; the values are converted exactly to ``dtype``.
    """
    if isinstance(x, torch.Tensor):
        tensor = x.detach()
    else:
        array = np.asarray(x)
        if array.dtype.kind not in "biuf":
            raise TypeError(f"`{name}` must hold real numbers, got dtype {array.dtype}")
        tensor = torch.from_numpy(np.array(array, dtype=np.float64))
    if tensor.is_complex():
        raise TypeError(f"`{name}` must hold real numbers, got dtype {_dtype_name(tensor)}")
    tensor = tensor.to(dtype)
    if not bool(torch.isfinite(tensor).all()):
        raise ValueError(f"`{name}` has non-finite entries (NaN or inf)")
    return tensor


def check_image_shape(tensor: torch.Tensor, expected: tuple[int, int], name: str, what: str) -> None:
    """Raise if the trailing two axes of ``tensor`` are not ``expected``."""
    if tuple(tensor.shape[-2:]) != tuple(expected):
        raise ValueError(
            f"`{name}` has shape {tuple(tensor.shape)} but the {what} is "
            f"{tuple(expected)} (in the last two axes)"
        )

