# %% [markdown]
# # Your own sensor model and your own files
#
# Two jobs from our lab. First, a camera that bins 2 x 2 pixels: we have its model as two
# functions (the binning and its adjoint) rather than as a pnpguard class.
# `pg.as_operator` turns them into an operator after a randomized dot test
# (<A x, y> = <x, A^T y>, Claerbout 1992), and since nothing is known of a function's
# structure its norm is a power-iteration estimate: the guarantee says so and is
# *conditional* on it (the estimate is inflated by the 5 % margin before use).
#
# Second, a 12-bit stack of microscope frames, stored in a 16-bit TIFF, with dead
# detector pixels marked in a mask image: `pnpguard recover` reads both, checks the
# denoiser once for the whole stack, and writes the result as a 16-bit TIFF with the
# same scaling, plus a JSON record of what was done.
#
# Set ``PNPGUARD_EXAMPLE_SIZE`` to shrink the frames (the test suite runs this at 48 px).

# %%
import json
import os

import imageio.v3 as iio
import numpy as np
import tifffile

import pnpguard as pg
from pnpguard.cli import main

size = int(os.environ.get("PNPGUARD_EXAMPLE_SIZE", "128"))
truth = pg.phantoms.cells(size, seed=11)


def bin2(image: np.ndarray) -> np.ndarray:
    """The camera: the mean of each 2 x 2 block."""
    return image.reshape(size // 2, 2, size // 2, 2).mean(axis=(1, 3))


def bin2_adjoint(low: np.ndarray) -> np.ndarray:
    """Its adjoint: each low-resolution value spread over its block, divided by 4."""
    return np.repeat(np.repeat(low, 2, axis=0), 2, axis=1) / 4.0


camera = pg.as_operator(bin2, (size, size), (size // 2, size // 2), adjoint=bin2_adjoint, name="2x2 binning")
print(camera, camera.norm_bound())

# %% [markdown]
# ## A low-resolution frame, reconstructed with a conditional guarantee

# %%
noise = 0.01
low = bin2(truth) + noise * np.random.default_rng(11).standard_normal((size // 2, size // 2))
fidelity = pg.LeastSquares(camera, low, sigma=noise)
result = pg.forward_backward(fidelity, pg.WaveletShrinkage(sigma=0.005), max_iter=100)
print(result.guarantee)
upsampled = np.repeat(np.repeat(low, 2, axis=0), 2, axis=1)
print(f"PSNR: pixel replication {pg.psnr(upsampled, truth, data_range=1.0):.2f} dB, "
      f"PnP {pg.psnr(result.x, truth, data_range=1.0):.2f} dB")

# %% [markdown]
# ## A stack with dead pixels, from files, on the command line
# The same as `pnpguard recover frames.tif --mask alive.png --sigma 0.01 --range 0 4095`
# in a terminal.

# %%
frames = np.stack([pg.phantoms.cells(size, seed=seed) for seed in range(3)])
alive = pg.random_pixel_mask((size, size), 0.3, seed=1) & pg.dead_lines_mask((size, size), rows=[size // 3])
recorded = frames * alive + noise * np.random.default_rng(1).standard_normal(frames.shape)
tifffile.imwrite("frames.tif", np.clip(np.rint(4095 * recorded), 0, 4095).astype(np.uint16),
                 photometric="minisblack")
iio.imwrite("alive.png", 255 * alive.astype(np.uint8))
status = main(["recover", "frames.tif", "--mask", "alive.png", "--sigma", str(noise), "--range", "0", "4095",
               "--denoiser", "tv", "--strength", "0.002", "--max-iter", "60", "--overwrite", "--no-progress"])
restored = tifffile.imread("frames-recovered.tif") / 4095.0
record = json.loads(open("frames-recovered.json").read())
def mean_psnr(images: np.ndarray) -> float:
    return float(np.mean([pg.psnr(image, frame, data_range=1.0) for image, frame in zip(images, frames)]))


print(f"exit status {status}; guarantee {record['guarantee']['status']}; mean PSNR: recorded frames "
      f"{mean_psnr(recorded):.2f} dB, restored {mean_psnr(restored):.2f} dB")
