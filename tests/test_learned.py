"""Learned denoisers: shipped weights, layer-norm certificates, averagedness, training."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
import torch
import torch.nn.functional as F

import pnpguard as pg
from pnpguard.learned import (
    AveragedCNN,
    MultiscaleResidualCNN,
    ResidualCNN,
    averaged_cnn,
    circular_conv_norm,
    conv_norm_bound,
    load_denoiser,
    load_network,
    module_denoiser,
    residual_cnn,
    train_denoiser,
)
from pnpguard.learned._architectures import BY_CLASS_NAME, BY_NAME
from pnpguard.learned._averaged import dct_filters, reflected_shrink
from pnpguard.learned._data import LAB_FRAME_FIRST_SEED, LAB_FRAME_KINDS, PatchSampler, bundled_image, lab_frames
from pnpguard.learned._denoisers import AVERAGED_WEIGHTS, RESIDUAL_WEIGHTS, WEIGHTS_DIR
from pnpguard.learned._evaluate import held_out_table, noisy_copy
from pnpguard.learned._lipschitz import circular_conv, circular_conv_adjoint
from pnpguard.learned._training import _architecture_of
from pnpguard.learned._weights import read_weights, save_weights

RECORD = json.loads((WEIGHTS_DIR / "record.json").read_text())


# ------------------------------------------------------------------ helpers
def dense_conv(weight: torch.Tensor, size: tuple[int, int], padding: str) -> np.ndarray:
    """Matrix of a convolution layer on ``size`` images, column by column (float64)."""
    c_in = weight.shape[1]
    n = c_in * size[0] * size[1]
    basis = torch.eye(n, dtype=torch.float64).reshape(n, c_in, *size)
    if padding == "circular":
        out = circular_conv(basis, weight.double())
    else:
        out = F.conv2d(basis, weight.double(), padding=weight.shape[-1] // 2)
    return out.reshape(n, -1).T.numpy()


def power_iteration_norm(apply, adjoint, shape, iterations: int = 500) -> float:
    vector = torch.randn(shape, dtype=torch.float64, generator=torch.Generator().manual_seed(3))
    for _ in range(iterations):
        vector = adjoint(apply(vector))
        vector = vector / vector.norm()
    return float(apply(vector).norm())


def averagedness_excess(denoise, x: torch.Tensor, y: torch.Tensor, theta: float) -> float:
    """``||Dx - Dy||^2 + ((1 - theta)/theta) ||(I-D)x - (I-D)y||^2 - ||x - y||^2`` (<= 0 if averaged)."""
    dx, dy = denoise(x), denoise(y)
    a = x - y
    r = (x - dx) - (y - dy)
    return float((dx - dy).square().sum() + (1 - theta) / theta * r.square().sum() - a.square().sum())


# ------------------------------------------------------------ shipped weights
@pytest.mark.parametrize(
    ("factory", "key", "options"),
    [
        (residual_cnn, "residual", {}),
        (averaged_cnn, "averaged", {"theta": 0.9}),
        (pg.learned.gradient_step_cnn, "gradient-step", {}),
        (pg.learned.lab_gradient_step_cnn, "gradient-step-lab", {}),
    ],
)
def test_shipped_weights_reproduce_recorded_psnr(factory, key, options):
    # The record was written by benchmarks/train_learned.py right after training.
    entry = RECORD[key]
    table = entry["held_out_psnr"]["theta=0.9"] if key == "averaged" else entry["held_out_psnr"]
    clean = bundled_image("camera")
    sigma = 25 / 255
    noisy = noisy_copy(clean, sigma, seed=0)
    denoised = factory(sigma, **options)(noisy)
    value = pg.psnr(denoised, clean, data_range=1.0)
    assert abs(value - table["camera"]["25"]) <= 0.3, (value, table["camera"]["25"])
    assert value > pg.psnr(noisy, clean, data_range=1.0) + 4.0  # it denoises


def test_one_architecture_table_serves_training_and_loading(tmp_path):
    assert sorted(BY_NAME) == ["averaged", "gradient-step", "multiscale", "residual"]
    assert sorted(BY_CLASS_NAME) == sorted(entry.network.__name__ for entry in BY_NAME.values())
    for name, entry in BY_NAME.items():
        path = save_weights(tmp_path / f"{name}.pt", entry.network(), architecture=entry.class_name, training={})
        assert type(load_network(path)) is entry.network  # loading reads the table by class name
        assert _architecture_of(path) == name  # training maps the file back to the user name


def test_held_out_table_gives_inf_for_an_exact_denoiser():
    # An oracle that returns the clean picture: MSE 0, PSNR +inf by definition (no ZeroDivisionError).
    table = held_out_table(lambda noisy, sigma: bundled_image("moon"), names=("moon",), levels=(25,))
    assert table == {"moon": {"25": float("inf")}}
    # The noisy picture itself: 10 log10(1 / MSE) with the MSE computed here in numpy (definition).
    clean = bundled_image("moon")
    table = held_out_table(lambda noisy, sigma: noisy, names=("moon",), levels=(25,))
    mse = np.mean((noisy_copy(clean, 25 / 255).astype(np.float64) - clean) ** 2)
    assert abs(table["moon"]["25"] - 10 * np.log10(1.0 / mse)) < 1e-9


def test_held_out_images_never_in_training_record():
    for entry in RECORD.values():
        assert not set(entry["held_out_images"]) & set(entry["training_images"])
        assert not set(entry["validation_images"]) & set(entry["training_images"])


def test_lab_training_frames_are_never_a_benchmark_or_tuning_draw():
    # The lab network trains on fresh draws of the benchmark's phantom generators; a draw
    # is fixed by (phantom, seed), so no task's benchmark or tuning seed may be reused.
    from pnpguard.bench._tasks import TASKS

    used = {(t.phantom, t.seed) for t in TASKS.values()} | {(t.tuning_phantom, t.tuning_seed) for t in TASKS.values()}
    per_kind = 24  # benchmarks/train_learned.py, run "gradient-step-lab"
    trained = {(kind, LAB_FRAME_FIRST_SEED + k) for kind in LAB_FRAME_KINDS for k in range(per_kind)}
    assert not used & trained
    assert {phantom for phantom, _ in used} <= set(LAB_FRAME_KINDS)  # the kinds the lab meets
    frames = lab_frames(2, size=64)
    assert len(frames) == 2 * len(LAB_FRAME_KINDS)
    assert all(f.dtype == np.float32 and f.shape == (64, 64) and 0 <= f.min() and f.max() <= 1 for f in frames)
    # Draws differ from each other (not one frame repeated).
    assert not np.array_equal(frames[0], frames[1])
    with pytest.raises(ValueError, match="per_kind"):
        lab_frames(0)


def test_weights_are_plain_tensors_and_files_with_objects_are_refused(tmp_path):
    payload = read_weights(RESIDUAL_WEIGHTS)
    assert all(isinstance(t, torch.Tensor) for t in payload["state_dict"].values())
    bad = tmp_path / "bad.pt"
    torch.save({"format": "pnpguard-weights", "format_version": 1, "object": np.random.default_rng(0)}, bad)
    with pytest.raises(Exception, match="(?i)weights_only|unpickl|global"):
        read_weights(bad)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_layouts_dtypes_and_kinds_are_preserved(dtype):
    denoiser = residual_cnn(0.1)
    image = bundled_image("camera")[:32, :40].astype(dtype)
    out = denoiser(image)
    assert isinstance(out, np.ndarray) and out.dtype == dtype and out.shape == image.shape
    batch = torch.from_numpy(np.stack([image, image[::-1].copy()])[:, None]).repeat(1, 2, 1, 1)
    out_t = denoiser(batch)
    assert isinstance(out_t, torch.Tensor) and out_t.dtype == batch.dtype and out_t.shape == batch.shape
    # channels are denoised separately: each channel equals the 2-D result
    np.testing.assert_allclose(out_t[0, 1].numpy(), out, rtol=1e-5, atol=1e-5)
    assert np.array_equal(batch[0, 0].numpy(), image)  # input untouched


@pytest.mark.parametrize("make", [lambda: residual_cnn(0.1), lambda: averaged_cnn(0.1, theta=0.75)])
def test_a_float64_input_runs_the_network_in_its_weights_precision(make):
    denoiser = make()
    image = bundled_image("camera")[:32, :40]
    single = denoiser(image.astype(np.float32))
    double = denoiser(image.astype(np.float64))
    # Cast once in and once out: the float64 result is the float32 result, widened exactly.
    assert double.dtype == np.float64
    np.testing.assert_array_equal(double, single.astype(np.float64))
    assert denoiser.precision(torch.float64) == torch.float32
    assert denoiser.rounding_eps(torch.float64) == torch.finfo(torch.float32).eps
    # The traced path casts the same way, and gradients flow through the casts.
    t = torch.from_numpy(image.astype(np.float64)).requires_grad_(True)
    out = denoiser.apply_traced(t)
    assert out.dtype == torch.float64
    out.sum().backward()
    assert t.grad is not None and t.grad.dtype == torch.float64


def test_the_check_probes_a_network_at_the_input_precision():
    # Rounding of float32 outputs would hide small-scale expansions from the check's pairs, so
    # the check evaluates a float64 sample with a float64 copy of the network (and allows for
    # float64 rounding), while runs compute in float32.
    denoiser = residual_cnn(0.1)
    image = torch.from_numpy(bundled_image("camera")[:32, :40].astype(np.float64))
    reference = load_network(RESIDUAL_WEIGHTS).double()  # independent float64 copy of the weights
    with torch.no_grad():
        expected = reference(image[None, None].clone(), 0.1)[0, 0]
    with denoiser.at_input_precision():
        assert denoiser.precision(torch.float64) == torch.float64
        probed = denoiser.apply(image)
    torch.testing.assert_close(probed, expected, rtol=0, atol=1e-12)
    assert denoiser.precision(torch.float64) == torch.float32
    assert not torch.equal(denoiser.apply(image), probed)  # outside the block: float32 compute


def test_sigma_and_theta_outside_trained_range_are_refused():
    with pytest.raises(ValueError, match="sigma"):
        residual_cnn(0.5)
    with pytest.raises(ValueError, match="theta"):
        averaged_cnn(0.1, theta=0.3)


# ---------------------------------------------------------- norm certificates
def test_fft_norm_matches_dense_svd_and_power_iteration():
    generator = torch.Generator().manual_seed(0)
    weight = torch.randn(2, 2, 3, 3, dtype=torch.float64, generator=generator)
    for size in [(6, 6), (5, 7), (2, 3)]:
        dense = np.linalg.svd(dense_conv(weight, size, "circular"), compute_uv=False)[0]  # numpy.linalg.svd
        assert circular_conv_norm(weight, size) == pytest.approx(dense, rel=1e-10)
    power = power_iteration_norm(
        lambda v: circular_conv(v, weight), lambda u: circular_conv_adjoint(u, weight), (1, 2, 16, 16), 2000
    )
    assert circular_conv_norm(weight, (16, 16)) == pytest.approx(power, rel=1e-6)


def test_size_independent_bound_holds_and_is_tight():
    generator = torch.Generator().manual_seed(1)
    weight = torch.randn(3, 2, 3, 3, dtype=torch.float64, generator=generator)
    bound = conv_norm_bound(weight)
    circular = [circular_conv_norm(weight, (h, w)) for h in range(1, 40, 3) for w in (h, h + 1, 2 * h + 5)]
    zero_padded = [np.linalg.svd(dense_conv(weight, (h, w), "zero"), compute_uv=False)[0] for h, w in [(3, 3), (5, 8), (9, 9)]]
    assert max(circular + zero_padded) <= bound
    # not loose: within the Bernstein factor 1/(1 - 4 pi^2 / 32768) of the 128x128 norm
    assert bound <= circular_conv_norm(weight, (128, 128)) * 1.00121


def test_shipped_averaged_layers_agree_with_power_iteration_on_the_layer():
    model = load_network(AVERAGED_WEIGHTS).double()
    weight = model.convs[1].weight.detach()
    size = (1, weight.shape[1], 12, 12)
    exact = circular_conv_norm(weight, (12, 12))
    power = power_iteration_norm(
        lambda v: circular_conv(v, weight), lambda u: circular_conv_adjoint(u, weight), size, 2000
    )
    # power iteration approaches the norm from below
    assert exact * (1 - 1e-4) <= power <= exact * (1 + 1e-12)
    # the layer as used (zero padding) stays below the certified all-sizes bound
    zero_padded = power_iteration_norm(
        lambda v: F.conv2d(v, weight, padding=1), lambda u: F.conv_transpose2d(u, weight, padding=1), size, 500
    )
    assert zero_padded <= conv_norm_bound(weight) <= 1.0


# ---------------------------------------------------------------- averagedness
def test_expansive_map_fails_the_pair_inequality():
    # sanity check of the helper: 1.1 I is expansive, hence not averaged for any theta
    x, y = torch.zeros(4, 4, dtype=torch.float64), torch.ones(4, 4, dtype=torch.float64)
    assert averagedness_excess(lambda t: 1.1 * t, x, y, 0.9) > 0


@pytest.mark.parametrize("theta", [0.5, 0.9])
def test_shipped_averaged_denoiser_is_verified_and_pairs_obey_the_inequality(theta):
    denoiser = averaged_cnn(20 / 255, theta=theta)
    (fact,) = denoiser.facts
    assert fact.kind == "averaged" and fact.verified and fact.theta == theta
    assert fact.residual_lipschitz <= 2 * theta
    generator = torch.Generator().manual_seed(int(100 * theta))
    clean = torch.from_numpy(bundled_image("camera")[200:232, 200:232]).double()
    worst = -np.inf
    for scale in (1e-3, 0.05, 0.5):
        for _ in range(4):
            x = clean + 0.1 * torch.randn(clean.shape, dtype=torch.float64, generator=generator)
            y = x + scale * torch.randn(clean.shape, dtype=torch.float64, generator=generator)
            excess = averagedness_excess(denoiser.apply, x, y, theta)
            worst = max(worst, excess / float((x - y).square().sum()))
    assert worst <= 1e-9


def test_averaged_network_keeps_the_mean_and_commutes_with_brightness_shifts():
    # N = P + (I - P) M (I - P): (I - P)(y + c) = (I - P) y for a constant c, so
    # N(y + c) = N(y) + c and the mean of D(y) is the mean of y, whatever M is.
    torch.manual_seed(5)
    network = AveragedCNN(depth=3, width=10).double()
    with torch.no_grad():
        for conv in network.convs:
            conv.weight.normal_(0.0, 0.3)
        network.condition[-1].bias.normal_(0.0, 1.0)
    image = torch.rand(2, 1, 12, 15, dtype=torch.float64)
    with torch.no_grad():
        out = network(image, 0.1, 0.8)
        shifted = network(image + 0.37, 0.1, 0.8)
    torch.testing.assert_close(shifted, out + 0.37, rtol=0, atol=1e-12)
    torch.testing.assert_close(out.mean(dim=(-2, -1)), image.mean(dim=(-2, -1)), rtol=0, atol=1e-12)
    assert float((out - image).abs().max()) > 1e-3  # and it is not the identity


def test_gain_above_one_drops_every_claim_and_scales_the_network_part():
    theta, gain, sigma = 0.75, 1.1, 20 / 255
    widened = averaged_cnn(sigma, theta=theta, gain=gain)
    assert widened.name == "widened CNN (theta=0.75, gain=1.1)"
    assert widened.facts == ()
    image = torch.from_numpy(bundled_image("camera")[:24, :24])[None, None]
    network = load_network(AVERAGED_WEIGHTS)
    with torch.no_grad():
        part = network.nonexpansive_part(image, sigma, theta)
        mean = image.mean()
        expected = (1 - theta) * image + theta * (mean + gain * (part - mean))
    torch.testing.assert_close(widened(image), expected, rtol=1e-5, atol=1e-6)
    with pytest.raises(ValueError, match="`gain` must be a finite number in"):
        averaged_cnn(sigma, theta=theta, gain=0.9)
    with pytest.raises(ValueError, match="`gain` apply to averaged networks only"):
        load_denoiser(RESIDUAL_WEIGHTS, sigma, gain=1.1)


def test_theta_defaults_to_the_value_the_weights_file_records(tmp_path):
    # shipped file: the recorded default (0.9) is what averaged_cnn uses without `theta`
    recorded = read_weights(AVERAGED_WEIGHTS)["training"]["default_theta"]
    assert recorded == 0.9
    assert averaged_cnn(0.1).facts[0].theta == recorded
    assert load_denoiser(AVERAGED_WEIGHTS, 0.1).name == "averaged CNN (theta=0.9)"
    assert load_denoiser(AVERAGED_WEIGHTS, 0.1, theta=0.6).facts[0].theta == 0.6  # overridable
    # a file that records no default needs `theta`
    payload = read_weights(AVERAGED_WEIGHTS)
    training = {key: value for key, value in payload["training"].items() if key != "default_theta"}
    bare = tmp_path / "bare.pt"
    torch.save({**payload, "training": training}, bare)
    with pytest.raises(ValueError, match="`theta` is required: .*records no default theta"):
        load_denoiser(bare, 0.1)
    assert load_denoiser(bare, 0.1, theta=0.7).facts[0].theta == 0.7


def test_training_records_the_default_theta(tmp_path):
    image = bundled_image("camera")[100:164, 100:164]
    settings = {
        "architecture": "averaged", "depth": 2, "width": 9, "steps": 1, "patch_size": 24,
        "batch_size": 2, "theta_range": (0.6, 0.9), "progress": False,
    }
    middle = train_denoiser([image], save_to=tmp_path / "middle.pt", **settings)
    # default: the middle of theta_range, (0.6 + 0.9) / 2
    assert read_weights(middle.path)["training"]["default_theta"] == pytest.approx(0.75)
    assert load_denoiser(middle.path, 0.1).facts[0].theta == pytest.approx(0.75)
    chosen = train_denoiser([image], save_to=tmp_path / "chosen.pt", default_theta=0.8, **settings)
    assert load_denoiser(chosen.path, 0.1).facts[0].theta == 0.8
    with pytest.raises(ValueError, match=r"`default_theta` must be a number in `theta_range` \[0.6, 0.9\], got 0.95"):
        train_denoiser([image], default_theta=0.95, **settings)
    with pytest.raises(ValueError, match="`default_theta` do not apply to the 'residual' architecture"):
        train_denoiser([image], architecture="residual", steps=1, default_theta=0.8, progress=False)


def test_tampered_weights_lose_the_averagedness_claim(tmp_path):
    payload = read_weights(AVERAGED_WEIGHTS)
    state = dict(payload["state_dict"])
    key = "convs.2.weight"
    state[key] = state[key] * 1.5
    tampered = tmp_path / "tampered.pt"
    torch.save({**payload, "state_dict": state}, tampered)
    with pytest.warns(UserWarning, match="no averagedness is claimed"):
        denoiser = averaged_cnn(0.1, theta=0.9, weights=tampered)
    assert denoiser.facts == ()
    # shrinking a layer keeps the proof
    state[key] = payload["state_dict"][key] * 0.5
    torch.save({**payload, "state_dict": state}, tampered)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert averaged_cnn(0.1, theta=0.9, weights=tampered).facts[0].verified


# -------------------------------------------------------------------- training
@pytest.mark.parametrize("architecture", ["residual", "averaged", "multiscale"])
def test_training_reduces_loss_and_saves_loadable_weights(tmp_path, architecture):
    image = bundled_image("camera")[100:164, 100:164]
    sizes = {"widths": [6, 8], "blocks": 1} if architecture == "multiscale" else {"depth": 3, "width": 10}
    settings = {
        "architecture": architecture,
        "noise_range": (0.05, 0.15),
        "steps": 40,
        **sizes,
        "patch_size": 24,
        "batch_size": 8,
        "learning_rate": 3e-3,
        "validate_every": 20,
        "progress": False,
        "seed": 0,
    }
    report = train_denoiser([image], save_to=tmp_path / "mine.pt", **settings)
    assert report.steps == 40 and len(report.losses) == 2
    assert report.losses[-1] < report.losses[0]
    denoiser = load_denoiser(report.path, 0.1)
    assert denoiser(image).shape == image.shape
    if architecture == "averaged":
        assert denoiser.facts[0].verified
    again = train_denoiser([image], **settings)
    for (name, first), second in zip(report.model.state_dict().items(), again.model.state_dict().values()):
        assert torch.equal(first, second), name  # seeded: identical weights


def test_fine_tuning_starts_from_the_given_weights(tmp_path):
    image = bundled_image("camera")[100:164, 100:164]
    settings = {"steps": 1, "patch_size": 24, "batch_size": 4, "progress": False, "seed": 0}
    first = train_denoiser([image], depth=3, width=6, learning_rate=1e-3, save_to=tmp_path / "a.pt", **settings)
    again = train_denoiser([image], initial_weights=first.path, learning_rate=1e-7, **settings)
    # one Adam step moves each weight by about the learning rate (Kingma & Ba 2015, Sec. 2.1)
    for (name, start), end in zip(first.model.state_dict().items(), again.model.state_dict().values()):
        assert float((start - end).abs().max()) <= 2e-7, name
    with pytest.raises(ValueError, match="sizes"):
        train_denoiser([image], initial_weights=first.path, width=8, **settings)
    with pytest.raises(ValueError, match="initial_weights"):
        train_denoiser([image], architecture="averaged", initial_weights=first.path, **settings)
    # without `architecture` the file decides: the shipped multi-scale weights fine-tune as they are
    shipped = train_denoiser([image], initial_weights=RESIDUAL_WEIGHTS, learning_rate=1e-7, **settings)
    assert isinstance(shipped.model, type(load_network(RESIDUAL_WEIGHTS)))


def test_unshuffled_network_folds_and_unfolds_pixels_consistently():
    # Weights chosen so that R copies its four folded input channels to its
    # four outputs: R(y) = y for y >= 0, hence D(y) = y - R(y) = 0 exactly when
    # the fold (pixel_unshuffle) and the unfold (pixel_shuffle) are inverse,
    # including the padding of odd sizes.
    network = ResidualCNN(depth=2, width=5, unshuffle=2)
    with torch.no_grad():
        for conv in network.body[::2]:
            conv.weight.zero_()
            conv.bias.zero_()
        network.body[0].weight[torch.arange(4), torch.arange(4), 1, 1] = 1.0
        network.body[2].weight[torch.arange(4), torch.arange(4), 1, 1] = 1.0
    image = torch.rand(2, 1, 7, 9, generator=torch.Generator().manual_seed(0))
    for sigma in (0.1, torch.tensor([0.1, 0.2]), torch.full((2, 1, 7, 9), 0.1)):
        with torch.no_grad():
            out = network(image, sigma)
        assert out.shape == image.shape
        assert float(out.abs().max()) == 0.0
    assert ResidualCNN(depth=3, width=4, unshuffle=2).config()["unshuffle"] == 2
    with pytest.raises(ValueError, match="unshuffle"):
        ResidualCNN(unshuffle=0)


def test_multiscale_network_reaches_far_and_handles_any_size():
    # Receptive field: 3x3 convolutions at full resolution reach 1 pixel each;
    # every coarser level multiplies the reach of its convolutions by 2. With
    # widths (4, 4, 4, 4) and one block per level a pixel 40 rows away must
    # influence the output, which no 12-layer plain stack (reach 12) can do.
    torch.manual_seed(0)
    network = MultiscaleResidualCNN(widths=(4, 4, 4, 4), blocks=1)
    for block in network.modules():  # leave the identity start: random second convolutions
        if isinstance(block, torch.nn.Conv2d):
            torch.nn.init.normal_(block.weight, std=0.3)
    image = torch.rand(1, 1, 96, 96, generator=torch.Generator().manual_seed(1), requires_grad=True)
    network(image, 0.1)[0, 0, 8, 48].backward()
    influence = image.grad[0, 0].abs()
    assert float(influence[48:, :].max()) > 0.0
    assert float(influence[8 + 60 :, :].max()) == 0.0  # but the reach is finite
    for shape in [(1, 1, 37, 45), (2, 3, 8, 9), (1, 1, 5, 6)]:
        noisy = torch.rand(shape, generator=torch.Generator().manual_seed(2))
        for sigma in (0.1, torch.full((shape[0],), 0.1), torch.full((shape[0], 1, shape[2], shape[3]), 0.1)):
            with torch.no_grad():
                out = network(noisy, sigma)
            assert out.shape == noisy.shape and bool(torch.isfinite(out).all())
    with torch.no_grad():  # channels are denoised separately
        both = network(torch.rand(1, 2, 16, 16, generator=torch.Generator().manual_seed(3)), 0.1)
        alone = network(torch.rand(1, 2, 16, 16, generator=torch.Generator().manual_seed(3))[:, 1:], 0.1)
    torch.testing.assert_close(both[:, 1:], alone)
    assert MultiscaleResidualCNN(widths=(4, 8), blocks=2).config() == {"widths": [4, 8], "blocks": 2, "activation": "relu"}
    with pytest.raises(ValueError, match="activation"):
        MultiscaleResidualCNN(activation="tanh")
    with pytest.raises(ValueError, match="widths"):
        MultiscaleResidualCNN(widths=(4,))
    with pytest.raises(ValueError, match="blocks"):
        MultiscaleResidualCNN(blocks=0)


def test_he_initialisation_keeps_the_signal_scale_through_the_depth():
    # He et al. (2015), Sec. 2.2: weights of variance 2 / fan_in keep the second
    # moment of ReLU activations constant with depth; torch's default shrinks it.
    image = torch.randn(4, 1, 32, 32, generator=torch.Generator().manual_seed(1))
    scales = {}
    for scheme in ("he", "torch-default"):
        torch.manual_seed(0)
        network = ResidualCNN(depth=15, width=32, initialisation=scheme)
        with torch.no_grad():
            hidden = network.body[:-1](torch.cat([image, torch.full_like(image, 0.1)], dim=1))
        scales[scheme] = float(hidden.square().mean().sqrt())
    assert 0.2 < scales["he"] < 5.0
    assert scales["torch-default"] < 0.2 * scales["he"]
    with pytest.raises(ValueError, match="initialisation"):
        ResidualCNN(initialisation="zeros")


def test_low_contrast_patches_keep_their_mean_and_shrink_by_the_drawn_factor():
    images = [bundled_image("camera")]
    plain = PatchSampler(images, 32, (0.1, 0.1), seed=4).clean_batch(64)
    faint = PatchSampler(images, 32, (0.1, 0.1), seed=4, low_contrast=1.0).clean_batch(64)
    torch.testing.assert_close(faint.mean(dim=(1, 2, 3)), plain.mean(dim=(1, 2, 3)), rtol=0, atol=1e-5)
    keep = plain.std(dim=(1, 2, 3)) > 1e-3
    ratio = faint.std(dim=(1, 2, 3))[keep] / plain.std(dim=(1, 2, 3))[keep]
    assert float(ratio.min()) >= 0.1 - 1e-4 and float(ratio.max()) <= 1.0 + 1e-4
    assert float(ratio.max() - ratio.min()) > 0.5  # factors spread over [0.1, 1]
    half = PatchSampler(images, 32, (0.1, 0.1), seed=4, low_contrast=0.5).clean_batch(400)
    again = PatchSampler(images, 32, (0.1, 0.1), seed=4).clean_batch(400)
    changed = (half - again).abs().amax(dim=(1, 2, 3)) > 1e-6
    assert 0.35 < float(changed.float().mean()) < 0.65
    with pytest.raises(ValueError, match="low_contrast"):
        PatchSampler(images, 32, (0.1, 0.1), seed=4, low_contrast=1.5)


def test_training_rejects_bad_input():
    with pytest.raises(ValueError, match="budget"):
        train_denoiser([np.zeros((64, 64))])
    with pytest.raises(TypeError, match="images"):
        train_denoiser([np.zeros((64, 64), dtype=np.uint8)], steps=1)
    with pytest.raises(ValueError, match="architecture"):
        train_denoiser([np.zeros((64, 64))], steps=1, architecture="unet")
    with pytest.raises(ValueError, match="`depth`.*multiscale"):
        train_denoiser([np.zeros((64, 64))], steps=1, architecture="multiscale", depth=3)
    with pytest.raises(ValueError, match="`widths`.*residual"):
        train_denoiser([np.zeros((64, 64))], steps=1, widths=[4, 8])


def test_module_denoiser_wraps_a_network_with_unverified_claims():
    network = ResidualCNN(depth=2, width=4)
    denoiser = module_denoiser(network, 0.1, name="mine", claims=["nonexpansive"])
    assert denoiser.differentiable and not denoiser.facts[0].verified
    image = torch.rand(1, 1, 8, 8)
    expected = network(image, 0.1)
    torch.testing.assert_close(denoiser(image), expected.detach())


def test_reflected_shrink_is_one_lipschitz_exactly_for_slopes_up_to_two():
    generator = torch.Generator().manual_seed(5)
    z1 = torch.randn(64, 6, 1, 1, dtype=torch.float64, generator=generator)
    z2 = z1 + 0.01 * torch.randn(z1.shape, dtype=torch.float64, generator=generator)
    threshold = torch.full((64, 6), 0.5, dtype=torch.float64)
    for beta, admissible in ((0.0, True), (1.0, True), (2.0, True), (2.5, False)):
        slope = torch.full((64, 6), beta, dtype=torch.float64)
        ratio = (reflected_shrink(z1, threshold, slope) - reflected_shrink(z2, threshold, slope)).abs() / (z1 - z2).abs()
        assert (ratio.max() <= 1 + 1e-12) == admissible, beta


def test_dct_frame_matches_scipy_and_is_parseval():
    from scipy.fft import dctn  # reference: scipy's orthonormal DCT-II

    filters = dct_filters(3)
    patch = np.random.default_rng(0).standard_normal((3, 3))
    coefficients = np.einsum("kab,ab->k", filters.numpy(), patch)
    np.testing.assert_allclose(np.sort(np.abs(coefficients)), np.sort(np.abs(dctn(patch, norm="ortho").ravel())), atol=1e-12)
    # Parseval as a convolution frame after scaling by 1/3: the stacked filters have norm 1
    assert circular_conv_norm((filters / 3)[:, None], (16, 16)) == pytest.approx(1.0, abs=1e-12)


def test_fresh_averaged_network_is_verified_after_finishing():
    model = AveragedCNN(depth=3, width=10)
    model.convs[1].weight.data *= 3.0  # deliberately too large
    assert not model.layer_bounds().nonexpansive
    model.finish_normalised_training()
    assert model.layer_bounds().nonexpansive


def _tiny_frames():
    rng = np.random.default_rng(7)
    return [rng.random((40, 40)).astype(np.float32) for _ in range(3)]


def test_gradient_step_network_trains_saves_and_loads_with_its_structure(tmp_path):
    path = tmp_path / "gs.pt"
    report = pg.train_denoiser(_tiny_frames(), architecture="gradient-step", widths=(4, 8), steps=3,
                               batch_size=2, patch_size=32, validate_every=3, save_to=path, progress=False)
    assert report.steps == 3 and path.is_file()
    denoiser = pg.load_denoiser(path, 0.1)
    assert isinstance(denoiser, pg.GradientStepDenoiser) and denoiser.facts[0].verified
    direct = pg.learned.gradient_step_cnn(0.1, weights=path, weight=0.5)
    x = torch.rand(1, 1, 24, 24, dtype=torch.float64, generator=torch.Generator().manual_seed(0))
    # D = I - weight grad g: the weight scales the step exactly.
    torch.testing.assert_close(x - direct.apply(x), 0.5 * (x - denoiser.apply(x)))
    with pytest.raises(ValueError, match="noise range"):
        pg.learned.gradient_step_cnn(1.0, weights=path)


def test_an_interrupted_training_resumes_where_it_stopped(tmp_path, monkeypatch):
    # Same budget, same seed: 6 steps in one run, or 3 steps, an interruption, and a resumed
    # run from the checkpoint, give the same weights to the bit (random streams restored).
    from pnpguard.learned import _data

    settings = dict(architecture="residual", depth=3, width=4, steps=6, batch_size=2, patch_size=32,
                    validate_every=3, progress=False)
    whole = pg.train_denoiser(_tiny_frames(), **settings).model
    checkpoint = tmp_path / "run.checkpoint"
    original = _data.PatchSampler.noisy_batch
    calls = {"n": 0}

    def interrupted(self, batch_size):
        calls["n"] += 1
        if calls["n"] == 5:
            raise KeyboardInterrupt
        return original(self, batch_size)

    monkeypatch.setattr(_data.PatchSampler, "noisy_batch", interrupted)
    with pytest.raises(KeyboardInterrupt):
        pg.train_denoiser(_tiny_frames(), checkpoint=checkpoint, **settings)
    monkeypatch.setattr(_data.PatchSampler, "noisy_batch", original)
    assert checkpoint.is_file()
    resumed = pg.train_denoiser(_tiny_frames(), checkpoint=checkpoint, **settings)
    assert resumed.steps == 6
    for name, tensor in whole.state_dict().items():
        torch.testing.assert_close(resumed.model.state_dict()[name], tensor, rtol=0, atol=0)
