"""The denoiser interface: wrapping user functions and modules, facts, relaxation."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import torch

from pnpguard import Denoiser, DenoiserError, Fact, as_denoiser, check_denoiser, relaxed

DTYPES = [np.float32, np.float64]
TORCH_DTYPE = {np.float32: torch.float32, np.float64: torch.float64}


def _numpy_halve(x: np.ndarray) -> np.ndarray:
    # Annotated as numpy, so numpy is chosen without a trial call.
    return x.astype(x.dtype) * 0.5


class _Halve(torch.nn.Module):
    def __init__(self, dtype: torch.dtype = torch.float64):
        super().__init__()
        self.scale = torch.nn.Parameter(torch.tensor(0.5, dtype=dtype))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        assert x.ndim == 4, "modules must receive (N, C, H, W)"
        return self.scale * x


def _wrapped() -> list[Denoiser]:
    return [
        as_denoiser(lambda x: 0.5 * x, name="torch-halve", backend="torch"),
        as_denoiser(_numpy_halve),
        as_denoiser(_Halve()),
    ]


# ------------------------------------------------------------ kinds and layouts
@pytest.mark.parametrize("dtype", DTYPES)
@pytest.mark.parametrize("shape", [(6, 7), (2, 3, 6, 7)])
@pytest.mark.parametrize("index", range(3))
def test_kind_dtype_and_layout_preserved(dtype, shape, index):
    den = _wrapped()[index]
    rng = np.random.default_rng(0)
    x = rng.random(shape).astype(dtype)
    out = den(x)
    assert isinstance(out, np.ndarray) and out.dtype == dtype and out.shape == shape
    np.testing.assert_allclose(out, 0.5 * x, rtol=1e-6)
    xt = torch.from_numpy(x.copy())
    out_t = den(xt)
    assert isinstance(out_t, torch.Tensor) and out_t.dtype == TORCH_DTYPE[dtype]
    assert out_t.shape == xt.shape and out_t.device == xt.device
    applied = den.apply(xt)
    assert applied.shape == xt.shape and applied.dtype == xt.dtype


def test_numpy_function_detected_and_given_2d_images():
    seen = []

    def record(x):
        seen.append(tuple(x.shape))
        return x.astype(x.dtype)

    den = as_denoiser(record)
    den(np.zeros((2, 3, 4, 5)))
    assert den._backend == "numpy"
    # six numpy calls, one per image; the first one decided the backend and was kept
    assert seen == [(4, 5)] * 6


def test_input_never_modified():
    def destroy_numpy(x):
        x *= 0.0
        return x

    def destroy_torch(x):
        x.mul_(0.0)
        return x

    class Destroy(torch.nn.Module):
        def forward(self, x):
            return x.mul_(0.0)

    for den in (
        as_denoiser(destroy_numpy, backend="numpy"),
        as_denoiser(destroy_torch, backend="torch"),
        as_denoiser(destroy_torch),
        as_denoiser(Destroy()),
    ):
        x = np.arange(1.0, 13.0).reshape(3, 4)
        t = torch.arange(1.0, 13.0, dtype=torch.float64).reshape(1, 1, 3, 4)
        den(x)
        den.apply(t)
        np.testing.assert_array_equal(x, np.arange(1.0, 13.0).reshape(3, 4))
        assert torch.equal(t, torch.arange(1.0, 13.0, dtype=torch.float64).reshape(1, 1, 3, 4))


# ----------------------------------------------------------------- bad output
@pytest.mark.parametrize(
    "den",
    [
        as_denoiser(lambda x: x[..., 1:, :], name="crop-torch", backend="torch"),
        as_denoiser(lambda x: x[1:, :], name="crop-numpy", backend="numpy"),
        as_denoiser(torch.nn.Conv2d(1, 1, 3).double(), name="crop-module"),
    ],
    ids=["torch", "numpy", "module"],
)
def test_wrong_output_shape_is_a_clear_error(den):
    with pytest.raises(DenoiserError) as info:
        den(np.zeros((6, 5)))
    message = str(info.value)
    assert den.name in message and "(6, 5)" in message and "returned" in message


def test_nan_output_is_a_clear_error_on_first_call():
    def poison(x):
        y = x.copy()
        y[:2, :3] = np.nan
        return y

    den = as_denoiser(poison, name="poison", backend="numpy")
    with pytest.raises(DenoiserError, match=r"'poison' returned 6 NaN and 0 infinite"):
        den.apply(torch.zeros(4, 4, dtype=torch.float64))


def test_nan_output_caught_by_call_after_the_first_call():
    calls = []

    def later_nan(x):
        calls.append(1)
        return x * (np.nan if len(calls) > 1 else 1.0)

    den = as_denoiser(later_nan, name="later", backend="numpy")
    den(np.ones((3, 3)))
    with pytest.raises(DenoiserError, match=r"'later' returned 9 NaN"):
        den(np.ones((3, 3)))


def test_wrong_shape_caught_after_the_first_call_too():
    calls = []

    def later_crop(x):
        calls.append(1)
        return x if len(calls) == 1 else x[..., 1:]

    den = as_denoiser(later_crop, backend="torch")
    den.apply(torch.zeros(4, 4))
    with pytest.raises(DenoiserError, match="returned"):
        den.apply(torch.zeros(4, 4))


@pytest.mark.parametrize("den", _wrapped(), ids=["torch", "numpy", "module"])
def test_integer_input_rejected(den):
    with pytest.raises(TypeError, match=r"dtype int64; expected float32 or float64"):
        den(np.zeros((4, 4), dtype=np.int64))
    with pytest.raises(ValueError, match="non-finite"):
        den(np.full((4, 4), np.nan))
    with pytest.raises(TypeError, match=r"torch.float32 or torch.float64"):
        den.apply(torch.zeros(4, 4, dtype=torch.int32))


def test_half_precision_module_rejected():
    with pytest.raises(TypeError, match=r"float16.*float32 or float64"):
        as_denoiser(torch.nn.Conv2d(1, 1, 3).half())


def test_module_runs_in_its_dtype_in_eval_mode():
    module = torch.nn.Sequential(torch.nn.Conv2d(1, 1, 3, padding=1), torch.nn.Dropout(0.5))
    module = module.double().train()
    den = as_denoiser(module)
    assert not module.training and den.differentiable
    x = torch.rand(5, 6, generator=torch.Generator().manual_seed(1))
    out = den(x)
    assert out.dtype == torch.float32 and out.shape == (5, 6)
    expected = module(x.double()[None, None])[0, 0].float()  # dropout is off in eval mode
    torch.testing.assert_close(out, expected.detach())


def test_apply_traced():
    den = as_denoiser(_Halve())
    x = torch.rand(1, 1, 4, 4, dtype=torch.float64, requires_grad=True)
    den.apply_traced(x).sum().backward()
    torch.testing.assert_close(x.grad, torch.full_like(x, 0.5))
    assert not den.apply(x).requires_grad
    with pytest.raises(TypeError, match="not differentiable"):
        as_denoiser(_numpy_halve).apply_traced(x)
    jacobian = torch.func.jacrev(den.apply_traced)(x.detach()[0, 0])
    torch.testing.assert_close(jacobian.reshape(16, 16), 0.5 * torch.eye(16, dtype=torch.float64))


def test_as_denoiser_argument_errors():
    den = as_denoiser(_numpy_halve)
    assert as_denoiser(den) is den
    with pytest.raises(ValueError, match="already a Denoiser"):
        as_denoiser(den, claims=["proximal"])
    with pytest.raises(TypeError, match="callable"):
        as_denoiser(3.0)
    with pytest.raises(ValueError, match=r"\['numpy', 'torch'\]"):
        as_denoiser(_numpy_halve, backend="jax")
    with pytest.raises(ValueError, match="cannot be differentiable"):
        as_denoiser(_numpy_halve, backend="numpy", differentiable=True)
    with pytest.raises(ValueError, match="positive"):
        as_denoiser(_numpy_halve, sigma=-1.0)


# ---------------------------------------------------------------------- facts
def test_user_claims_are_stored_unverified():
    claimed = Fact.averaged(0.3, "trained with a Lipschitz penalty", verified=True)
    den = as_denoiser(
        _numpy_halve, claims=[claimed, "proximal", ("linear_symmetric", (0.5, 0.5))]
    )
    assert [f.kind for f in den.facts] == ["averaged", "proximal", "linear_symmetric"]
    assert all(not f.verified for f in den.facts)
    assert all(f.source.startswith("the user's claim") for f in den.facts)
    assert "trained with a Lipschitz penalty" in den.facts[0].source
    assert den.facts[0].theta == 0.3 and den.facts[2].theta == pytest.approx(0.25)
    with pytest.raises(ValueError, match="each claim"):
        as_denoiser(_numpy_halve, claims=[("firm", 0.5)])
    with pytest.raises(ValueError, match="'nonexpansive' or 'proximal'"):
        as_denoiser(_numpy_halve, claims=["firm"])


def test_fact_validation_and_text():
    with pytest.raises(ValueError, match="valid: 'averaged', 'gradient_step', 'linear_symmetric', 'nonexpansive', 'proximal'"):
        Fact("firm")
    with pytest.raises(ValueError, match="needs `theta`"):
        Fact("averaged")
    with pytest.raises(ValueError, match="contradicts"):
        Fact("linear_symmetric", spectrum=(0.0, 1.0), theta=0.2)
    with pytest.raises(ValueError, match="a <= b"):
        Fact.linear_symmetric((1.0, 0.0), "x")
    fact = Fact.linear_symmetric((-0.5, 0.9), "dense matrix", verified=True)
    assert (fact.theta, fact.lipschitz, fact.residual_lipschitz) == (0.75, 0.9, 1.5)
    assert Fact.linear_symmetric((0.0, 1.5), "x").theta is None  # expansive: not averaged
    text = str(Fact.proximal("soft thresholding", verified=True, tolerance=1e-3))
    assert "theta <= 0.5" in text and "verified" in text and "0.001" in text


def _dense_symmetric(n: int, low: float, high: float, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    q, _ = np.linalg.qr(rng.standard_normal((n, n)))
    eigenvalues = np.linspace(low, high, n)
    return (q * eigenvalues) @ q.T


@pytest.mark.parametrize("s", [0.3, 0.5, 0.9])
@pytest.mark.parametrize("low, high", [(-0.8, 1.0), (-0.3, 0.6)])
def test_relaxed_facts_match_dense_linear_algebra(s, low, high):
    side = 4
    matrix = _dense_symmetric(side * side, low, high, seed=3)
    spectrum = tuple(np.linalg.eigvalsh(matrix)[[0, -1]])
    den = as_denoiser(
        lambda x: (torch.from_numpy(matrix) @ x.reshape(-1)).reshape(x.shape),
        name="dense",
        backend="torch",
        claims=[("linear_symmetric", spectrum), "nonexpansive"],
    )
    relaxed_den = relaxed(den, s)
    assert relaxed_den.name == f"relaxed({s:g}) dense"
    eye = np.eye(side * side)
    relaxed_matrix = (1 - s) * eye + s * matrix
    x = np.random.default_rng(4).random((side, side))
    np.testing.assert_allclose(relaxed_den(x).reshape(-1), relaxed_matrix @ x.reshape(-1))
    # numpy.linalg.eigvalsh / norm of the dense relaxed matrix as the reference
    eig = np.linalg.eigvalsh(relaxed_matrix)
    linear, nonexpansive = relaxed_den.facts
    assert linear.kind == "linear_symmetric" and not linear.verified
    np.testing.assert_allclose(linear.spectrum, (eig[0], eig[-1]), atol=1e-12)
    assert linear.lipschitz == pytest.approx(np.abs(eig).max(), abs=1e-12)
    assert linear.residual_lipschitz == pytest.approx(np.linalg.norm(eye - relaxed_matrix, 2))
    # theta is the smallest constant with N = I - (I - T)/theta nonexpansive
    # (definition of averagedness, Combettes & Yamada 2015, Def. 1.1)
    theta = linear.theta
    assert np.linalg.norm(eye - (eye - relaxed_matrix) / theta, 2) == pytest.approx(1.0)
    assert np.linalg.norm(eye - (eye - relaxed_matrix) / (0.99 * theta), 2) > 1.0
    assert linear.theta == pytest.approx(s * den.facts[0].theta)
    # a merely nonexpansive map becomes s-averaged
    assert nonexpansive.kind == "averaged" and nonexpansive.theta == pytest.approx(s)
    assert nonexpansive.residual_lipschitz == pytest.approx(2 * s)


def test_relaxed_proximal_and_nesting():
    fact = Fact.proximal("prox", verified=True, tolerance=0.01)
    den = as_denoiser(_numpy_halve)
    den._facts = (fact,)  # as a library denoiser would carry it
    once = relaxed(den, 0.5)
    (relaxed_fact,) = once.facts
    assert relaxed_fact.kind == "averaged" and relaxed_fact.verified
    assert relaxed_fact.theta == 0.25 and relaxed_fact.residual_lipschitz == 0.5
    assert relaxed_fact.tolerance == pytest.approx(0.005)
    twice = relaxed(once, 0.5)
    assert twice.name == "relaxed(0.25) _numpy_halve" and twice.facts[0].theta == 0.125
    x = np.random.default_rng(0).random((5, 5))
    np.testing.assert_allclose(twice(x), 0.75 * x + 0.25 * 0.5 * x)
    assert relaxed(den, 1.0) is den
    with pytest.raises(ValueError, match=r"\(0, 1\]"):
        relaxed(den, 0.0)


# ----------------------------------------------- backend detection (no probes)
def _clip_to_unit(x):
    # numpy-only in intent; numpy ufuncs also accept torch tensors, with a
    # DeprecationWarning about __array_wrap__ under numpy 2 (a torch probe leaks it)
    return np.clip(x, 0.0, 1.0)


def _crop_border(x):
    # written for 2-D images: drops one pixel on each side (a wrong output shape)
    return x[1:-1, 1:-1]


def _smooth_rows(x):
    # written for 2-D images; on a (N, C, H, W) tensor it would run silently on the wrong axes
    out = 0.5 * x
    out[1:-1] = 0.25 * x[:-2] + 0.5 * x[1:-1] + 0.25 * x[2:]
    return out


def test_numpy_function_sees_only_numpy_images_and_raises_no_warning():
    seen = []

    def record(x):
        seen.append((type(x), tuple(x.shape)))
        return _clip_to_unit(x)

    den = as_denoiser(record)
    x = np.random.default_rng(0).random((6, 7))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        out = den(x)
        den.apply(torch.from_numpy(x)[None, None])
    assert [str(w.message) for w in caught] == []
    assert seen == [(np.ndarray, (6, 7))] * 2
    np.testing.assert_array_equal(out, np.clip(x, 0.0, 1.0))  # reference: numpy.clip


def test_numpy_function_for_2d_images_is_never_given_a_batch():
    image = np.random.default_rng(1).random((12, 12))
    den = as_denoiser(_smooth_rows)
    check_denoiser(den, image, budget=20)  # the check works on (N, 1, H, W) batches
    # reference: the user's function applied directly to the 2-D image
    np.testing.assert_allclose(den(image[None, None])[0, 0], _smooth_rows(image), rtol=1e-12)


def test_shape_errors_speak_of_the_users_images():
    with pytest.raises(DenoiserError) as info:
        check_denoiser(as_denoiser(_crop_border, name="crop"), np.zeros((32, 32)), budget=20)
    message = str(info.value)
    assert "(30, 30)" in message and "(32, 32)" in message
    assert "(0, 0, 32, 32)" not in message and "(1, 1, 32, 32)" not in message


def test_backend_from_annotations_and_from_a_numpy_trial():
    seen = []

    def torch_scale(x: torch.Tensor) -> torch.Tensor:
        seen.append(type(x))
        return 0.5 * x

    def untyped_torch(x):
        seen.append(type(x))
        return torch.clamp(x, 0.0, 1.0)  # fails on numpy arrays: a torch function

    x = np.random.default_rng(2).random((5, 6))
    np.testing.assert_allclose(as_denoiser(torch_scale)(x), 0.5 * x)
    assert seen == [torch.Tensor]
    seen.clear()
    np.testing.assert_allclose(as_denoiser(untyped_torch)(x), x)
    assert seen == [np.ndarray, torch.Tensor]  # one numpy trial, then torch for good


def test_a_function_failing_both_ways_names_both_failures_with_shapes():
    def broken(x):
        raise RuntimeError("boom")

    with pytest.raises(DenoiserError) as info:
        as_denoiser(broken)(np.zeros((4, 5)))
    message = str(info.value)
    assert "boom" in message and "(4, 5)" in message and "backend=" in message
