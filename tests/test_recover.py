"""``pnpguard recover``: reconstruction from files, colour and stacks, the JSON record, bad input."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import imageio.v3 as iio
import numpy as np
import pytest
import scipy.sparse
import skimage.metrics
import tifffile

import pnpguard as pg
import pnpguard._recover
import pnpguard.check
from pnpguard import _imagefiles
from pnpguard.cli import main

from .helpers import dense_matrix

SIDE = 32
PSF = pg.gaussian_psf(5, 1.0)
SIGMA = 0.01


def _blurred(image: np.ndarray, seed: int) -> np.ndarray:
    blur = pg.Convolution(PSF, image.shape[-2:])
    clean = blur(image) if image.ndim == 2 else blur(image[:, None])[:, 0]
    return clean + SIGMA * np.random.default_rng(seed).standard_normal(image.shape)


def _frames(count: int) -> np.ndarray:
    return np.stack([pg.phantoms.cells(SIDE, seed=seed) for seed in range(count)])


@pytest.fixture
def lab(tmp_path, monkeypatch):
    """A folder with a blurred 8-bit PNG frame and the PSF, as the working directory."""
    monkeypatch.chdir(tmp_path)
    truth = _frames(1)[0]
    iio.imwrite("frame.png", (255 * np.clip(_blurred(truth, 0), 0, 1)).round().astype(np.uint8))
    np.save("psf.npy", PSF)
    return truth


def _sha(path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()  # reference: hashlib


def _count_checks(monkeypatch) -> list:
    calls = []
    original = pnpguard.check.check_denoiser

    def counted(*args, **kwargs):
        calls.append(args[1])
        return original(*args, **kwargs)

    monkeypatch.setattr(pnpguard.check, "check_denoiser", counted)
    return calls


def test_png_in_png_out_with_record(lab, capsys):
    status = main(["recover", "frame.png", "--psf", "psf.npy", "--sigma", str(SIGMA), "--max-iter", "30",
                   "--no-progress"])
    out = capsys.readouterr().out
    assert status == 0, out
    assert "guarantee for forward_backward (averaged route): PROVED" in out
    assert pg.bench.CAUTION in out
    result = iio.imread("frame-recovered.png")
    assert result.dtype == np.uint8 and result.shape == (SIDE, SIDE)
    # The reconstruction is closer to the truth than the blurred data (skimage's PSNR).
    data = iio.imread("frame.png")
    before = skimage.metrics.peak_signal_noise_ratio(lab, data / 255.0, data_range=1.0)
    after = skimage.metrics.peak_signal_noise_ratio(lab, result / 255.0, data_range=1.0)
    assert after > before + 1.0, (before, after)
    record = json.loads(Path("frame-recovered.json").read_text())
    assert record["format"] == "pnpguard-recover-record"
    assert record["inputs"]["data"]["sha256"] == _sha("frame.png")
    assert record["inputs"]["operator"]["sha256"] == _sha("psf.npy")
    assert record["guarantee"]["status"] == "proved" and record["check"]["verdict"] == "proved"
    assert record["operator"]["norm_basis"] == "certified"
    assert record["output"]["scaling"] == "uint8 value round(0 + x * 255), clipped to [0, 255]"
    assert record["parameters"]["sigma"] == SIGMA and record["monitor_flags"] == []
    assert {"pnpguard", "torch", "numpy"} <= set(record["versions"])
    assert record["caution"] == pg.bench.CAUTION
    assert sorted(p.name for p in Path().iterdir()) == [
        "frame-recovered.json", "frame-recovered.png", "frame.png", "psf.npy"
    ]


def test_a_stack_is_one_batch_with_one_check_and_matches_frame_by_frame(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    stack = np.clip(_blurred(_frames(3), 1), 0, 1)
    tifffile.imwrite("stack.tif", (4095 * stack).round().astype(np.uint16), photometric="minisblack")  # 12-bit data in 16 bits
    np.save("psf.npy", PSF)
    calls = _count_checks(monkeypatch)
    # Plain iterations: an accelerated run combines past steps of the whole batch, so its
    # path (not its fixed point) differs from the frame's own.
    arguments = ["--psf", "psf.npy", "--sigma", str(SIGMA), "--range", "0", "4095", "--max-iter", "15",
                 "--tol", "1e-12", "--no-progress", "--accelerate", "off"]
    assert main(["recover", "stack.tif", *arguments]) == 0
    assert "stack: the 3 frames are reconstructed as one (N, 1, H, W) batch" in capsys.readouterr().out
    assert len(calls) == 1 and calls[0].shape == (SIDE, SIDE)  # one check, on one frame
    result = tifffile.imread("stack-recovered.tif")
    assert result.dtype == np.uint16 and result.shape == (3, SIDE, SIDE) and result.max() <= 4095
    # The same run on the middle frame alone (a single-page file) gives the same frame.
    tifffile.imwrite("middle.tif", (4095 * stack[1]).round().astype(np.uint16))
    assert main(["recover", "middle.tif", *arguments]) == 0
    alone = tifffile.imread("middle-recovered.tif").astype(int)
    assert np.abs(alone - result[1].astype(int)).max() <= 1
    record = json.loads(Path("stack-recovered.json").read_text())
    assert record["inputs"]["data"]["range"] == [0.0, 4095.0] and record["inputs"]["data"]["layout"] == "stack"
    assert record["parameters"]["accelerate"] == "off" and record["run"]["accelerated_steps"] == 0


def test_colour_channels_in_one_batch_and_the_grey_level_note(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    colour = np.clip(_blurred(_frames(3), 2), 0, 1)
    iio.imwrite("colour.png", np.moveaxis((255 * colour).round().astype(np.uint8), 0, -1))
    np.save("psf.npy", PSF)
    calls = _count_checks(monkeypatch)
    assert main(["recover", "colour.png", "--psf", "psf.npy", "--sigma", str(SIGMA), "--max-iter", "10",
                 "--no-progress"]) == 0
    out = capsys.readouterr().out
    assert "wavelet is a grey-level denoiser, applied to each channel separately" in out
    assert len(calls) == 1
    result = iio.imread("colour-recovered.png")
    assert result.shape == (SIDE, SIDE, 3) and result.dtype == np.uint8


def _scan(tmp_path: Path):
    """A sparse-view scan of a porous disk: the system matrix as .npz, the sinogram as .npy."""
    truth = pg.phantoms.make_phantom("porous_disk", (SIDE, SIDE), seed=0)
    projector = pg.ParallelProjection((SIDE, SIDE), np.arange(0.0, 180.0, 12.0))
    matrix = scipy.sparse.csr_matrix(dense_matrix(projector))
    scipy.sparse.save_npz(tmp_path / "system.npz", matrix)
    sinogram = projector(truth) + 0.05 * np.random.default_rng(0).standard_normal(projector.out_shape)
    np.save(tmp_path / "sinogram.npy", sinogram)
    return truth, matrix, projector


def test_a_system_matrix_from_npz(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    truth, matrix, projector = _scan(tmp_path)
    common = ["recover", "sinogram.npy", "--matrix", "system.npz", "--image-shape", str(SIDE), str(SIDE),
              "--sigma", "0.05", "--max-iter", "40", "--no-progress"]
    assert main(common) == 0
    result = np.load("sinogram-recovered.npy")
    assert result.shape == (SIDE, SIDE) and result.dtype == np.float64
    record = json.loads(Path("sinogram-recovered.json").read_text())
    assert record["operator"]["norm_basis"] == "certified"  # nonnegative: Collatz-Wielandt
    dense = matrix.toarray()
    largest = np.sqrt(np.linalg.eigvalsh(dense @ dense.T)[-1])  # reference: numpy.linalg.eigvalsh of A A^T
    assert largest <= record["operator"]["norm"] <= largest * (1 + 1e-4)
    backprojection = projector.adjoint(np.load("sinogram.npy")) / largest**2
    assert np.linalg.norm(result - truth) < np.linalg.norm(backprojection - truth)
    capsys.readouterr()
    # A claimed norm makes the guarantee conditional on the claim.
    assert main([*common, "--norm", str(1.1 * largest), "-o", "claimed.npy"]) == 0
    assert "CONDITIONAL" in capsys.readouterr().out
    claimed = json.loads(Path("claimed.json").read_text())
    assert claimed["operator"]["norm_basis"] == "claimed" and claimed["guarantee"]["status"] == "conditional"
    assert any("claimed: not verified" in text for text in claimed["guarantee"]["assumptions"])


def _bad_inputs(tmp_path: Path) -> list[tuple[list[str], str]]:
    """(arguments, words of the one-line error) for every bad input of the issue's list."""
    side = (str(SIDE), str(SIDE))
    truth, matrix, _ = _scan(tmp_path)
    np.save(tmp_path / "wide.npy", matrix.toarray()[:, :-1])
    bad = matrix.toarray()
    bad[3, 5] = np.nan
    np.save(tmp_path / "nan.npy", bad)
    (tmp_path / "notes.png").write_text("this is not an image")
    tifffile.imwrite(tmp_path / "bright.tif", np.full((SIDE, SIDE), 5000, dtype=np.uint16))
    np.save(tmp_path / "grey_mask.npy", np.linspace(0, 1, SIDE * SIDE).reshape(SIDE, SIDE))
    np.save(tmp_path / "zero_psf.npy", np.array([[1.0, -1.0], [0.0, 0.0]]))
    iio.imwrite(tmp_path / "frame.png", (255 * truth).round().astype(np.uint8))
    np.save(tmp_path / "psf.npy", PSF)
    (tmp_path / "taken-recovered.png").write_bytes(b"")
    iio.imwrite(tmp_path / "taken.png", (255 * truth).round().astype(np.uint8))
    (tmp_path / "blocked.json").mkdir()
    sigma = ["--sigma", "0.01"]
    return [
        (["sinogram.npy", "--matrix", "wide.npy", "--image-shape", *side, *sigma], "`matrix` has shape"),
        (["sinogram.npy", "--matrix", "nan.npy", "--image-shape", *side, *sigma], "1 non-finite entries"),
        (["notes.png", "--psf", "psf.npy", *sigma], "is not a readable image"),
        (["bright.tif", "--psf", "psf.npy", "--range", "0", "4095", *sigma], "outside the declared range [0, 4095]"),
        (["frame.png", "--mask", "grey_mask.npy", *sigma], "is not binary"),
        (["frame.png", "--psf", "zero_psf.npy", *sigma], "sums to 0"),
        (["taken.png", "--psf", "psf.npy", *sigma], "exists; pass --overwrite"),
        (["frame.png", "--psf", "psf.npy", "-o", "blocked.png", *sigma], "is a directory"),
        (["frame.png", "--psf", "psf.npy", "-o", "frame.tif", *sigma], "data's kind of suffix"),
        (["frame.png", "--psf", "psf.npy", "--image-shape", *side, *sigma], "--image-shape H W goes with --matrix"),
        (["frame.png", "--psf", "psf.npy", "-o", "frame.png", "--overwrite", *sigma], "is the data file"),
        (["bright.tif", "--psf", "psf.npy", "--range", "0", "inf", *sigma], "must be finite"),
    ]


def test_every_bad_input_is_one_line_before_any_work(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    cases = _bad_inputs(tmp_path)
    before = sorted(p.name for p in tmp_path.iterdir())

    def no_work(*args, **kwargs):
        raise AssertionError("the check ran on a bad input")

    monkeypatch.setattr(pnpguard.check, "check_denoiser", no_work)
    for arguments, words in cases:
        status = main(["recover", *arguments, "--no-progress"])
        err = capsys.readouterr().err.strip().splitlines()
        assert status == 2 and len(err) == 1 and err[0].startswith("pnpguard: error:"), (arguments, err)
        assert words in err[0], (words, err[0])
    assert sorted(p.name for p in tmp_path.iterdir()) == before  # nothing written


def test_overwrite_replaces_and_a_failed_record_leaves_nothing(lab, monkeypatch, capsys):
    arguments = ["recover", "frame.png", "--psf", "psf.npy", "--sigma", str(SIGMA), "--max-iter", "5",
                 "--no-progress"]
    Path("frame-recovered.png").write_bytes(b"old")
    assert main(arguments) == 2
    assert main([*arguments, "--overwrite"]) == 0
    assert iio.imread("frame-recovered.png").shape == (SIDE, SIDE)
    capsys.readouterr()
    for name in ("frame-recovered.png", "frame-recovered.json"):
        Path(name).unlink()

    def full_disk(path, document):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(pnpguard._recover, "write_record", full_disk)
    assert main(arguments) == 2
    assert "(No space left on device); nothing was written" in capsys.readouterr().err
    assert sorted(p.name for p in Path().iterdir()) == ["frame.png", "psf.npy"]  # no partial or temporary file


def test_a_refusal_writes_nothing(lab, capsys):
    Path("mylab.py").write_text("def sharpen(x):\n    return 1.5 * x\n")
    status = main(["recover", "frame.png", "--psf", "psf.npy", "--sigma", str(SIGMA), "--denoiser",
                   "mylab:sharpen", "--strength", "0.01", "--budget", "20", "--no-progress"])
    assert status == 1
    assert "REFUSED (nothing written)" in capsys.readouterr().out
    assert not Path("frame-recovered.png").exists() and not Path("frame-recovered.json").exists()


@pytest.mark.parametrize("dtype, high", [(np.uint8, 255), (np.uint16, 65535)])
def test_integer_scaling_round_trips(tmp_path, dtype, high):
    stored = np.arange(0, high + 1, max(1, high // 200), dtype=dtype)[: 16 * 8].reshape(16, 8)
    path = tmp_path / "values.tif"
    tifffile.imwrite(path, stored)
    read = _imagefiles.read_image(path)
    np.testing.assert_allclose(read.values, stored / high)  # analytic: v / (2^bits - 1)
    _imagefiles.write_image(tmp_path / "again.tif", read.values, read)
    np.testing.assert_array_equal(tifffile.imread(tmp_path / "again.tif"), stored)


def test_planar_colour_tiff_is_colour_and_a_psf_can_be_an_image(tmp_path):
    planes = (255 * np.stack([pg.phantoms.cells(16, seed=s) for s in range(3)])).round().astype(np.uint8)
    tifffile.imwrite(tmp_path / "planar.tif", planes, photometric="rgb", planarconfig="separate")
    read = _imagefiles.read_image(tmp_path / "planar.tif")
    assert read.layout == "colour"
    np.testing.assert_array_equal(read.values, planes / 255.0)
    # A PSF saved as a 16-bit PNG gives the convolution with the normalised kernel.
    stored = np.rint(65535 * PSF / PSF.max()).astype(np.uint16)
    iio.imwrite(tmp_path / "psf.png", stored)
    op, model = pnpguard._recover.psf_operator(str(tmp_path / "psf.png"), (SIDE, SIDE))
    expected = stored / stored.sum()  # analytic: the scaling cancels in the normalisation
    np.testing.assert_allclose(op.psf, expected, rtol=1e-12)
    assert model["sha256"] == _sha(tmp_path / "psf.png")
