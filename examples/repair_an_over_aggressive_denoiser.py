# %% [markdown]
# # An over-aggressive denoiser: refused, then repaired
#
# A colleague's denoiser takes one explicit diffusion (heat-equation) step
# ``D x = x - c * Laplacian(x)`` with ``c = 0.3``, beyond the stability limit 1/4 of the
# explicit scheme. Its eigenvalues ``1 - c * [0, 8]`` reach -1.4, so it expands
# checkerboard patterns: no theorem covers a PnP run with it. pnpguard finds a pair it
# expands, refuses, and computes the relaxation ``(1 - s) I + s D`` that makes it
# admissible (relaxing scales the averagedness statistic of every pair by ``s``).
#
# The scene: filling in the dead pixels (30 %) of a detector frame of cells.

# %%
import os

import numpy as np
import torch

import pnpguard as pg

size = int(os.environ.get("PNPGUARD_EXAMPLE_SIZE", "128"))
truth = pg.phantoms.cells(size, seed=11)
mask = pg.PixelMask(pg.random_pixel_mask(truth.shape, 0.3, seed=11))
noise = 0.01
data = mask(truth) + noise * mask(np.random.default_rng(11).standard_normal(truth.shape))
fidelity = pg.LeastSquares(mask, data, sigma=noise)


def diffusion_step(image: torch.Tensor, c: float = 0.3) -> torch.Tensor:
    laplacian = 4 * image - sum(torch.roll(image, s, d) for s in (1, -1) for d in (-1, -2))
    return image - c * laplacian


denoiser = pg.as_denoiser(diffusion_step, name="explicit diffusion", backend="torch")

# %% [markdown]
# ## The refusal

# %%
try:
    pg.forward_backward(fidelity, denoiser, reference=truth, data_range=1.0)
except pg.Refused as refusal:
    print(refusal)
    factor = refusal.relaxed_factor

# %% [markdown]
# ## The repair: the suggested relaxation, checked again

# %%
repaired = pg.relaxed(denoiser, factor)
result = pg.forward_backward(fidelity, repaired, reference=truth, data_range=1.0, max_iter=300)
print(result.report)
print(result)
