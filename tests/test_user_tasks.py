"""Users' own benchmark tasks: built from their truth, operator and noise, tuned on their tuning image."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse
import skimage.metrics

import pnpguard as pg
from pnpguard import bench
from pnpguard.bench import _baselines
from pnpguard.bench._tuning import WEIGHTS_TIKHONOV

from .helpers import dense_matrix

SIDE = 32


@pytest.fixture(scope="module")
def scan_task():
    """A sparse-view scan of cell frames through a user's system matrix (scipy.sparse)."""
    projector = pg.ParallelProjection((SIDE, SIDE), np.arange(0.0, 180.0, 15.0))
    matrix = scipy.sparse.csr_matrix(dense_matrix(projector))
    op = pg.as_operator(matrix, (SIDE, SIDE), projector.out_shape, name="lab scanner")
    truth = pg.phantoms.cells(SIDE, seed=0)
    tuning = pg.phantoms.cells(SIDE, seed=1)
    return bench.user_task("lab-scan-12-views", truth, op, 0.01, tuning_image=tuning, seed=5)


def test_a_user_task_is_tuned_on_its_tuning_image(scan_task):
    assert scan_task.family == "custom" and scan_task.fixed_shape == (SIDE, SIDE)
    entry = bench.tune_task(scan_task, shape=(64, 64), max_iter=20, tol=1e-4, check_budget=20,
                            methods=["tikhonov"])
    assert entry["phantom"] == "user tuning image" and entry["shape"] == [SIDE, SIDE]
    # The chosen weight maximises PSNR against the tuning image (reference: scikit-image's PSNR),
    # not against the truth.
    problem = scan_task.problem((SIDE, SIDE), tuning=True)
    np.testing.assert_array_equal(problem.truth, pg.phantoms.cells(SIDE, seed=1))
    scores = [
        skimage.metrics.peak_signal_noise_ratio(problem.truth, _baselines.tikhonov(problem, weight=w).x, data_range=1.0)
        for w in WEIGHTS_TIKHONOV
    ]
    assert entry["baselines"]["tikhonov"]["parameters"]["weight"] == WEIGHTS_TIKHONOV[int(np.argmax(scores))]
    assert entry["denoisers"] == {}


def test_a_user_task_runs_beside_shipped_tasks_and_is_compared_and_reported(scan_task, tmp_path):
    suite = bench.custom_suite(["superres-x2", scan_task], shape=(SIDE, SIDE), max_iter=30, check_budget=20)
    run = bench.run_suite(suite, methods=["tikhonov", "fb/wavelet"])
    document = run.document
    assert [t["name"] for t in document["tasks"]] == ["superres-x2", "lab-scan-12-views"]
    user = document["tasks"][1]
    assert user["family"] == "custom" and user["model"]["kind"] == "user"
    assert user["phantom"] == "user truth" and user["tuning_phantom"] == "user tuning image"
    assert document["settings"]["tuned"]["tuned_here"] == ["lab-scan-12-views"]
    rows = {r["method"]: r for r in document["results"] if r["task"] == "lab-scan-12-views"}
    assert set(rows) == {"tikhonov", "fb/wavelet"}
    assert rows["fb/wavelet"]["guarantee"]["status"] == "proved"  # nonnegative matrix: certified norm
    # The recorded PSNR is the reconstruction's against the user's truth (reference: scikit-image).
    x = run.arrays["lab-scan-12-views/tikhonov"]
    expected = skimage.metrics.peak_signal_noise_ratio(pg.phantoms.cells(SIDE, seed=0), x, data_range=1.0)
    assert abs(rows["tikhonov"]["psnr"] - expected) < 1e-6
    path = run.save(tmp_path / "mine.json")
    loaded = bench.load_results(path)
    assert bench.compare_results(loaded, loaded).passed
    report = bench.write_report(loaded, tmp_path / "report")
    text = report.read_text()
    assert "lab-scan-12-views" in text and "custom" in text


@pytest.mark.parametrize(
    "change, error, pattern",
    [
        (dict(name="ct-30-views"), ValueError, "shipped task's name"),
        (dict(tuning_image="truth"), ValueError, "tune on a separate image"),
        (dict(tuning_image=np.zeros((SIDE, SIDE + 1))), ValueError, "`tuning_image` has shape"),
        (dict(noise=1.5), ValueError, "`noise`"),
        (dict(operator=np.eye(4)), TypeError, "`operator` must be a pnpguard LinearOperator"),
        (dict(operator=pg.PixelMask(np.ones((16, 16)))), ValueError, r"`operator` takes \(16, 16\)"),
        (dict(truth=np.zeros((SIDE, SIDE), dtype=np.uint8)), TypeError, "`truth`"),
    ],
)
def test_bad_user_tasks_name_the_argument(change, error, pattern):
    truth = pg.phantoms.cells(SIDE, seed=0)
    arguments = dict(name="mine", truth=truth, operator=pg.PixelMask(np.ones((SIDE, SIDE))), noise=0.01,
                     tuning_image=pg.phantoms.cells(SIDE, seed=1))
    arguments.update(change)
    if isinstance(arguments["tuning_image"], str):
        arguments["tuning_image"] = truth.copy()
    with pytest.raises(error, match=pattern):
        bench.user_task(arguments.pop("name"), arguments.pop("truth"), arguments.pop("operator"),
                        arguments.pop("noise"), **arguments)


def test_a_suite_refuses_two_tasks_of_one_name(scan_task):
    with pytest.raises(ValueError, match="more than once"):
        bench.custom_suite([scan_task, scan_task], shape=(SIDE, SIDE), max_iter=5)
