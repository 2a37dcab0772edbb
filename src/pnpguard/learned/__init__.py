"""Learned denoisers trained on this package's own data and shipped with it.

- :func:`residual_cnn`: a residual (noise-predicting) network conditioned on
  the noise level, multi-scale (no guarantee; measure it).
- :func:`averaged_cnn`: ``(1 - theta) I + theta N`` with ``N`` a convolutional
  network whose layer norms are bounded for every image size; the
  averagedness is re-proved from the weights each time they are loaded.
- :func:`train_denoiser`: train either network on your own images;
  :func:`load_denoiser` loads the result, :func:`module_denoiser` wraps any
  torch network ``f(noisy, sigma)`` the same way. ``RESIDUAL_WEIGHTS`` and
  ``AVERAGED_WEIGHTS`` are the shipped files, a starting point for
  fine-tuning (``train_denoiser(..., initial_weights=RESIDUAL_WEIGHTS)``).
- :func:`gradient_step_cnn`: ``D = I - grad g`` with a computable potential
  ``g``; :func:`lab_gradient_step_cnn` is the same network fine-tuned on the
  lab's kinds of frames as well.
"""

from ._averaged import AveragedCNN, LayerBounds
from ._denoisers import (
    AVERAGED_WEIGHTS,
    GRADIENT_STEP_LAB_WEIGHTS,
    GRADIENT_STEP_WEIGHTS,
    RESIDUAL_WEIGHTS,
    LearnedDenoiser,
    averaged_cnn,
    gradient_step_cnn,
    lab_gradient_step_cnn,
    load_denoiser,
    load_network,
    module_denoiser,
    residual_cnn,
    verified_layer_bounds,
)
from ._gradient_step import GradientStepNetwork
from ._lipschitz import circular_conv_norm, conv_norm_bound
from ._multiscale import MultiscaleResidualCNN
from ._residual import ResidualCNN
from ._training import TrainingReport, load_training_images, train_denoiser

__all__ = [
    "AVERAGED_WEIGHTS",
    "GRADIENT_STEP_LAB_WEIGHTS",
    "GRADIENT_STEP_WEIGHTS",
    "RESIDUAL_WEIGHTS",
    "AveragedCNN",
    "GradientStepNetwork",
    "LayerBounds",
    "LearnedDenoiser",
    "MultiscaleResidualCNN",
    "ResidualCNN",
    "TrainingReport",
    "averaged_cnn",
    "circular_conv_norm",
    "conv_norm_bound",
    "gradient_step_cnn",
    "lab_gradient_step_cnn",
    "load_denoiser",
    "load_network",
    "load_training_images",
    "module_denoiser",
    "residual_cnn",
    "train_denoiser",
    "verified_layer_bounds",
]
