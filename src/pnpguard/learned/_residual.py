"""DnCNN-style residual convolutional denoiser with a noise-level map input."""

from __future__ import annotations

import torch
from torch import nn


def noise_level_map(sigma: torch.Tensor | float, like: torch.Tensor) -> torch.Tensor:
    """Broadcast a noise level to a one-channel map shaped like ``like``.

    Parameters
    ----------
    sigma : float or torch.Tensor
        A scalar, one value per batch item (shape ``(N,)``), or a full map
        broadcastable to ``(N, 1, H, W)``.
    like : torch.Tensor
        ``(N, 1, H, W)`` tensor giving shape, dtype and device.

    Returns
    -------
    torch.Tensor
        ``(N, 1, H, W)`` noise-level map.
    """
    sigma = torch.as_tensor(sigma, dtype=like.dtype, device=like.device)
    if sigma.ndim == 1:
        sigma = sigma[:, None, None, None]
    return sigma.expand_as(like)


class ResidualCNN(nn.Module):
    r"""Residual convolutional denoiser conditioned on the noise level.

    The network predicts the noise and subtracts it:

    .. math:: D(y; \sigma) = y - R([y, \sigma \mathbf{1}]),

    where :math:`R` is a stack of 3x3 convolutions with ReLU activations whose
    input is the noisy image and a constant (or spatially varying) map of the
    noise standard deviation.

    Parameters
    ----------
    depth : int
        Number of convolution layers (at least 2).
    width : int
        Number of feature channels.

    Notes
    -----
    Residual learning follows Zhang et al. (2017): the noise is closer to a
    simple function of the input than the clean image, which makes training
    faster and more stable. Batch normalisation is left out: with Adam and the
    small depths used here it is not needed, and leaving it out keeps the
    network a plain function of its input (no running statistics).

    The noise level enters as an extra input channel rather than by training
    one network per level (Zhang, Zuo & Zhang 2018). One set of weights then
    serves every level in the training range, the level can be changed at
    inference (for plug-and-play the denoiser strength is a tuning parameter),
    and a spatially varying map handles noise whose level changes across the
    frame. Each channel of a multi-channel image is denoised separately.

    References
    ----------
    .. [1] K. Zhang, W. Zuo, Y. Chen, D. Meng and L. Zhang, "Beyond a Gaussian
       denoiser: residual learning of deep CNN for image denoising", IEEE
       Trans. Image Process. 26(7), 3142-3155, 2017. doi:10.1109/TIP.2017.2662206
    .. [2] K. Zhang, W. Zuo and L. Zhang, "FFDNet: toward a fast and flexible
       solution for CNN-based image denoising", IEEE Trans. Image Process.
       27(9), 4608-4622, 2018. doi:10.1109/TIP.2018.2839891
    """

    def __init__(self, depth: int = 12, width: int = 32) -> None:
        super().__init__()
        if depth < 2:
            raise ValueError(f"`depth` must be at least 2, got {depth}")
        if width < 1:
            raise ValueError(f"`width` must be positive, got {width}")
        self.depth = depth
        self.width = width
        layers: list[nn.Module] = [nn.Conv2d(2, width, 3, padding=1), nn.ReLU(inplace=True)]
        for _ in range(depth - 2):
            layers += [nn.Conv2d(width, width, 3, padding=1), nn.ReLU(inplace=True)]
        layers.append(nn.Conv2d(width, 1, 3, padding=1))
        self.body = nn.Sequential(*layers)

    def config(self) -> dict[str, int]:
        """Constructor arguments, stored with the weights."""
        return {"depth": self.depth, "width": self.width}

    def forward(self, noisy: torch.Tensor, sigma: torch.Tensor | float) -> torch.Tensor:
        """Denoise ``(N, C, H, W)`` images at noise level ``sigma``.

        ``sigma`` is a scalar, one value per image (shape ``(N,)``) or a map
        broadcastable to ``(N, 1, H, W)``; it is in the units of the image
        (for example 25/255 for images in [0, 1]).
        """
        n, c, h, w = noisy.shape
        flat = noisy.reshape(n * c, 1, h, w)
        sigma_t = torch.as_tensor(sigma, dtype=noisy.dtype, device=noisy.device)
        if sigma_t.ndim == 1 and c > 1:
            sigma_t = sigma_t.repeat_interleave(c)
        elif sigma_t.ndim == 4:
            sigma_t = sigma_t.expand(n, c, h, w).reshape(n * c, 1, h, w)
        level = noise_level_map(sigma_t, flat)
        residual = self.body(torch.cat([flat, level], dim=1))
        return (flat - residual).reshape(n, c, h, w)
