"""DnCNN-style residual convolutional denoiser with a noise-level map input."""

from __future__ import annotations

from collections.abc import Callable

import torch
import torch.nn.functional as F
from torch import nn

from .._validation import choice, int_at_least, positive_int

#: Initial weight schemes of :class:`ResidualCNN`.
INITIALISATIONS = ("he", "torch-default")


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


def subtract_predicted_noise(
    predict_noise: Callable[[torch.Tensor, torch.Tensor], torch.Tensor],
    noisy: torch.Tensor,
    sigma: torch.Tensor | float,
) -> torch.Tensor:
    """``noisy - predict_noise(noisy, sigma)`` with every channel treated as an image.

    Parameters
    ----------
    predict_noise : callable
        Maps ``(B, 1, H, W)`` images and a noise level (scalar, ``(B,)`` or
        ``(B, 1, H, W)``) to the predicted noise, shaped like the images.
    noisy : torch.Tensor
        ``(N, C, H, W)`` images.
    sigma : float or torch.Tensor
        A scalar, one value per image (``(N,)``) or a map broadcastable to
        ``(N, 1, H, W)``.

    Returns
    -------
    torch.Tensor
        ``(N, C, H, W)`` denoised images.
    """
    n, c, h, w = noisy.shape
    flat = noisy.reshape(n * c, 1, h, w)
    sigma_t = torch.as_tensor(sigma, dtype=noisy.dtype, device=noisy.device)
    if sigma_t.ndim == 1 and c > 1:
        sigma_t = sigma_t.repeat_interleave(c)
    elif sigma_t.ndim == 4:
        sigma_t = sigma_t.expand(n, c, h, w).reshape(n * c, 1, h, w)
    return (flat - predict_noise(flat, sigma_t)).reshape(n, c, h, w)


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
    unshuffle : int
        Side of the pixel blocks folded into channels before the convolutions
        (1: none). With ``unshuffle = 2`` the network works on four
        half-resolution sub-images, which doubles its receptive field at the
        same cost per pixel as a network of half the width at full resolution.
    initialisation : {"he", "torch-default"}
        Initial weights: He et al. (2015) for the ReLU layers with a small last
        layer (the default), or torch's own default for convolutions (kept
        to reproduce weights trained that way).

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
    .. [2] K. He, X. Zhang, S. Ren and J. Sun, "Delving deep into rectifiers:
       surpassing human-level performance on ImageNet classification", ICCV
       2015, 1026-1034. doi:10.1109/ICCV.2015.123
    .. [3] K. Zhang, W. Zuo and L. Zhang, "FFDNet: toward a fast and flexible
       solution for CNN-based image denoising", IEEE Trans. Image Process.
       27(9), 4608-4622, 2018. doi:10.1109/TIP.2018.2839891
    """

    def __init__(self, depth: int = 12, width: int = 32, unshuffle: int = 1, initialisation: str = "he") -> None:
        super().__init__()
        choice(initialisation, "initialisation", INITIALISATIONS)
        depth = int_at_least(depth, "depth", 2)
        width = positive_int(width, "width")
        unshuffle = positive_int(unshuffle, "unshuffle")
        self.depth, self.width, self.unshuffle = depth, width, unshuffle
        pixels = unshuffle * unshuffle
        layers: list[nn.Module] = [nn.Conv2d(pixels + 1, width, 3, padding=1), nn.ReLU(inplace=True)]
        for _ in range(depth - 2):
            layers += [nn.Conv2d(width, width, 3, padding=1), nn.ReLU(inplace=True)]
        layers.append(nn.Conv2d(width, pixels, 3, padding=1))
        self.body = nn.Sequential(*layers)
        self.initialisation = initialisation
        if initialisation == "he":
            self._initialise_he()

    def _initialise_he(self) -> None:
        """He initialisation for the ReLU layers, zero biases, a small last layer.

        The signal then keeps its scale through the depth (He et al. 2015);
        torch's default initialisation (weight variance ``1 / (3 fan_in)``
        against He's ``2 / fan_in``) shrinks the ReLU activations by a factor
        of about 0.4 per layer in root mean square, down to the level its
        random biases set, which stalled the training of a 15-layer stack here. The last
        layer starts small so that the initial network is close to the
        identity.
        """
        convs = [module for module in self.body if isinstance(module, nn.Conv2d)]
        for conv in convs[:-1]:
            nn.init.kaiming_normal_(conv.weight, nonlinearity="relu")
            nn.init.zeros_(conv.bias)
        nn.init.normal_(convs[-1].weight, std=1e-3)
        nn.init.zeros_(convs[-1].bias)

    def config(self) -> dict[str, int | str]:
        """Constructor arguments, stored with the weights."""
        return {"depth": self.depth, "width": self.width, "unshuffle": self.unshuffle, "initialisation": self.initialisation}

    def _predict_noise(self, flat: torch.Tensor, sigma: torch.Tensor) -> torch.Tensor:
        """``R`` on ``(B, 1, H, W)`` images with a ``(B, 1, H, W)`` noise map."""
        r = self.unshuffle
        if r == 1:
            return self.body(torch.cat([flat, noise_level_map(sigma, flat)], dim=1))
        h, w = flat.shape[-2:]
        pad_h, pad_w = (-h) % r, (-w) % r
        padded = F.pad(flat, (0, pad_w, 0, pad_h), mode="replicate") if pad_h or pad_w else flat
        folded = F.pixel_unshuffle(padded, r)
        if sigma.ndim == 4:
            sigma = F.pixel_unshuffle(F.pad(sigma.expand_as(flat), (0, pad_w, 0, pad_h), mode="replicate"), r).mean(1, keepdim=True)
        level = noise_level_map(sigma, folded[:, :1])
        residual = F.pixel_shuffle(self.body(torch.cat([folded, level], dim=1)), r)
        return residual[..., :h, :w]

    def forward(self, noisy: torch.Tensor, sigma: torch.Tensor | float) -> torch.Tensor:
        """Denoise ``(N, C, H, W)`` images at noise level ``sigma``.

        ``sigma`` is a scalar, one value per image (shape ``(N,)``) or a map
        broadcastable to ``(N, 1, H, W)``; it is in the units of the image
        (for example 25/255 for images in [0, 1]).
        """
        return subtract_predicted_noise(self._predict_noise, noisy, sigma)
