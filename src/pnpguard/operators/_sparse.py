"""Sparse CSR matrices as torch tensors: conversion from scipy, per-dtype copies, products.

Shared by the operators that hold an explicit matrix (the parallel-beam
projector, users' system matrices).
"""

from __future__ import annotations

import warnings

import numpy as np
import scipy.sparse
import torch

Shape = tuple[int, int]


def _csr_tensor(
    crow: torch.Tensor, col: torch.Tensor, values: torch.Tensor, size: Shape
) -> torch.Tensor:
    with warnings.catch_warnings():
        # torch flags sparse CSR support as beta on first use.
        warnings.simplefilter("ignore", UserWarning)
        return torch.sparse_csr_tensor(crow, col, values, size=size, check_invariants=False)


def to_torch_csr(matrix: scipy.sparse.csr_matrix) -> torch.Tensor:
    """A scipy CSR matrix as a float64 torch CSR tensor (32-bit indices when they fit)."""
    small = max(matrix.nnz, *matrix.shape) < np.iinfo(np.int32).max
    index_dtype = np.int32 if small else np.int64
    return _csr_tensor(
        torch.from_numpy(matrix.indptr.astype(index_dtype)),
        torch.from_numpy(matrix.indices.astype(index_dtype)),
        torch.from_numpy(matrix.data.astype(np.float64)),
        matrix.shape,
    )


class MatrixCache:
    """A float64 CSR matrix kept once per (dtype, device); copies share indices."""

    def __init__(self, master: torch.Tensor):
        self.master = master
        self._copies = {(master.dtype, master.device): master}

    def like(self, x: torch.Tensor) -> torch.Tensor:
        """The matrix in ``x``'s dtype and on its device."""
        key = (x.dtype, x.device)
        if key not in self._copies:
            m = self.master
            self._copies[key] = _csr_tensor(
                m.crow_indices().to(x.device),
                m.col_indices().to(x.device),
                m.values().to(device=x.device, dtype=x.dtype),
                m.shape,
            )
        return self._copies[key]


def apply_matrix(matrix: torch.Tensor, x: torch.Tensor, out_shape: Shape) -> torch.Tensor:
    """``matrix @ x`` on the flattened trailing two axes of ``x``."""
    lead = x.shape[:-2]
    columns = x.reshape(-1, x.shape[-2] * x.shape[-1]).T.contiguous()
    return (matrix @ columns).T.reshape(*lead, *out_shape)
