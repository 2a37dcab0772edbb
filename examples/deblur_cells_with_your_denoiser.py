# %% [markdown]
# # Deblurring a microscope frame of cells with your own denoiser
#
# Our widefield microscope blurs every frame with its point-spread function (here a
# Gaussian of 1.6 px) and adds camera noise. Plug-and-play forward-backward alternates a
# gradient step on the data term ``||A x - y||^2 / (2 s^2)`` with a denoiser. Whether
# that converges depends on the denoiser: if it is theta-averaged, the iteration map is
# averaged for every step below ``2 / L`` (Combettes & Yamada, J. Math. Anal. Appl. 425,
# 2015) and the Krasnosel'skii-Mann theorem applies. pnpguard measures theta, picks the
# step, and watches the run.
#
# Set ``PNPGUARD_EXAMPLE_SIZE`` to shrink the frame (the test suite runs this at 48 px).

# %%
import os

import matplotlib

matplotlib.use("Agg")  # in a notebook, drop this line and the figures show inline
import numpy as np
import scipy.ndimage

import pnpguard as pg

size = int(os.environ.get("PNPGUARD_EXAMPLE_SIZE", "128"))
truth = pg.phantoms.cells(size, seed=7)
blur = pg.Convolution(pg.gaussian_psf(9, 1.6), truth.shape)
noise = 0.01
data = blur(truth) + noise * np.random.default_rng(7).standard_normal(truth.shape)
fidelity = pg.LeastSquares(blur, data, sigma=noise)
print(f"data PSNR {pg.psnr(data, truth, data_range=1.0):.2f} dB")

# %% [markdown]
# ## Your denoiser
# Any function of an image will do. This one blends the image with a slightly smoothed
# copy: a numpy function, so pnpguard knows nothing about its structure and has to
# estimate its constants by search.

# %%
def gentle_smoothing(image: np.ndarray) -> np.ndarray:
    return 0.6 * image + 0.4 * scipy.ndimage.gaussian_filter(image, 0.8, mode="wrap")


denoiser = pg.as_denoiser(gentle_smoothing, name="gentle smoothing", backend="numpy")

# %% [markdown]
# ## Check, then the guarantee
# The report is an *estimate*: a lower bound on theta from ~200 denoiser calls. The
# guarantee built on it is therefore *conditional*, and uses theta inflated by a 5 %
# safety margin.

# %%
report = pg.check_denoiser(denoiser, blur.adjoint(data))
print(report)
guarantee = pg.admissible("forward_backward", fidelity, report)
print(guarantee)

# %% [markdown]
# ## Run, and look at the residual
# For an averaged iteration map the fixed-point residual never increases; the monitor
# would flag a rise (with the offending pair of iterates) if the estimate were optimistic.

# %%
result = pg.forward_backward(fidelity, denoiser, report=report, reference=truth, data_range=1.0, max_iter=200)
print(result)
figure = pg.plot_run(result)
figure.savefig(os.environ.get("PNPGUARD_EXAMPLE_OUTPUT", "deblur_cells_residuals.png"), dpi=80)
