"""Parallel-beam projection (discrete Radon transform) and filtered backprojection."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import scipy.sparse
import torch

from .._arrays import ArrayLike, as_float_tensor, check_image_shape, from_tensor, to_tensor
from .._validation import choice, image_shape, number_in, positive_int
from ._base import LinearOperator, Shape
from ._footprint import FootprintKernel
from ._sparse import MatrixCache, apply_matrix, to_torch_csr

#: About this many (pixel, angle) pairs are processed together while the
#: system matrix is assembled (small blocks stay in cache).
_BLOCK_ENTRIES = 1 << 17

#: How the projector may keep its system matrix (see :class:`ParallelProjection`).
STORAGE = ("auto", "matrix", "matrix-free")

#: Bytes of stored matrix per (pixel, angle) pair: about 2.3 nonzeros, each
#: kept twice (the matrix and its transpose) with a float64 value and an
#: int32 index (12 bytes).
MATRIX_BYTES_PER_PAIR = 55

#: ``storage="auto"`` stores the matrix when it takes at most this many bytes
#: (its products are faster: the matrix-free ones take 1.5-1.7 (float32) and 1.9-2.1
#: (float64) times as long at 256 x 256 with 180 angles once their weights are
#: kept, ``benchmarks/bench_projector_scale.py``).
MATRIX_BYTES_LIMIT = 2**30


def matrix_bytes(shape: Shape, n_angles: int) -> int:
    """Estimated bytes of the stored system matrix and its transpose (float64).

    ``MATRIX_BYTES_PER_PAIR`` bytes per (pixel, angle) pair; assembling them
    briefly needs about twice as much, and each float32 copy a further third.
    """
    return MATRIX_BYTES_PER_PAIR * shape[0] * shape[1] * n_angles


def _resolve_storage(storage: Any, shape: Shape, n_angles: int) -> str:
    storage = choice(storage, "storage", STORAGE)
    if storage != "auto":
        return storage
    return "matrix" if matrix_bytes(shape, n_angles) <= MATRIX_BYTES_LIMIT else "matrix-free"


def _validate_angles(angles: Any) -> np.ndarray:
    values = as_float_tensor(angles, "angles")
    if values.ndim != 1 or values.numel() == 0:
        raise ValueError(
            f"`angles` must be a non-empty 1-D array of angles in degrees, got shape "
            f"{tuple(values.shape)}"
        )
    return values.numpy().copy()


def _validate_detectors(n_detectors: Any, shape: Shape) -> int:
    if n_detectors is None:
        return math.ceil(math.hypot(*shape))
    return positive_int(n_detectors, "n_detectors")


def _lower_footprint_cdf(t: np.ndarray, wide: np.ndarray, narrow: np.ndarray) -> np.ndarray:
    """Distribution function, at ``t <= 0``, of a unit pixel's projection profile.

    The profile is the density of the sum of two centred uniform variables of
    widths ``wide >= narrow >= 0`` (a trapezoid of unit area).
    """
    outer = 0.5 * (wide + narrow)
    inner = 0.5 * (wide - narrow)
    ramp = np.clip(t + outer, 0.0, narrow)  # the clip only acts off the ramp branch
    denominator = np.where(narrow > 0, 2.0 * wide * narrow, 1.0)
    return np.where(t < -inner, ramp * ramp / denominator, 0.5 + t / wide)


def _transposed_system_matrix(
    shape: Shape, angles: np.ndarray, n_detectors: int
) -> scipy.sparse.csr_matrix:
    """``A^T`` as a float64 CSR matrix (rows: pixels, columns: (angle, bin))."""
    height, width = shape
    n_angles = angles.size
    theta = np.deg2rad(angles)
    cos, sin = np.cos(theta), np.sin(theta)
    wide = np.maximum(np.abs(cos), np.abs(sin))
    narrow = np.minimum(np.abs(cos), np.abs(sin))
    x = np.arange(width) - 0.5 * (width - 1)
    y = 0.5 * (height - 1) - np.arange(height)
    index_dtype = np.int32 if n_angles * n_detectors < np.iinfo(np.int32).max else np.int64
    first_column = (np.arange(n_angles) * n_detectors).astype(index_dtype)[:, None]
    offsets = np.array([-1, 0, 1], dtype=index_dtype)
    block = max(1, _BLOCK_ENTRIES // (width * n_angles))
    indptr = [np.zeros(1, dtype=np.int64)]
    indices, data = [], []
    count = 0
    for start in range(0, height, block):
        rows = y[start : start + block, None, None]
        # Pixel centres in detector-bin units (bin k is centred at k).
        position = (rows * sin + x[:, None] * cos).reshape(-1, n_angles) + 0.5 * (n_detectors - 1)
        nearest = np.rint(position)
        frac = position - nearest
        weights = np.empty(position.shape + (3,))
        weights[..., 0] = _lower_footprint_cdf(-0.5 - frac, wide, narrow)
        weights[..., 2] = _lower_footprint_cdf(-0.5 + frac, wide, narrow)
        weights[..., 1] = 1.0 - weights[..., 0] - weights[..., 2]
        bins = nearest.astype(index_dtype)[..., None] + offsets
        keep = (weights > 0) & (bins >= 0) & (bins < n_detectors)
        bins += first_column
        indices.append(bins[keep])
        data.append(weights[keep])
        per_pixel = np.count_nonzero(keep.reshape(keep.shape[0], -1), axis=1)
        indptr.append(count + np.cumsum(per_pixel))
        count += int(per_pixel.sum())
    return scipy.sparse.csr_matrix(
        (np.concatenate(data), np.concatenate(indices), np.concatenate(indptr)),
        shape=(height * width, n_angles * n_detectors),
    )


class ParallelProjection(LinearOperator):
    """Parallel-beam projection of an image: strip integrals along parallel lines.

    Maps an ``(H, W)`` image to a sinogram of shape ``(n_angles, n_detectors)``
    (row ``i`` is the projection at ``angles[i]``). The adjoint is the matching
    backprojection: both use the same matrix entries (stored once, or
    recomputed identically on every call), so ``<A x, y> = <x, A^T y>`` holds
    to rounding.

    Parameters
    ----------
    shape : tuple of int
        ``(H, W)`` of the images.
    angles : array_like
        Projection angles in degrees, a finite non-empty 1-D array (any real
        values; repeats allowed).
    n_detectors : int, optional
        Number of detector bins. Default ``ceil(sqrt(H^2 + W^2))``, enough to
        see the whole image at every angle; fewer bins truncate the detector
        symmetrically about the rotation centre.
    storage : {"auto", "matrix", "matrix-free"}
        ``"matrix"`` assembles the sparse system matrix and its transpose once
        (fast products for small scans, memory and set-up time growing with
        ``H W n_angles``); ``"matrix-free"`` stores nothing and recomputes the
        same entries on every product, block by block over angles, in the
        input's precision (the weights computed by the first product are
        kept when they fit 256 MiB, so small scans reuse them; larger ones
        need a few megabytes of work space whatever the size).
        ``"auto"`` stores the matrix when :func:`matrix_bytes` is at most
        :data:`MATRIX_BYTES_LIMIT` (1 GiB: up to about 19.5 million
        pixel-angle pairs, e.g. 256 x 256 with 180 angles) and is matrix-free
        above (512 x 512 with 360 angles, 1024 x 1024 with 720 angles).

    Raises
    ------
    TypeError
        If ``angles`` is not numeric or ``n_detectors`` is not an integer.
    ValueError
        If ``shape`` is not a pair of positive integers, ``angles`` is not a
        finite non-empty 1-D array, ``n_detectors < 1`` or ``storage`` is not
        one of the options.

    Notes
    -----
    Geometry, all in pixel units. Pixels are unit squares; the pixel in row
    ``i`` and column ``j`` is centred at ``x = j - (W - 1)/2`` (rightwards) and
    ``y = (H - 1)/2 - i`` (upwards, i.e. row 0 is the top of the image), so the
    rotation centre is the centre of the image. Detector bins have width 1;
    bin ``k`` is centred at ``s_k = k - (n_detectors - 1)/2``. At angle
    ``theta`` the bin collects the lines ``x cos(theta) + y sin(theta) = s``
    with ``|s - s_k| <= 1/2``: angle 0 sums each column (bin index grows from
    the left edge of the image to the right), angle 90 sums each row (bin index
    grows from the bottom row to the top row), and increasing angles turn the
    detector direction ``(cos theta, sin theta)`` counter-clockwise as the
    image is displayed (row 0 on top).

    Each entry is the exact bin average of the line integral of one pixel's
    indicator,

    .. math::

        A_{(\\theta, k), p} = \\int_{s_k - 1/2}^{s_k + 1/2}
            \\tau_\\theta(s - s_p) \\, ds, \\qquad
        s_p = x_p \\cos\\theta + y_p \\sin\\theta,

    where the pixel profile :math:`\\tau_\\theta` is the trapezoid obtained by
    convolving boxes of widths :math:`|\\cos\\theta|` and
    :math:`|\\sin\\theta|` (unit area). So the sinogram holds bin-averaged line
    integrals of the piecewise-constant image, every entry is >= 0, and each
    pixel's weights sum to 1 per angle (its area) whenever the detector sees
    it. Each pixel touches at most three bins per angle.

    Storage: with ``storage="matrix"`` the matrix and its transpose are kept
    as sparse CSR tensors (about ``2.3 H W n_angles`` nonzeros each, 12 bytes
    per nonzero in float64 plus 4 per float32 copy: about 0.9 GB for
    256 x 256 pixels and 180 angles in both precisions), built once in a few
    seconds. With ``storage="matrix-free"`` each product recomputes the
    entries from the geometry (a scatter for the forward map, a gather with
    the same weights for the adjoint); the two paths agree to rounding. The
    weights of a quarter of the pairs (the others follow by symmetry) are
    kept after the first product in each precision while they fit
    ``WEIGHT_CACHE_BYTES`` (256 MiB; 107 MB in float32 and 143 MB in float64
    at 256 x 256 with 180 angles). There a matrix-free forward + adjoint takes
    1.5-1.6 (float32) and 1.6-1.8 (float64) times the stored product (fastest
    of 15 interleaved rounds against fastest, one torch thread, three runs;
    2.3-3 times when the weights are recomputed), with
    no set-up and a tenth of the stored matrix's memory or less; at
    512 x 512 with 360 angles the whole process peaks at about 0.35 GB
    (the stored path: 7.8 GB) and a 1024 x 1024 scan with 720 angles is
    reconstructed in under 0.5 GB (``benchmarks/bench_projector_scale.py``).
    The matrix-free path runs a few thousand small tensor operations per
    product; with several torch threads it keeps each below torch's parallel
    grain (a parallel region waits for busy cores on a shared machine), which
    costs speed: beside other busy processes it measured 6-7 times the stored
    product with 2 threads, 2.3-3 times with one (weights recomputed).

    Norm: the entries are nonnegative on both paths (the computed weights
    are clamped at 0 and the middle weight is at least 1/2), so
    :meth:`norm_bound` is the certified Collatz-Wielandt bound of the base
    class, which needs only products ``A^T A p`` with a positive ``p``, and
    :meth:`norm` its float64 power iteration (stopping rule and tolerance in
    :func:`power_iteration`). The certificate is for the float64 operator.
    The top singular value is well separated: at 256 x 256 x 180 each of
    them takes about a dozen forward/adjoint pairs.
    When the sinogram has fewer entries than the image, the operator has a
    null space and :meth:`smallest_singular_value` is 0; otherwise it is
    unknown (None).

    References
    ----------
    .. [1] A. C. Kak and M. Slaney, *Principles of Computerized Tomographic
       Imaging*, IEEE Press, 1988 (SIAM reprint 2001,
       doi:10.1137/1.9780898719277), ch. 3 (parallel projections).
    .. [2] Y. Long, J. A. Fessler and J. M. Balter, "3D forward and
       back-projection for X-ray CT using separable footprints", IEEE Trans.
       Med. Imaging 29(11), 2010, doi:10.1109/TMI.2010.2050898 (pixel
       footprints integrated over detector bins).

    Examples
    --------
    >>> import numpy as np
    >>> op = ParallelProjection((64, 64), np.arange(0.0, 180.0, 4.0))
    >>> op.out_shape
    (45, 91)
    >>> image = np.zeros((64, 64))
    >>> image[20:40, 28:36] = 1.0
    >>> sinogram = op.forward(image)
    >>> print(np.round(sinogram.sum(axis=1)[:3], 6))  # each projection keeps the mass
    [160. 160. 160.]
    >>> fbp = filtered_backprojection(sinogram, op, filter="hann")
    >>> fbp.shape
    (64, 64)
    """

    def __init__(
        self,
        shape: Shape,
        angles: Any,
        n_detectors: int | None = None,
        *,
        storage: str = "auto",
    ):
        shape = image_shape(shape, "shape")
        self._angles = _validate_angles(angles)
        self.n_detectors = _validate_detectors(n_detectors, shape)
        self._storage = _resolve_storage(storage, shape, self._angles.size)
        super().__init__(shape, (self._angles.size, self.n_detectors))
        self._matrix: MatrixCache | None = None
        self._transposed: MatrixCache | None = None
        self._kernel: FootprintKernel | None = None
        if self._storage == "matrix":
            transposed = _transposed_system_matrix(shape, self._angles, self.n_detectors)
            self._matrix = MatrixCache(to_torch_csr(transposed.T.tocsr()))
            self._transposed = MatrixCache(to_torch_csr(transposed))
        else:
            self._kernel = FootprintKernel(shape, self._angles, self.n_detectors)

    @property
    def angles(self) -> np.ndarray:
        """Projection angles in degrees (a copy)."""
        return self._angles.copy()

    @property
    def storage(self) -> str:
        """``"matrix"`` or ``"matrix-free"``: how the products are computed."""
        return self._storage

    @property
    def nnz(self) -> int | None:
        """Number of stored nonzero entries of the system matrix (None when matrix-free)."""
        if self._matrix is None:
            return None
        return int(self._matrix.master.values().numel())

    def _forward(self, x: torch.Tensor) -> torch.Tensor:
        if self._kernel is not None:
            return self._kernel.forward(x)
        return apply_matrix(self._matrix.like(x), x, self.out_shape)

    def _adjoint(self, y: torch.Tensor) -> torch.Tensor:
        if self._kernel is not None:
            return self._kernel.adjoint(y)
        return apply_matrix(self._transposed.like(y), y, self.in_shape)

    @property
    def nonnegative(self) -> bool:
        return True

    def smallest_singular_value(self) -> float | None:
        # rank(A) <= number of rows < number of columns gives a null space.
        rows = self.out_shape[0] * self.out_shape[1]
        return 0.0 if rows < self.in_shape[0] * self.in_shape[1] else None

    def _describe(self) -> str:
        low, high = float(self._angles.min()), float(self._angles.max())
        count = self._angles.size
        return (
            f"{count} angles in [{low:g}, {high:g}] deg, {self.n_detectors} detectors, "
            f"{self._storage}"
        )


_WINDOWS = {
    "ramp": lambda f: torch.ones_like(f),
    "shepp-logan": lambda f: torch.sinc(f),
    "cosine": lambda f: torch.cos(math.pi * f),
    "hamming": lambda f: 0.54 + 0.46 * torch.cos(2.0 * math.pi * f),
    "hann": lambda f: 0.5 + 0.5 * torch.cos(2.0 * math.pi * f),
}


def _filter_response(n_detectors: int, filter: str, cutoff: float) -> tuple[torch.Tensor, int]:
    """Frequency response of the apodised ramp filter on a zero-padded grid."""
    padded = 1 << max(6, (2 * n_detectors - 1).bit_length())
    n = torch.cat([torch.arange(0, padded // 2), torch.arange(-padded // 2, 0)]).double()
    kernel = torch.zeros(padded, dtype=torch.float64)
    odd = n.remainder(2) == 1
    kernel[odd] = -1.0 / (math.pi * n[odd]) ** 2
    kernel[0] = 0.25
    response = torch.fft.rfft(kernel).real
    frequency = torch.fft.rfftfreq(padded, dtype=torch.float64)  # cycles per bin, <= 1/2
    scaled = frequency / cutoff
    window = torch.where(scaled <= 0.5, _WINDOWS[filter](scaled), torch.zeros_like(scaled))
    return response * window, padded


def filtered_backprojection(
    sinogram: ArrayLike,
    operator: ParallelProjection,
    *,
    filter: str = "ramp",
    cutoff: float = 1.0,
) -> ArrayLike:
    """Filtered backprojection (FBP) reconstruction from a parallel-beam sinogram.

    Parameters
    ----------
    sinogram : numpy.ndarray or torch.Tensor
        ``(n_angles, n_detectors)`` or ``(N, C, n_angles, n_detectors)``,
        float32 or float64, in the geometry of ``operator``.
    operator : ParallelProjection
        The projector that describes the scan; its adjoint backprojects.
    filter : {"cosine", "hamming", "hann", "ramp", "shepp-logan"}
        The ramp filter alone or multiplied by an apodisation window
        ``W(f)`` (``f`` in cycles per detector bin, Nyquist 1/2):
        Shepp-Logan ``sinc(f)``, cosine ``cos(pi f)``, Hamming
        ``0.54 + 0.46 cos(2 pi f)``, Hann ``(1 + cos(2 pi f))/2``. The
        windows trade resolution for less noise.
    cutoff : float
        Fraction of the Nyquist frequency in ``(0, 1]`` above which the filter
        is zero; the window is stretched to end there.

    Returns
    -------
    numpy.ndarray or torch.Tensor
        Image of the operator's ``in_shape`` (with the same leading axes), of
        the same kind, dtype and device as ``sinogram``.

    Raises
    ------
    TypeError
        If ``operator`` is not a :class:`ParallelProjection` or ``sinogram``
        is not a float array.
    ValueError
        If the sinogram shape does not match the operator, ``filter`` is not
        one of the options or ``cutoff`` is outside ``(0, 1]``.

    Notes
    -----
    Discretisation of the inversion formula
    ``f(x, y) = int_0^pi (p_theta * h)(x cos theta + y sin theta) d theta``
    following Kak & Slaney, ch. 3: each projection is
    convolved (via zero-padded FFTs, padding at least ``2 n_detectors - 1``
    so no wrap-around) with the band-limited spatial ramp kernel of unit
    sampling interval, ``h(0) = 1/4``, ``h(n) = -1/(pi n)^2`` for odd ``n``
    and 0 for even ``n``, whose frequency response is then multiplied by the
    window; the filtered projections are backprojected with the operator's
    adjoint and weighted by ``pi / n_angles``. That weight is exact for angles
    evenly spaced over 180 degrees (or a multiple of it); for sparse or
    limited-angle scans FBP is only a baseline that shows streaks and missing
    wedges.

    References
    ----------
    .. [1] A. C. Kak and M. Slaney, *Principles of Computerized Tomographic
       Imaging*, IEEE Press, 1988 (SIAM reprint 2001,
       doi:10.1137/1.9780898719277), ch. 3 (filtered backprojection).
    .. [2] L. A. Shepp and B. F. Logan, "The Fourier reconstruction of a head
       section", IEEE Trans. Nucl. Sci. 21(3), 1974 (the Shepp-Logan
       window).
    """
    if not isinstance(operator, ParallelProjection):
        raise TypeError(
            f"`operator` must be a ParallelProjection, got {type(operator).__name__}"
        )
    choice(filter, "filter", _WINDOWS)
    cutoff = number_in(cutoff, "cutoff", 0.0, 1.0, low_open=True)
    tensor, kind = to_tensor(sinogram, "sinogram")
    check_image_shape(tensor, operator.out_shape, "sinogram", "operator's output shape")
    response, padded = _filter_response(operator.n_detectors, filter, float(cutoff))
    response = response.to(device=tensor.device, dtype=tensor.dtype)
    spectrum = torch.fft.rfft(tensor, n=padded, dim=-1) * response
    filtered = torch.fft.irfft(spectrum, n=padded, dim=-1)[..., : operator.n_detectors]
    image = operator._adjoint(filtered) * (math.pi / operator.out_shape[0])
    return from_tensor(image, kind)
