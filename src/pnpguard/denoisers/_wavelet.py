"""Soft thresholding in a periodised orthogonal wavelet basis (a proximal operator)."""

from __future__ import annotations

import numpy as np
import pywt
import torch

from .._validation import positive_int, positive_number
from ._base import Denoiser
from ._facts import Fact

#: Threshold in units of the noise level: ``threshold = factor * sigma``.
#: Common practice for soft thresholding puts the factor between 1 and 3;
#: 1.25 is what our calibration gave (see :class:`WaveletShrinkage`, Notes).
DEFAULT_THRESHOLD_FACTOR = 1.25


def _orthogonal_wavelet(wavelet: str) -> pywt.Wavelet:
    if not isinstance(wavelet, str):
        raise TypeError(f"`wavelet` must be a wavelet name such as 'db4', got {wavelet!r}")
    if wavelet not in pywt.wavelist(kind="discrete"):
        raise ValueError(
            f"`wavelet` must be a discrete wavelet known to PyWavelets (e.g. 'haar', 'db4', "
            f"'sym8', 'coif2'), got {wavelet!r}"
        )
    basis = pywt.Wavelet(wavelet)
    if not basis.orthogonal:
        raise ValueError(
            f"`wavelet` {wavelet!r} is not orthogonal; soft thresholding is a proximal operator "
            "only in an orthonormal basis (use e.g. 'haar', 'db4', 'sym8' or 'coif2')"
        )
    return basis


def _two_adic_order(n: int) -> int:
    return (n & -n).bit_length() - 1


class WaveletShrinkage(Denoiser):
    """Soft thresholding of the detail coefficients of an orthogonal wavelet transform.

    ``D x = W^T S_t W x`` with ``W`` the periodised orthogonal 2-D wavelet
    transform (PyWavelets, ``mode="periodization"``) and ``S_t`` soft
    thresholding at ``t`` of every detail coefficient; the coarsest
    approximation coefficients are kept unchanged. Runs with PyWavelets on
    numpy (torch inputs are converted and returned on their device); not
    differentiable.

    Parameters
    ----------
    sigma : float
        Noise level in the image's intensity units.
    wavelet : str
        An orthogonal PyWavelets wavelet ('haar', 'dbN', 'symN', 'coifN'...);
        biorthogonal wavelets are rejected.
    levels : int, optional
        Decomposition levels. Height and width must be divisible by
        ``2 ** levels`` (the periodised transform is orthogonal only then:
        crop or pad the image). Default: the largest number of levels allowed
        by that divisibility and by :func:`pywt.dwt_max_level`.
    threshold_factor : float
        ``t = threshold_factor * sigma`` (see Notes).
    cycle_spins : int
        Average over the ``cycle_spins ** 2`` circular shifts
        ``(i, j), 0 <= i, j < cycle_spins`` of the image (shift, denoise, shift
        back); 1 means no averaging.
    name : str
        Name used in reports.

    Notes
    -----
    With ``W`` orthogonal, ``D`` is the proximal operator of
    ``g(x) = t sum_{detail i} |(W x)_i|`` (a weighted l1 norm with zero weight
    on the approximation band): soft thresholding is the proximal operator of
    ``t |.|`` [1]_ and ``prox_{f o W} = W^T prox_f W`` for orthogonal ``W``
    [2]_. Hence ``D`` is firmly nonexpansive (theta = 1/2).

    Cycle spinning [3]_ averages the maps ``S_{-s} D S_s`` over shifts ``s``.
    Each is the proximal operator of ``g o S_s`` (a shift is orthogonal), i.e.
    the gradient of a convex function ``phi_s`` [4]_; their average is the
    gradient of the convex function ``mean_s phi_s`` and is nonexpansive, so by
    Moreau's characterisation [4]_ it is again a proximal operator (our
    derivation; the "proximal average").

    Threshold rule: ``t = threshold_factor * sigma``, default factor 1.25.
    A threshold proportional to the noise level is common practice (factors
    1 to 3 are usual); 1.25 minimised the mean PSNR loss against the best
    factor of {0.75, 1, 1.25, 1.5, 1.75, 2, 2.5, 3} (0.40 dB, db4) on
    scikit-image's grass, gravel and Shepp-Logan images at noise levels 15,
    25 and 50 on a 0-255 scale (``benchmarks/bench_denoisers.py --calibrate``).
    The best factor grows with the noise level and for piecewise-constant
    images.

    References
    ----------
    .. [1] D. L. Donoho, "De-noising by soft-thresholding", IEEE Trans. Inf.
       Theory 41(3) (1995) 613-627, doi:10.1109/18.382009.
    .. [2] H. H. Bauschke and P. L. Combettes, *Convex Analysis and Monotone
       Operator Theory in Hilbert Spaces*, 2nd ed., Springer, 2017,
       Prop. 24.8 (proximal operator of a composition with an orthogonal map;
       numbering from memory).
    .. [3] R. R. Coifman and D. L. Donoho, "Translation-invariant de-noising",
       in *Wavelets and Statistics*, Springer, 1995, 125-150,
       doi:10.1007/978-1-4612-2544-7_9.
    .. [4] J.-J. Moreau, "Proximite et dualite dans un espace hilbertien",
       Bull. Soc. Math. France 93 (1965) 273-299.
    """

    def __init__(
        self,
        *,
        sigma: float,
        wavelet: str = "db4",
        levels: int | None = None,
        threshold_factor: float = DEFAULT_THRESHOLD_FACTOR,
        cycle_spins: int = 1,
        name: str = "wavelet",
    ):
        sigma = positive_number(sigma, "sigma")
        self.basis = _orthogonal_wavelet(wavelet)
        self.levels = None if levels is None else positive_int(levels, "levels")
        self.threshold_factor = positive_number(threshold_factor, "threshold_factor")
        self.threshold = self.threshold_factor * sigma
        self.cycle_spins = positive_int(cycle_spins, "cycle_spins")
        if cycle_spins == 1:
            source = (
                "soft thresholding of the detail coefficients in a periodised orthonormal "
                f"{wavelet} basis is the prox of a weighted l1 norm of W x (Donoho 1995; "
                "prox of f o W = W^T prox_f W for orthogonal W, Bauschke & Combettes 2017)"
            )
        else:
            source = (
                f"average over {cycle_spins ** 2} shifts of soft thresholding in a periodised "
                f"orthonormal {wavelet} basis: each is a prox, and an average of proxes is the "
                "prox of a convex function (Moreau 1965; proximal average)"
            )
        super().__init__(
            name=name,
            sigma=sigma,
            differentiable=False,
            facts=(Fact.proximal(source, verified=True),),
        )

    def levels_for(self, shape: tuple[int, int]) -> int:
        """The number of decomposition levels used for images of ``shape``.

        Raises
        ------
        ValueError
            If ``shape`` does not admit the requested (or any) level.
        """
        height, width = shape
        divisible = min(_two_adic_order(height), _two_adic_order(width))
        if self.levels is not None:
            if divisible < self.levels:
                step = 2**self.levels
                raise ValueError(
                    f"image shape {tuple(shape)} is not divisible by 2**levels = {step}; the "
                    f"periodised transform with levels={self.levels} needs both sides to be "
                    f"multiples of {step} (crop or pad the image)"
                )
            return self.levels
        longest = pywt.dwt_max_level(min(height, width), self.basis.dec_len)
        levels = min(divisible, longest)
        if levels < 1:
            raise ValueError(
                f"image shape {tuple(shape)} admits no decomposition level with wavelet "
                f"{self.basis.name!r}: both sides must be even and at least "
                f"{self.basis.dec_len - 1} pixels"
            )
        return levels

    def _shrink(self, images: np.ndarray, levels: int) -> np.ndarray:
        coeffs = pywt.wavedec2(
            images, self.basis, mode="periodization", level=levels, axes=(-2, -1)
        )
        shrunk = [coeffs[0]] + [
            tuple(pywt.threshold(band, self.threshold, mode="soft") for band in detail)
            for detail in coeffs[1:]
        ]
        return pywt.waverec2(shrunk, self.basis, mode="periodization", axes=(-2, -1))

    def _denoise(self, t: torch.Tensor) -> torch.Tensor:
        levels = self.levels_for(tuple(t.shape[-2:]))
        images = t.detach().cpu().numpy()
        if self.cycle_spins == 1:
            result = self._shrink(images, levels)
        else:
            result = np.zeros_like(images)
            for i in range(self.cycle_spins):
                for j in range(self.cycle_spins):
                    shifted = np.roll(images, (i, j), axis=(-2, -1))
                    result += np.roll(self._shrink(shifted, levels), (-i, -j), axis=(-2, -1))
            result /= self.cycle_spins**2
        return torch.from_numpy(np.ascontiguousarray(result)).to(dtype=t.dtype, device=t.device)

