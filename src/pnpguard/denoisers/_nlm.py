"""Non-local means through scikit-image: a strong denoiser with no known facts."""

from __future__ import annotations

import numpy as np
import torch
from skimage.restoration import denoise_nl_means

from .._validation import positive_int, positive_number
from ._base import Denoiser

#: Filtering parameter ``h = factor * sigma``; scikit-image's documentation
#: suggests h equal to sigma "or slightly less" (common practice).
DEFAULT_H_FACTOR = 0.8


class NonLocalMeans(Denoiser):
    """Non-local means denoising (scikit-image, fast mode, noise-aware weights).

    Each 2-D image goes through :func:`skimage.restoration.denoise_nl_means`
    with ``sigma`` passed (so patch distances are corrected for the expected
    noise variance), ``h = h_factor * sigma``, ``fast_mode=True`` and
    ``preserve_range=True``. The map is nonlinear, not symmetric and not known
    to be nonexpansive: it carries no facts, and its averagedness must be
    estimated. Not differentiable.

    Parameters
    ----------
    sigma : float
        Noise level in intensity units.
    h_factor : float
        ``h = h_factor * sigma`` (default 0.8; scikit-image's docstring
        recommends h about sigma or slightly less, common practice).
    patch_size : int
        Side of the compared patches.
    patch_distance : int
        Maximal search distance in pixels.
    name : str
        Name used in reports.

    References
    ----------
    .. [1] A. Buades, B. Coll and J.-M. Morel, "A non-local algorithm for image
       denoising", CVPR 2005, doi:10.1109/CVPR.2005.38.
    .. [2] J. Darbon, A. Cunha, T. F. Chan, S. Osher and G. J. Jensen, "Fast
       nonlocal filtering applied to electron cryomicroscopy", ISBI 2008,
       doi:10.1109/ISBI.2008.4541250 (the fast mode).
    """

    def __init__(
        self,
        *,
        sigma: float,
        h_factor: float = DEFAULT_H_FACTOR,
        patch_size: int = 5,
        patch_distance: int = 6,
        name: str = "nlm",
    ):
        sigma = positive_number(sigma, "sigma")
        self.h = positive_number(h_factor, "h_factor") * sigma
        self.patch_size = positive_int(patch_size, "patch_size")
        self.patch_distance = positive_int(patch_distance, "patch_distance")
        super().__init__(name=name, sigma=sigma, differentiable=False, facts=())

    def _denoise(self, t: torch.Tensor) -> torch.Tensor:
        height, width = t.shape[-2:]
        images = t.detach().cpu().numpy().reshape(-1, height, width)
        results = [
            denoise_nl_means(
                image,
                patch_size=self.patch_size,
                patch_distance=self.patch_distance,
                h=self.h,
                fast_mode=True,
                sigma=self.sigma,
                preserve_range=True,
            )
            for image in images
        ]
        stacked = np.stack(results).reshape(t.shape)
        return torch.from_numpy(stacked).to(dtype=t.dtype, device=t.device)
