"""Training images for the learned denoisers: bundled scikit-image pictures,
synthetic microscope-like frames, and a sampler of noisy training patches.

Every image here is a 2-D float32 array in [0, 1]. Nothing is downloaded: the
scikit-image pictures used are the ones shipped inside the scikit-image wheel.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import torch

#: Bundled scikit-image pictures used for training the shipped weights.
TRAINING_IMAGES = (
    "astronaut",
    "cell",
    "chelsea",
    "clock",
    "coffee",
    "grass",
    "gravel",
    "hubble_deep_field",
    "immunohistochemistry",
    "microaneurysms",
    "page",
    "retina",
    "rocket",
    "shepp_logan_phantom",
    "text",
)
#: Bundled picture used only for the validation printout during training.
VALIDATION_IMAGES = ("coins",)
#: Bundled pictures that training never sees; the shipped PSNR figures refer to them.
HELD_OUT_IMAGES = ("camera", "moon", "brick")

#: Largest side kept for a training picture (larger ones are downsampled by 2).
_MAX_SIDE = 720


def bundled_image(name: str) -> np.ndarray:
    """Return a scikit-image bundled picture as a grey float32 image in [0, 1].

    Parameters
    ----------
    name : str
        Name of a function in :mod:`skimage.data` (for example ``"camera"``).

    Returns
    -------
    numpy.ndarray
        ``(H, W)`` float32 array with values in [0, 1].

    Raises
    ------
    ValueError
        If ``name`` is not a picture known to :mod:`skimage.data`.
    """
    import skimage.data
    from skimage.color import rgb2gray, rgba2rgb
    from skimage.util import img_as_float

    loader = getattr(skimage.data, name, None)
    if loader is None or not callable(loader):
        raise ValueError(f"`name` must name a picture of skimage.data, got {name!r}")
    image = np.asarray(loader())
    if image.ndim == 3 and image.shape[-1] == 4:
        image = rgba2rgb(image)
    if image.ndim == 3:
        image = rgb2gray(image)
    image = img_as_float(image).astype(np.float32)
    return np.clip(image, 0.0, 1.0)


def _downsample_large(image: np.ndarray) -> np.ndarray:
    while max(image.shape) > _MAX_SIDE:
        h, w = (image.shape[0] // 2) * 2, (image.shape[1] // 2) * 2
        image = image[:h, :w].reshape(h // 2, 2, w // 2, 2).mean(axis=(1, 3))
    return image.astype(np.float32)


def synthetic_frames(count: int, size: int = 256, *, seed: int = 0) -> list[np.ndarray]:
    """Generate synthetic grey frames resembling fluorescence microscopy.

    Each frame is a smooth background plus a random number of soft-edged and
    sharp-edged elliptical "cells", some with bright nuclei, and thin straight
    structures (filaments); about a third also carry a sinusoidal grating, which
    gives the training set periodic texture.

    Parameters
    ----------
    count : int
        Number of frames.
    size : int, optional
        Side of the square frames.
    seed : int, optional
        Seed of :func:`numpy.random.default_rng`.

    Returns
    -------
    list of numpy.ndarray
        ``count`` float32 arrays of shape ``(size, size)`` in [0, 1].
    """
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:size, 0:size].astype(np.float64) / size
    frames = []
    for _ in range(count):
        image = np.zeros((size, size))
        for _ in range(3):  # smooth background: a few broad Gaussian bumps
            cx, cy, width = rng.uniform(0, 1), rng.uniform(0, 1), rng.uniform(0.2, 0.6)
            image += rng.uniform(0.0, 0.3) * np.exp(-((xx - cx) ** 2 + (yy - cy) ** 2) / width**2)
        for _ in range(int(rng.integers(5, 30))):
            cx, cy = rng.uniform(0, 1, size=2)
            a, b = rng.uniform(0.02, 0.12, size=2)
            angle = rng.uniform(0, math.pi)
            u = (xx - cx) * math.cos(angle) + (yy - cy) * math.sin(angle)
            v = -(xx - cx) * math.sin(angle) + (yy - cy) * math.cos(angle)
            radius = np.sqrt((u / a) ** 2 + (v / b) ** 2)
            edge = rng.uniform(0.01, 0.3)  # small: sharp membrane; large: blurry cell
            with np.errstate(over="ignore"):  # exp overflows to inf far outside: cell -> 0
                cell = 1.0 / (1.0 + np.exp((radius - 1.0) / edge))
            image += rng.uniform(-0.3, 0.6) * cell
            if rng.uniform() < 0.5:
                image += rng.uniform(0.1, 0.4) * (radius < rng.uniform(0.2, 0.5))
        for _ in range(int(rng.integers(0, 6))):
            angle, offset = rng.uniform(0, math.pi), rng.uniform(-0.5, 0.5)
            distance = np.abs((xx - 0.5) * math.cos(angle) + (yy - 0.5) * math.sin(angle) - offset)
            image += rng.uniform(0.1, 0.4) * np.exp(-((distance / rng.uniform(0.002, 0.01)) ** 2))
        if rng.uniform() < 0.35:
            freq, angle = rng.uniform(4, 40), rng.uniform(0, math.pi)
            phase = 2 * math.pi * freq * (xx * math.cos(angle) + yy * math.sin(angle))
            image += rng.uniform(0.05, 0.2) * np.sin(phase)
        low, high = np.percentile(image, [0.5, 99.5])
        image = (image - low) / max(high - low, 1e-6)
        frames.append(np.clip(image, 0.0, 1.0).astype(np.float32))
    return frames


def default_training_images(*, synthetic: int = 12, seed: int = 0) -> list[np.ndarray]:
    """The pictures the shipped weights were trained on.

    Parameters
    ----------
    synthetic : int, optional
        Number of synthetic frames added to the bundled pictures.
    seed : int, optional
        Seed of the synthetic frames.

    Returns
    -------
    list of numpy.ndarray
        Grey float32 images in [0, 1]; none of :data:`HELD_OUT_IMAGES` or
        :data:`VALIDATION_IMAGES` is among them.
    """
    images = [_downsample_large(bundled_image(name)) for name in TRAINING_IMAGES]
    return images + synthetic_frames(synthetic, seed=seed)


#: Phantom kinds of the lab's frames (:func:`pnpguard.phantoms.make_phantom`).
LAB_FRAME_KINDS = ("cells", "piecewise_smooth", "random_ellipses", "porous_disk")
#: First seed of the lab's training frames. The benchmark tasks use seeds below
#: 2000 (benchmark and tuning draws), so training frames never repeat them.
LAB_FRAME_FIRST_SEED = 70000


def lab_frames(per_kind: int, size: int = 128) -> list[np.ndarray]:
    """Training frames of the kinds the lab reconstructs, drawn from the phantom generators.

    ``per_kind`` frames of each of :data:`LAB_FRAME_KINDS`, with seeds
    ``LAB_FRAME_FIRST_SEED + k``: fresh draws of the same generators the
    benchmark tasks use, never the benchmark's or the tuning's own draws (a
    train/test split within one distribution, common practice).

    Parameters
    ----------
    per_kind : int
        Frames per kind, >= 1.
    size : int, optional
        Side of the square frames.

    Returns
    -------
    list of numpy.ndarray
        ``per_kind * 4`` float32 arrays of shape ``(size, size)`` in [0, 1].
    """
    from ..phantoms import make_phantom

    if per_kind < 1:
        raise ValueError(f"`per_kind` must be >= 1, got {per_kind!r}")
    return [
        np.clip(make_phantom(kind, (size, size), seed=LAB_FRAME_FIRST_SEED + k), 0.0, 1.0).astype(np.float32)
        for kind in LAB_FRAME_KINDS
        for k in range(per_kind)
    ]


class PatchSampler:
    """Draw batches of (clean patch, noise level) for denoiser training.

    Patches are cut at random positions from images chosen with probability
    proportional to their area, then flipped and rotated by a random element of
    the dihedral group (common practice for natural images, which have no
    preferred orientation). Noise levels are uniform on ``noise_range``.

    With ``low_contrast > 0`` that fraction of the patches has its contrast
    reduced about the patch mean by a factor drawn log-uniformly from
    ``[0.1, 1]``. Such patches stand for faint, flat frames (dim fluorescence,
    smooth surfaces), where the noise is large relative to the structure and a
    denoiser must average over wide areas; without them a network trained on
    ordinary photographs under-smooths such frames.

    Parameters
    ----------
    images : sequence of numpy.ndarray
        Grey float images, each at least ``patch_size`` on both sides.
    patch_size : int
        Side of the square patches.
    noise_range : tuple of float
        ``(low, high)`` of the noise standard deviation, in image units.
    seed : int
        Seed of the :class:`torch.Generator` that drives all draws.
    low_contrast : float, optional
        Fraction in ``[0, 1]`` of patches with reduced contrast.
    """

    def __init__(
        self,
        images: Sequence[np.ndarray],
        patch_size: int,
        noise_range: tuple[float, float],
        seed: int,
        low_contrast: float = 0.0,
    ) -> None:
        if not 0.0 <= low_contrast <= 1.0:
            raise ValueError(f"`low_contrast` must lie in [0, 1], got {low_contrast!r}")
        self.images = [torch.from_numpy(np.ascontiguousarray(im, dtype=np.float32)) for im in images]
        self.patch_size = patch_size
        self.noise_range = noise_range
        self.low_contrast = low_contrast
        self.generator = torch.Generator().manual_seed(seed)
        areas = torch.tensor([float(im.numel()) for im in self.images])
        self.weights = areas / areas.sum()

    def _randint(self, high: int) -> int:
        return int(torch.randint(high, (1,), generator=self.generator))

    def clean_batch(self, batch_size: int) -> torch.Tensor:
        """Return ``(batch_size, 1, P, P)`` clean patches."""
        p = self.patch_size
        picks = torch.multinomial(self.weights, batch_size, replacement=True, generator=self.generator)
        patches = []
        for index in picks.tolist():
            image = self.images[index]
            top = self._randint(image.shape[0] - p + 1)
            left = self._randint(image.shape[1] - p + 1)
            patch = image[top : top + p, left : left + p]
            patch = torch.rot90(patch, self._randint(4), dims=(0, 1))
            if self._randint(2):
                patch = patch.flip(1)
            patches.append(patch)
        batch = torch.stack(patches)[:, None]
        if self.low_contrast > 0.0:
            chosen = torch.rand(batch_size, generator=self.generator) < self.low_contrast
            factor = torch.where(chosen, 10.0 ** -torch.rand(batch_size, generator=self.generator), torch.ones(batch_size))
            mean = batch.mean(dim=(1, 2, 3), keepdim=True)
            batch = mean + factor[:, None, None, None] * (batch - mean)
        return batch

    def noisy_batch(self, batch_size: int) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
        """Return ``(clean, noisy, sigma)``, ``sigma`` shaped ``(batch_size,)``."""
        clean = self.clean_batch(batch_size)
        low, high = self.noise_range
        sigma = low + (high - low) * torch.rand(batch_size, generator=self.generator)
        noise = torch.randn(clean.shape, generator=self.generator) * sigma[:, None, None, None]
        return clean, clean + noise, sigma
