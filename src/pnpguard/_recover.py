"""Reconstruction from files: the forward model from a PSF, mask or system matrix file, batches, records.

The work behind ``pnpguard recover``: build the operator from a file,
arrange colour images and stacks as one ``(N, C, H, W)`` batch, check the
denoiser once, run, and write the result with a JSON record beside it. The
record layout::

    {"format": "pnpguard-recover-record", "format_version": 1, "created": ...,
     "inputs": {"data": {...}, "operator": {...}},
     "parameters": {...}, "operator": {"description", "norm", "norm_basis", "norm_method"},
     "check": {...}, "guarantee": {...}, "run": {...}, "monitor_flags": [...],
     "output": {"path", "format", "dtype", "shape", "scaling", "clipped"},
     "notes": [...], "versions": {...}, "caution": ...}
"""

from __future__ import annotations

import json
import os
import tempfile
from datetime import datetime, timezone
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import scipy.sparse
import torch

from ._caution import CAUTION
from ._imagefiles import NPY_SUFFIXES, ImageFile, ImageFileError, read_image, sha256
from .bench._results import check_summary, environment, finite_or_none, flag_summary, guarantee_summary
from .operators import Convolution, LinearOperator, PixelMask, as_operator
from .solvers import Reconstruction

RECORD_FORMAT = "pnpguard-recover-record"
RECORD_VERSION = 1

#: The forward models a file can give, with the suffixes each accepts.
OPERATOR_FILES = {
    "psf": (".npy", ".png", ".tif", ".tiff"),
    "mask": (".npy", ".png", ".tif", ".tiff"),
    "matrix": (".npy", ".npz"),
}


def _grey(file: ImageFile, what: str) -> np.ndarray:
    if file.layout != "grey":
        raise ImageFileError(f"{what} file {file.path!r} has shape {file.values.shape}; expected a 2-D (H, W) array")
    return file.values


def psf_operator(path: str, shape: tuple[int, int]) -> tuple[LinearOperator, dict[str, Any]]:
    """A periodic convolution with the PSF in ``path``, normalised to unit sum."""
    kernel = _grey(read_image(path, what="PSF"), "PSF")
    total = float(kernel.sum())
    if not total > 0:
        raise ImageFileError(
            f"PSF file {path!r} sums to {total:g}; a PSF must have a positive sum (it is normalised to 1)"
        )
    try:
        op = Convolution(kernel / total, shape)
    except ValueError as error:
        raise ImageFileError(f"PSF file {path!r}: {error}") from None
    return op, {"kind": "psf", "path": path, "sha256": sha256(path), "shape": list(kernel.shape),
                "normalised": f"divided by its sum {total:.6g}", "boundary": "periodic"}


def mask_operator(path: str, shape: tuple[int, int]) -> tuple[LinearOperator, dict[str, Any]]:
    """A pixel mask from a binary file: 0 (missing) and one nonzero value (observed)."""
    values = _grey(read_image(path, what="mask"), "mask")
    levels = np.unique(values)
    nonzero = levels[levels != 0]
    if nonzero.size > 1:
        raise ImageFileError(
            f"mask file {path!r} is not binary: it holds {levels.size} distinct values (e.g. "
            f"{nonzero[0]:g} and {nonzero[1]:g}); expected 0 (missing) and one other value (observed)"
        )
    if values.shape != tuple(shape):
        raise ImageFileError(f"mask file {path!r} has shape {values.shape} but the data frames are {tuple(shape)}")
    observed = values != 0
    return PixelMask(observed), {"kind": "mask", "path": path, "sha256": sha256(path),
                                 "observed_fraction": float(observed.mean())}


def matrix_operator(
    path: str, image_shape: tuple[int, int], data_shape: tuple[int, int], norm: float | None
) -> tuple[LinearOperator, dict[str, Any]]:
    """A system matrix from ``.npy`` (dense) or ``.npz`` (scipy.sparse.save_npz), via :func:`as_operator`."""
    file = Path(path)
    if not file.is_file():
        raise ImageFileError(f"matrix file {path!r} does not exist")
    try:
        matrix = np.load(file, allow_pickle=False) if file.suffix.lower() in NPY_SUFFIXES else scipy.sparse.load_npz(file)
    except Exception as error:  # noqa: BLE001 - any reader failure means a bad file
        reason = " ".join(str(error).split()) or type(error).__name__
        raise ImageFileError(f"matrix file {path!r} cannot be read: {reason}") from None
    try:
        op = as_operator(matrix, image_shape, data_shape, norm=norm, name=file.name)
    except (TypeError, ValueError) as error:
        raise ImageFileError(f"matrix file {path!r}: {error}") from None
    return op, {"kind": "matrix", "path": path, "sha256": sha256(path), "shape": list(matrix.shape),
                "storage": "sparse" if scipy.sparse.issparse(matrix) else "dense", "image_shape": list(image_shape)}


def as_batch(values: np.ndarray, layout: str) -> torch.Tensor:
    """``(H, W)`` as it is, colour ``(C, H, W)`` as ``(1, C, H, W)``, a stack ``(N, H, W)`` as ``(N, 1, H, W)``."""
    tensor = torch.from_numpy(np.ascontiguousarray(values, dtype=np.float64))
    if layout == "colour":
        return tensor[None]
    if layout == "stack":
        return tensor[:, None]
    return tensor


def from_batch(tensor: torch.Tensor, layout: str) -> np.ndarray:
    """The inverse of :func:`as_batch`."""
    array = tensor.detach().cpu().numpy()
    if layout == "colour":
        return array[0]
    if layout == "stack":
        return array[:, 0]
    return array


def check_writable(paths: list[Path], overwrite: bool) -> None:
    """Refuse before any work: an existing output (without ``overwrite``), a directory, an unwritable folder."""
    for path in paths:
        if path.is_dir():
            raise ImageFileError(f"output {str(path)!r} is a directory; expected a file name")
        if path.exists() and not overwrite:
            raise ImageFileError(f"output {str(path)!r} exists; pass --overwrite to replace it")
        folder = path.parent if str(path.parent) else Path(".")
        if not folder.is_dir():
            raise ImageFileError(f"cannot write {str(path)!r}: folder {str(folder)!r} does not exist")
        if not os.access(folder, os.W_OK):
            raise ImageFileError(f"cannot write {str(path)!r}: folder {str(folder)!r} is not writable")


def write_all(writers: list[tuple[Path, Callable[[Path], None]]]) -> None:
    """Write every file to a temporary name in its folder, then rename them all.

    When a write fails, the temporary files are removed and no output is
    left behind; the error propagates.
    """
    done: list[tuple[Path, Path]] = []
    try:
        for target, write in writers:
            handle, name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=target.suffix, dir=target.parent)
            os.close(handle)
            temporary = Path(name)
            done.append((temporary, target))
            write(temporary)
        for temporary, target in done:
            os.replace(temporary, target)
    except BaseException:
        for temporary, _ in done:
            temporary.unlink(missing_ok=True)
        raise


def record(
    *,
    data: ImageFile,
    model: dict[str, Any],
    op: LinearOperator,
    parameters: dict[str, Any],
    result: Reconstruction,
    output: Path,
    clipped: int,
    notes: list[str],
) -> dict[str, Any]:
    """The JSON record written beside a result (layout in the module docstring)."""
    bound = op.norm_bound()
    residuals = result.relative_residuals
    guarantee = guarantee_summary(result.guarantee)
    if guarantee is not None:
        guarantee["assumptions"] = list(result.guarantee.assumptions)
    return {
        "format": RECORD_FORMAT,
        "format_version": RECORD_VERSION,
        "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "inputs": {"data": data.describe(), "operator": model},
        "parameters": {**parameters, "step": result.step, "relaxation": result.relaxation},
        "operator": {"description": repr(op), "norm": bound.value, "norm_basis": bound.basis,
                     "norm_method": bound.method},
        "check": check_summary(result.report),
        "guarantee": guarantee,
        "run": {
            "converged": result.converged,
            "iterations": result.iterations,
            "accelerated_steps": result.accelerated,
            "message": result.message,
            "relative_residual": finite_or_none(residuals[-1]) if len(residuals) else None,
            "seconds": result.seconds,
        },
        "monitor_flags": flag_summary(result.flags),
        "output": {
            "path": str(output),
            "format": output.suffix.lower().lstrip("."),
            "dtype": data.dtype,
            "shape": list(result.x.shape[-2:]) if data.layout == "grey" else
                     [data.values.shape[0], *result.x.shape[-2:]],
            "scaling": data.storing(),
            "clipped": clipped,
        },
        "notes": notes,
        "versions": environment(torch.get_num_threads()),
        "caution": CAUTION,
    }


def write_record(path: Path, document: dict[str, Any]) -> None:
    """The record as indented JSON (no NaN or infinity)."""
    path.write_text(json.dumps(document, indent=1, allow_nan=False) + "\n")
