"""Benchmark suite: tasks, baselines, runner, result files, comparison and report."""

from __future__ import annotations

import copy
import importlib.metadata
import json
import math
from pathlib import Path

import numpy as np
import pytest
import skimage.metrics
import skimage.restoration
import tomllib
import torch

from pnpguard import bench
from pnpguard._version import SOURCE_VERSION
from pnpguard.bench import _baselines as bl
from pnpguard.bench import _results as bench_results
from pnpguard.check import check_denoiser
from pnpguard.learned._weights import read_weights
from pnpguard.operators import Convolution, Decimation, PixelMask, motion_psf

TINY_TASKS = ("deblur-gaussian-1pct", "inpaint-random50")
TINY_METHODS = (
    "tikhonov",
    "tv-regularised",
    "richardson-lucy",
    "interpolation",
    "fb/wavelet",
    "dr/gaussian",
    "dr/nlm",
)


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    """A two-task suite at 32 x 32 with a few methods, saved to disk."""
    suite = bench.custom_suite(TINY_TASKS, shape=(32, 32), max_iter=20, check_budget=20, name="tiny")
    run = bench.run_suite(suite, methods=TINY_METHODS)
    path = run.save(tmp_path_factory.mktemp("tiny") / "tiny.json")
    return suite, run, path


def _problem(model, truth, noise=0.0, seed=0):
    """A Problem around a given truth (noise 0 allowed) for baseline checks."""
    op = model
    y = op.forward(truth)
    if noise:
        y = y + noise * np.random.default_rng(seed).standard_normal(y.shape)
    from pnpguard.fidelity import LeastSquares

    task = bench.get_task("deblur-gaussian-1pct")
    return bench.Problem(task, truth.shape, truth, op, y, 1.0, LeastSquares(op, y), "test", seed)


# ------------------------------------------------------------------ tasks
def test_tasks_cover_every_family_and_quick_is_a_subset():
    full = bench.get_suite("full")
    quick = bench.get_suite("quick")
    assert {t.family for t in full.tasks} == set(bench.FAMILIES)
    assert {t.family for t in quick.tasks} == set(bench.FAMILIES)
    assert {t.name for t in quick.tasks} <= {t.name for t in full.tasks}
    assert len(set(bench.task_names())) == len(bench.task_names())


def test_problem_is_deterministic_and_tuning_problem_differs():
    task = bench.get_task("inpaint-random80")
    a, b = task.problem((32, 32)), task.problem((32, 32))
    np.testing.assert_array_equal(a.y, b.y)
    np.testing.assert_array_equal(a.truth, b.truth)
    tuning = task.problem((32, 32), tuning=True)
    assert tuning.seed != a.seed
    assert not np.array_equal(tuning.truth, a.truth)
    assert not np.array_equal(tuning.op.mask, a.op.mask)


@pytest.mark.parametrize("name", ["deblur-motion-5pct", "ct-limited-120deg", "superres-x4"])
def test_noise_level_is_relative_to_the_data_peak(name):
    task = bench.get_task(name)
    problem = task.problem((64, 64))
    clean = problem.op.forward(problem.truth)
    noise = problem.y - clean
    expected = task.noise * np.abs(clean).max()
    assert problem.sigma == pytest.approx(expected)
    # Sample standard deviation of >= 1000 normal draws: within 10 % (about 4.5 standard errors).
    assert np.std(noise) == pytest.approx(expected, rel=0.1)


def test_limited_angle_scan_spans_its_arc():
    scan = bench.get_task("ct-limited-120deg").model
    angles = scan.angles()
    assert angles.min() == 0.0 and angles.max() < 120.0 and angles.size == 60
    np.testing.assert_allclose(np.diff(angles), 2.0)


def test_unknown_names_list_the_valid_ones():
    # One message layout everywhere: what, the value, the valid names sorted, the closest.
    with pytest.raises(ValueError, match="^unknown task 'superres_x2'; .*; did you mean 'superres-x2'\\?$") as info:
        bench.get_task("superres_x2")
    assert f"valid: {', '.join(map(repr, sorted(bench.task_names())))};" in str(info.value)
    with pytest.raises(ValueError, match="^unknown suite 'fast'; valid: 'full', 'quick'$"):
        bench.get_suite("fast")
    with pytest.raises(ValueError, match="^unknown shipped denoiser 'wavlet'; valid: .*; did you mean 'wavelet'\\?$"):
        bench.get_denoiser("wavlet")


def test_shipped_tuned_parameters_cover_every_task_and_method():
    tuned = bench.load_tuned()
    for task in bench.get_suite("full").tasks:
        entry = tuned.data["tasks"][task.name]
        # Tuned on the tuning phantom, never on the benchmark one.
        assert entry["seed"] == task.tuning_seed != task.seed
        for method in bench.methods_for(task.family):
            if method.kind == "baseline":
                tuned.baseline(task.name, method.name)
            else:
                assert tuned.strength(task.name, method.denoiser) > 0


# --------------------------------------------------------------- registry
def test_registry_structure_matches_the_check():
    sample = bench.get_task("deblur-gaussian-1pct").problem((32, 32)).start()
    for entry in bench.shipped_denoisers():
        denoiser = entry.make(entry.default_strength, (32, 32))
        report = check_denoiser(denoiser, sample, budget=20)
        if entry.structure == "proved":
            assert report.verdict == "proved" and report.calls == 0, entry.name
        else:
            assert report.verdict in ("estimated", "refuted") and report.calls > 0, entry.name


# -------------------------------------------------------------- baselines
def test_tikhonov_fourier_and_conjugate_gradient_match_a_dense_solve():
    rng = np.random.default_rng(1)
    truth = rng.random((12, 12))
    shape = truth.shape
    n = truth.size
    # Periodic forward differences as dense matrices (reference, numpy.linalg).
    eye = np.eye(shape[0])
    shift = np.roll(eye, 1, axis=1)
    d = shift - eye
    grad = np.vstack([np.kron(d, np.eye(shape[1])), np.kron(np.eye(shape[0]), d)])
    for op in (Convolution(motion_psf(5.0, 30.0), shape), PixelMask(rng.random(shape) > 0.4)):
        problem = _problem(op, truth, noise=0.01)
        columns = op.forward(np.eye(n).reshape(n, 1, *shape)).reshape(n, -1).T
        scale = op.norm_bound().value ** 2
        weight = 0.03
        system = columns.T @ columns / scale + weight * grad.T @ grad
        expected = np.linalg.solve(system, columns.T @ problem.y.ravel() / scale).reshape(shape)
        got = bl.tikhonov(problem, weight=weight).x
        np.testing.assert_allclose(got, expected, atol=1e-7, err_msg=repr(op))


def test_tv_reconstruction_with_identity_matches_skimage_rof():
    truth = np.zeros((24, 24))
    truth[6:18, 8:20] = 1.0
    problem = _problem(PixelMask(np.ones((24, 24), bool)), truth, noise=0.1)
    ours = bl.tv_reconstruction(problem, weight=0.1, max_iter=6000, tol=1e-12).x
    # skimage.restoration.denoise_tv_chambolle minimises ||x - f||^2 / 2 + weight TV(x)
    # with the same forward-difference isotropic TV (scikit-image documentation).
    reference = skimage.restoration.denoise_tv_chambolle(problem.y, weight=0.1, eps=1e-12, max_num_iter=20000)
    assert np.max(np.abs(ours - reference)) < 2e-3


def test_bicubic_upsampling_is_aligned_with_the_decimation():
    n = 64
    rows, cols = np.mgrid[:n, :n]
    w1, w2 = 2 * np.pi / n, 2 * np.pi * 2 / n
    smooth = 0.5 + 0.3 * np.cos(w1 * rows) * np.sin(w2 * cols)
    for factor in (2, 4):
        problem = _problem(Decimation(factor, (n, n)), smooth)
        up = bl.bicubic(problem).x
        # The mean of f consecutive samples of a sinusoid of frequency w is the sinusoid at
        # their centre times the Dirichlet factor sin(f w / 2) / (f sin(w / 2)); so the
        # upsampled image must be the truth with that attenuation (a half-pixel
        # misalignment costs about 0.3 * w2 / 2 ~ 0.03 here).
        damping = np.prod([np.sin(factor * w / 2) / (factor * np.sin(w / 2)) for w in (w1, w2)])
        expected = 0.5 + 0.3 * damping * np.cos(w1 * rows) * np.sin(w2 * cols)
        assert np.max(np.abs(up - expected)) < 2e-3, factor


def test_interpolation_reproduces_a_plane():
    n = 24
    rows, cols = np.mgrid[:n, :n]
    plane = 0.2 + 0.01 * rows + 0.02 * cols
    mask = np.random.default_rng(3).random((n, n)) > 0.5
    mask[[0, 0, -1, -1], [0, -1, 0, -1]] = True  # corners observed: the hull is the image
    problem = _problem(PixelMask(mask), plane)
    # scipy.interpolate.griddata: piecewise linear interpolation is exact on linear data;
    # Clough-Tocher is exact up to its estimated gradients.
    for method, atol in (("linear", 1e-12), ("cubic", 1e-6)):
        np.testing.assert_allclose(bl.interpolation(problem, method=method).x, plane, atol=atol)


def test_richardson_lucy_sees_the_periodic_blur():
    n = 48
    truth = 0.1 + bench.get_task("deblur-gaussian-1pct").problem((n, n)).truth
    op = Convolution(motion_psf(7.0, 30.0), (n, n))
    problem = _problem(op, truth)
    restored = bl.richardson_lucy(problem, iterations=60).x
    assert np.linalg.norm(restored - truth) < 0.9 * np.linalg.norm(problem.y - truth)
    # scikit-image on the unpadded data assumes a zero boundary; the wrap padding matches
    # the periodic forward model, so the border rows come out much better.
    plain = skimage.restoration.richardson_lucy(problem.y, op.psf, num_iter=60, clip=False)
    border = np.zeros((n, n), bool)
    border[:4], border[-4:], border[:, :4], border[:, -4:] = True, True, True, True
    ours = np.abs(restored - truth)[border].mean()
    zero_boundary = np.abs(plain - truth)[border].mean()
    assert ours < 0.5 * zero_boundary


# ------------------------------------------------------------------ runner
def test_tiny_suite_runs_and_writes_valid_json(tiny):
    suite, _, path = tiny
    text = path.read_text()
    # Strict JSON: no NaN or Infinity tokens.
    document = json.loads(text, parse_constant=lambda token: pytest.fail(f"non-JSON number {token}"))
    bench.load_results(path)
    expected = {
        (t.name, m.name)
        for t in suite.tasks
        for m in bench.methods_for(t.family)
        if m.name in TINY_METHODS
    }
    assert {(r["task"], r["method"]) for r in document["results"]} == expected
    assert document["suite"]["shape"] == [32, 32]
    assert document["settings"]["check_budget"] == 20
    assert document["environment"]["torch"] == torch.__version__
    assert document["environment"]["pnpguard"] == importlib.metadata.version("pnpguard")
    for record in document["results"]:
        if record["status"] == "ok":
            assert math.isfinite(record["psnr"]) and -1.0 <= record["ssim"] <= 1.0
            assert record["iterations"] >= 0 and record["seconds"] >= 0
        else:
            assert record["status"] == "refused" and record["refusal"]["reasons"]
            assert record["psnr"] is None
        if record["kind"] == "pnp":
            assert record["check"]["verdict"] in ("proved", "estimated", "refuted")
            assert (record["guarantee"] is None) == (record["status"] == "refused")
    wavelet = next(r for r in document["results"] if r["method"] == "fb/wavelet")
    assert wavelet["check"]["verdict"] == "proved" and wavelet["guarantee"]["status"] == "proved"


def test_recorded_quality_matches_skimage_on_the_saved_images(tiny):
    _, _, path = tiny
    document = bench.load_results(path)
    arrays = bench.load_arrays(path, document)
    for record in document["results"]:
        if record["status"] != "ok":
            continue
        truth = arrays[f"{record['task']}/truth"]
        x = arrays[f"{record['task']}/{record['method']}"]
        reference = skimage.metrics.peak_signal_noise_ratio(truth, x, data_range=1.0)
        assert record["psnr"] == pytest.approx(reference, abs=1e-9)


def test_suite_is_deterministic(tiny):
    suite, run, _ = tiny
    again = bench.run_suite(suite, methods=("tikhonov", "fb/wavelet", "dr/nlm"))
    first = {(r["task"], r["method"]): r for r in run.document["results"]}
    for record in again.document["results"]:
        old = first[(record["task"], record["method"])]
        assert record["psnr"] == old["psnr"] and record["status"] == old["status"]
        assert record["check"] == old["check"]


def test_unknown_method_is_refused_with_the_valid_names():
    suite = bench.custom_suite(["superres-x2"], shape=(32, 32), max_iter=5)
    with pytest.raises(ValueError, match="bicubic"):
        bench.run_suite(suite, methods=["bicubc"])


# --------------------------------------------------------------- comparison
def test_identical_results_pass(tiny):
    document = bench.load_results(tiny[2])
    comparison = bench.compare_results(document, copy.deepcopy(document))
    assert comparison.passed and not comparison.changes
    assert comparison.compared == len(document["results"])


def test_injected_psnr_drop_is_a_regression(tiny):
    old = bench.load_results(tiny[2])
    new = copy.deepcopy(old)
    target = next(r for r in new["results"] if r["method"] == "tikhonov")
    target["psnr"] -= 1.0
    comparison = bench.compare_results(old, new)
    assert not comparison.passed
    (change,) = comparison.regressions
    assert (change.task, change.method, change.aspect) == (target["task"], "tikhonov", "quality")
    # Within tolerance: passes.
    target["psnr"] += 0.8
    assert bench.compare_results(old, new).passed
    # Improvements are reported, not failed.
    target["psnr"] += 2.0
    comparison = bench.compare_results(old, new)
    assert comparison.passed and comparison.changes


def test_changed_verdict_is_a_regression(tiny):
    old = bench.load_results(tiny[2])
    new = copy.deepcopy(old)
    target = next(r for r in new["results"] if r["method"] == "fb/wavelet")
    target["check"]["verdict"] = "estimated"
    comparison = bench.compare_results(old, new, aspects=("quality", "verdicts"))
    assert [c.aspect for c in comparison.regressions] == ["verdicts"]
    assert "estimated" in str(comparison) and "FAILED" in str(comparison)
    assert bench.compare_results(old, new, aspects=("quality",)).passed


def test_new_flag_and_missing_run_are_regressions(tiny):
    old = bench.load_results(tiny[2])
    new = copy.deepcopy(old)
    target = next(r for r in new["results"] if r["method"] == "dr/gaussian")
    target["flags"].append(
        {"kind": "stall", "action": "warn", "count": 2, "first_iteration": 9, "message": "slow"}
    )
    assert [c.aspect for c in bench.compare_results(old, new).regressions] == ["flags"]
    assert bench.compare_results(old, new, aspects=("quality", "verdicts")).passed
    del new["results"][0]
    aspects = {c.aspect for c in bench.compare_results(old, new).regressions}
    assert aspects == {"flags", "coverage"}


def test_results_at_different_sizes_are_not_compared(tiny):
    old = bench.load_results(tiny[2])
    new = copy.deepcopy(old)
    new["suite"]["shape"] = [64, 64]
    with pytest.raises(ValueError, match="different image sizes"):
        bench.compare_results(old, new)
    with pytest.raises(ValueError, match="aspect"):
        bench.compare_results(old, old, aspects=("speed",))


def test_load_results_rejects_other_files(tmp_path):
    path = tmp_path / "other.json"
    path.write_text(json.dumps({"format": "something-else"}))
    with pytest.raises(ValueError, match="pnpguard-benchmark-results"):
        bench.load_results(path)
    with pytest.raises(FileNotFoundError):
        bench.load_results(tmp_path / "missing.json")


def test_the_version_comes_from_the_distribution_or_the_source_constant(monkeypatch):
    # The source constant is the version pyproject.toml declares (read with tomllib).
    pyproject = tomllib.loads((Path(__file__).parents[1] / "pyproject.toml").read_text())
    assert SOURCE_VERSION == pyproject["project"]["version"]

    def not_installed(name):
        raise importlib.metadata.PackageNotFoundError(name)

    monkeypatch.setattr(importlib.metadata, "version", not_installed)
    assert bench_results.environment(1)["pnpguard"] == SOURCE_VERSION


@pytest.mark.parametrize(
    ("name", "write", "load"),
    [
        ("pnpguard-benchmark-results", lambda p, d: p.write_text(json.dumps(d)), bench.load_results),
        ("pnpguard-tuned-parameters", lambda p, d: p.write_text(json.dumps(d)), bench.load_tuned),
        ("pnpguard-weights", lambda p, d: torch.save(d, p), read_weights),
    ],
)
def test_our_file_formats_are_checked_alike(tmp_path, name, write, load):
    path = tmp_path / "file"
    write(path, {"format": "something-else", "format_version": 1})
    with pytest.raises(ValueError, match=f"'{path}' is not a {name} file"):
        load(path)
    write(path, {"format": name, "format_version": 2})
    with pytest.raises(ValueError, match=f"'{path}' has format version 2; this version of pnpguard "
                                         "reads version 1"):
        load(path)


# ------------------------------------------------------------------ report
def test_report_has_table_ranking_gaps_and_figures(tiny, tmp_path):
    document = bench.load_results(tiny[2])
    arrays = bench.load_arrays(tiny[2], document)
    path = bench.write_report(document, tmp_path / "report", arrays=arrays)
    text = path.read_text()
    header = next(line for line in text.splitlines() if line.startswith("| method | kind |"))
    assert all(task in header for task in TINY_TASKS)
    for method in TINY_METHODS:
        assert f"| {method} |" in text
    assert "## Ranking per task" in text
    for gap in bench.family_gaps(document):
        (task,) = gap.tasks
        runs = [r for r in document["results"] if r["task"] == task and r["psnr"] is not None]
        best_pnp = max(r["psnr"] for r in runs if r["kind"] == "pnp")
        best_base = max(r["psnr"] for r in runs if r["kind"] == "baseline")
        assert gap.mean_gap == pytest.approx(best_pnp - best_base)
        assert gap.goal_met == (best_pnp - best_base >= bench.GOAL_DB)
        assert f"{best_pnp - best_base:+.2f}" in text
    for task in TINY_TASKS:
        for suffix in ("images", "residuals"):
            png = path.parent / f"{task}-{suffix}.png"
            assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
            assert f"({png.name})" in text


def test_tomography_results_carry_the_caution():
    suite = bench.custom_suite(["ct-30-views"], shape=(32, 32), max_iter=5)
    run = bench.run_suite(suite, methods=["fbp"])
    assert run.document["caution"] == bench.CAUTION
    assert "hallucinate" in bench.markdown_report(run.document)


def test_descent_runs_off_masks_start_from_a_stronger_first_phase():
    # Strength annealing for the gradient-step network: the run at the tuned strength starts
    # where a short run at the registry's first-phase strength ended (not at A^T y / ||A||^2),
    # and the guarantee is the potential route's for the second phase.
    from pnpguard.bench._methods import DenoiserCache, Method, run_pnp

    problem = bench.get_task("deblur-gaussian-1pct").problem((24, 24))
    entry = bench.get_denoiser("gradient-step-cnn")
    assert entry.first_phase is not None and entry.first_phase > 0.04
    method = Method("pgd/gradient-step-cnn", "pnp", "pgd", "gradient-step-cnn")
    cache = DenoiserCache(problem, budget=20, seed=0)
    outcome = run_pnp(method, problem, 0.04, denoisers=cache, max_iter=3, tol=1e-4)
    assert outcome.status == "ok" and outcome.guarantee.route == "potential"
    assert outcome.parameters["start"].startswith(f"first phase at strength {entry.first_phase:g}")
    # The first phase's denoiser was built and checked at its own strength.
    assert ("gradient-step-cnn", entry.first_phase) in cache._entries


def test_pnp_runs_on_masks_start_from_the_interpolated_missing_pixels():
    # Fixed-point and descent runs alike start on a mask from griddata's interpolation of the
    # observed pixels (pnpguard.interpolated_start); other models keep A^T y / ||A||^2.
    from pnpguard.bench._methods import DenoiserCache, Method, run_pnp

    mask_problem = bench.get_task("inpaint-random50").problem((24, 24))
    blur_problem = bench.get_task("deblur-gaussian-1pct").problem((24, 24))
    method = Method("dr/gaussian", "pnp", "dr", "gaussian")
    for problem, interpolated in ((mask_problem, True), (blur_problem, False)):
        cache = DenoiserCache(problem, budget=20, seed=0)
        outcome = run_pnp(method, problem, 0.5, denoisers=cache, max_iter=1, tol=0.0)
        assert outcome.status == "ok"
        assert (outcome.parameters.get("start") == "interpolated") == interpolated
