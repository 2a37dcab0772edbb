"""Argument validation: the same mistake raises the same exception type everywhere."""

from __future__ import annotations

import math
import re
from fractions import Fraction

import numpy as np
import pytest

import pnpguard as pg
from pnpguard import _validation as v
from pnpguard import bench
from pnpguard import phantoms as ph
from pnpguard.learned import ResidualCNN, residual_cnn

SHAPE = (8, 8)
IMAGE = np.linspace(0.0, 1.0, 64).reshape(SHAPE)
MASK = pg.PixelMask(np.ones(SHAPE))

# A positive real number, by name, at many public entry points.
POSITIVE_NUMBERS = {
    "WaveletShrinkage": ("sigma", lambda x: pg.WaveletShrinkage(sigma=x)),
    "TotalVariation": ("sigma", lambda x: pg.TotalVariation(sigma=x)),
    "NonLocalMeans": ("sigma", lambda x: pg.NonLocalMeans(sigma=x)),
    "GaussianSmoothing": ("sigma", lambda x: pg.GaussianSmoothing(1.0, sigma=x)),
    "GaussianSmoothing width": ("width", lambda x: pg.GaussianSmoothing(x)),
    "residual_cnn": ("sigma", lambda x: residual_cnn(x)),
    "LeastSquares": ("sigma", lambda x: pg.LeastSquares(MASK, IMAGE, sigma=x)),
    "LeastSquares.prox": ("step", lambda x: pg.LeastSquares(MASK, IMAGE).prox(IMAGE, x)),
    "gaussian_psf": ("sigma", lambda x: pg.gaussian_psf(5, x)),
    "disk_psf": ("radius", lambda x: pg.disk_psf(x)),
    "psnr": ("data_range", lambda x: pg.psnr(IMAGE, IMAGE, data_range=x)),
    "ssim": ("data_range", lambda x: pg.ssim(IMAGE[:, :8].repeat(2, 0).repeat(2, 1), IMAGE.repeat(2, 0).repeat(2, 1),
                                            data_range=x)),
    "shipped denoiser": ("strength", lambda x: bench.get_denoiser("wavelet").make(x, SHAPE)),
    "Ellipse": ("a", lambda x: ph.Ellipse(0.0, 0.0, x, 0.5)),
    "as_operator": ("norm", lambda x: pg.as_operator(np.eye(64), SHAPE, SHAPE, norm=x)),
    "choose_strength noise": ("noise", lambda x: pg.choose_strength(
        pg.LeastSquares(MASK, IMAGE), pg.WaveletShrinkage, "fb", (0.01, 0.1), noise=x)),
    "choose_strength tau": ("tau", lambda x: pg.choose_strength(
        pg.LeastSquares(MASK, IMAGE), pg.WaveletShrinkage, "fb", (0.01, 0.1), tau=x)),
    "choose_strength data_range": ("data_range", lambda x: pg.choose_strength(
        pg.LeastSquares(MASK, IMAGE), pg.WaveletShrinkage, "fb", (0.01, 0.1), data_range=x)),
}

# A positive integer, by name.
POSITIVE_INTEGERS = {
    "NonLocalMeans": ("patch_size", lambda n: pg.NonLocalMeans(sigma=0.1, patch_size=n)),
    "TotalVariation": ("max_iter", lambda n: pg.TotalVariation(sigma=0.1, max_iter=n)),
    "WaveletShrinkage": ("cycle_spins", lambda n: pg.WaveletShrinkage(sigma=0.1, cycle_spins=n)),
    "ParallelProjection": ("n_detectors", lambda n: pg.ParallelProjection(SHAPE, [0.0], n_detectors=n)),
    "ResidualCNN": ("unshuffle", lambda n: ResidualCNN(depth=2, width=4, unshuffle=n)),
    "cells": ("count", lambda n: ph.cells(16, count=n)),
    "run_suite": ("threads", lambda n: bench.run_suite("quick", threads=n)),
    "RunOptions.threads": ("threads", lambda n: pg.RunOptions(threads=n)),
    "RunOptions.anderson_memory": ("anderson_memory", lambda n: pg.RunOptions(anderson_memory=n)),
}

# (None is a valid "not set" for some of these, so it is not in the list.)
NOT_NUMBERS = ["a", True, np.bool_(False), [1.0], 1j]
OUT_OF_RANGE = [0.0, -1.0, math.nan, math.inf, -math.inf]


# (value, the exception every entry point raises for it)
NUMBER_MISTAKES = [(x, TypeError) for x in NOT_NUMBERS] + [(x, ValueError) for x in OUT_OF_RANGE]
INTEGER_MISTAKES = [(x, TypeError) for x in ("3", True, 2.0)] + [(x, ValueError) for x in (0, -2, np.int64(-1))]
TABLES = [(POSITIVE_NUMBERS, "a positive finite number", NUMBER_MISTAKES),
          (POSITIVE_INTEGERS, "a positive integer", INTEGER_MISTAKES)]


@pytest.mark.parametrize(
    ("table", "expected", "value", "error"),
    [(table, expected, value, error) for table, expected, mistakes in TABLES for value, error in mistakes],
    ids=lambda item: repr(item) if not isinstance(item, dict) else "",
)
def test_the_same_mistake_raises_the_same_type_at_every_entry_point(table, expected, value, error):
    # A value of the wrong kind: TypeError (the message shows its type); a value of the
    # right kind out of range: ValueError (the message shows the value).
    received = re.escape(repr(value)) + (r" \(" if error is TypeError else "$")
    for entry, (name, call) in table.items():
        try:
            call(value)
        except Exception as raised:  # noqa: BLE001 - the type is what is tested
            message = str(raised)
            assert type(raised) is error, (entry, type(raised).__name__, message)
            assert re.match(f"`{name}` must be {expected}, got {received}", message), (entry, message)
        else:
            pytest.fail(f"{entry} accepted {value!r}")


def test_numbers_of_every_real_kind_are_accepted_and_returned_as_python_numbers():
    for value in (2, 2.5, np.float32(2.5), np.int16(2), Fraction(5, 2)):
        result = v.positive_number(value, "x")
        assert type(result) is float and result == float(value)
    assert type(v.positive_int(np.int64(3), "n")) is int
    assert v.nonnegative_number(0, "x") == 0.0 and v.nonnegative_int(0, "n") == 0
    with pytest.raises(ValueError, match=r"`x` must be a non-negative finite number, got -0.5"):
        v.nonnegative_number(-0.5, "x")
    with pytest.raises(TypeError, match=r"`x` must be a finite real number, got True \(bool\)"):
        v.number(True, "x")


@pytest.mark.parametrize(
    ("kwargs", "inside", "outside", "interval"),
    [
        ({}, (0.0, 0.5, 1.0), (-1e-9, 1.0 + 1e-9), "[0, 1]"),
        ({"low_open": True}, (1e-9, 1.0), (0.0,), "(0, 1]"),
        ({"high_open": True}, (0.0, 0.999), (1.0,), "[0, 1)"),
        ({"low_open": True, "high_open": True}, (0.5,), (0.0, 1.0), "(0, 1)"),
    ],
)
def test_number_in_respects_open_and_closed_ends(kwargs, inside, outside, interval):
    for value in inside:
        assert v.number_in(value, "s", 0.0, 1.0, **kwargs) == value
    for value in outside:
        with pytest.raises(ValueError, match=f"^`s` must be a finite number in {re.escape(interval)}, got"):
            v.number_in(value, "s", 0.0, 1.0, **kwargs)
    with pytest.raises(TypeError, match="^`s` must be a finite number in"):
        v.number_in("0.5", "s", 0.0, 1.0, **kwargs)
    assert "[1, inf)" in _message(lambda: v.number_in(0.5, "length", 1.0, math.inf))


def test_image_shapes_and_choices():
    assert v.image_shape([np.int32(3), 4], "shape") == (3, 4)
    for bad in (8, 8.0, "88", (8.0, 8), (True, 8), None):
        with pytest.raises(TypeError, match=r"^`shape` must be a pair of positive integers \(H, W\)"):
            v.image_shape(bad, "shape")
    for bad in ((8,), (8, 8, 8), (0, 8), (8, -1)):
        with pytest.raises(ValueError, match=r"^`shape` must be a pair of positive integers \(H, W\)"):
            v.image_shape(bad, "shape")
    assert v.choice("zero", "boundary", ("zero", "periodic")) == "zero"
    message = _message(lambda: v.choice("zeros", "boundary", ("zero", "periodic")))
    assert message == "unknown `boundary` 'zeros'; valid: 'periodic', 'zero'; did you mean 'zero'?"
    assert _message(lambda: v.choice(["zero"], "boundary", ("zero",))).startswith("unknown `boundary` ['zero']")


def test_the_same_mistake_reads_the_same_at_operators_denoisers_and_phantoms():
    # A shape given as floats: TypeError at every entry point that takes an image size.
    for call in (lambda: pg.Convolution(np.ones((3, 3)), (8.0, 8.0)), lambda: pg.random_pixel_mask((8.0, 8.0), 0.5),
                 lambda: pg.GaussianSmoothing(1.0, shape=(8.0, 8.0)), lambda: ph.make_phantom("cells", (8.0, 8.0))):
        with pytest.raises(TypeError, match=r"^`shape` must be a pair of positive integers \(H, W\), got \(8.0, 8.0\)"):
            call()
    # A relaxation or a fraction out of its interval: ValueError naming the interval.
    with pytest.raises(ValueError, match=r"^`s` must be a finite number in \(0, 1\], got 1.5$"):
        pg.relaxed(pg.WaveletShrinkage(sigma=0.1), 1.5)
    with pytest.raises(TypeError, match=r"^`s` must be a finite number in \(0, 1\], got True \(bool\)$"):
        pg.relaxed(pg.WaveletShrinkage(sigma=0.1), True)
    with pytest.raises(ValueError, match=r"^`missing` must be a finite number in \[0, 1\), got 1.0$"):
        pg.random_pixel_mask(SHAPE, 1.0)


def _message(call) -> str:
    try:
        call()
    except (TypeError, ValueError) as error:
        return str(error)
    raise AssertionError("no error raised")
