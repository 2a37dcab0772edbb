"""The suite's "no ground truth" column: strengths picked by a rule on the task's own data."""

from __future__ import annotations

import math

import numpy as np
import pytest

import pnpguard as pg
from pnpguard import bench
from pnpguard.bench._registry import get_denoiser
from pnpguard.bench._rule_column import RULE_POINTS, RULE_REFINE, rule_gaps
from pnpguard.metrics import psnr


@pytest.fixture(scope="module")
def deblurring_run():
    suite = bench.custom_suite(["deblur-gaussian-5pct"], shape=(32, 32), max_iter=40, check_budget=20, name="rule")
    return suite, bench.run_suite(suite, methods=["fb/tv"], strength_rule="discrepancy")


def _records(run):
    return {record["method"]: record for record in run.document["results"]}


def test_the_rule_column_sits_beside_the_tuned_one(deblurring_run):
    _, run = deblurring_run
    records = _records(run)
    assert set(records) == {"fb/tv", "fb/tv@discrepancy"}
    rule = records["fb/tv@discrepancy"]
    assert rule["kind"] == "pnp" and rule["status"] == "ok"
    assert rule["parameters"]["strength"] == rule["strength_rule"]["strength"]
    assert run.document["settings"]["strength_rule"] == "discrepancy"
    grid = get_denoiser("tv").grid
    strengths = [row["strength"] for row in rule["strength_rule"]["rows"]]
    assert min(grid) <= min(strengths) and max(strengths) <= max(grid) * (1 + 1e-12)
    assert RULE_POINTS <= len(strengths) <= RULE_POINTS + RULE_REFINE


def test_the_pick_follows_the_discrepancy_principle_and_the_oracle_is_the_best_row(deblurring_run):
    _, run = deblurring_run
    rule = _records(run)["fb/tv@discrepancy"]["strength_rule"]
    rows = rule["rows"]
    # Morozov (1966): the largest strength whose residual is at most the noise energy
    # (value = ||A x - y||^2 / (m sigma^2) <= tau^2 = 1), recomputed from the rows.
    within = [row["strength"] for row in rows if row["value"] is not None and row["value"] <= 1.0]
    expected = max(within) if within else min((r for r in rows if r["value"] is not None),
                                              key=lambda r: r["strength"])["strength"]
    assert rule["strength"] == expected
    best = max(rows, key=lambda row: row["psnr"])
    picked = next(row for row in rows if row["strength"] == rule["strength"])
    assert rule["oracle_strength"] == best["strength"] and rule["oracle_psnr"] == best["psnr"]
    assert rule["gap_to_oracle"] == pytest.approx(picked["psnr"] - best["psnr"], abs=1e-12)
    assert rule["gap_to_oracle"] <= 0.0


def test_the_rule_never_sees_the_truth_and_the_rerun_matches_its_row(deblurring_run):
    suite, run = deblurring_run
    record = _records(run)["fb/tv@discrepancy"]
    task = suite.tasks[0]
    problem = task.problem(suite.shape)
    # The same choice without any reference image: the truth only scored the rows.
    choice = pg.choose_strength(
        problem.fidelity, lambda s: get_denoiser("tv").make(s, problem.shape), "fb",
        (min(get_denoiser("tv").grid), max(get_denoiser("tv").grid)),
        rule="discrepancy", points=RULE_POINTS, refine=RULE_REFINE, max_iter=suite.max_iter, tol=suite.tol,
        check_budget=suite.check_budget,
    )
    assert choice.strength == record["strength_rule"]["strength"]
    # The recorded PSNR is that of the reconstruction at the pick, recomputed here
    # (skimage-equivalent PSNR of pnpguard.metrics, checked in test_metrics.py).
    x = run.arrays[f"{task.name}/fb/tv@discrepancy"]
    assert record["psnr"] == pytest.approx(psnr(x, problem.truth, data_range=1.0), abs=1e-9)
    assert record["psnr"] == pytest.approx(record["strength_rule"]["picked_psnr"], abs=1e-6)


def test_rule_gaps_average_per_family_and_skip_records_without_a_pick():
    document = {
        "tasks": [{"name": "a", "family": "deblurring"}, {"name": "b", "family": "deblurring"},
                  {"name": "c", "family": "inpainting"}],
        "results": [
            {"task": "a", "method": "fb/tv@sure", "strength_rule": {"gap_to_oracle": -0.2}},
            {"task": "b", "method": "fb/tv@sure", "strength_rule": {"gap_to_oracle": -0.6}},
            {"task": "c", "method": "fb/tv@sure", "strength_rule": {"gap_to_oracle": None}},
            {"task": "a", "method": "fb/tv"},
        ],
    }
    gaps = rule_gaps(document)
    assert set(gaps) == {"deblurring"} and math.isclose(gaps["deblurring"]["fb/tv@sure"], -0.4)


def test_the_report_has_the_rule_table(deblurring_run):
    _, run = deblurring_run
    text = bench.markdown_report(run.document)
    assert "## Strength without ground truth" in text
    assert "| deblur-gaussian-5pct | fb/tv@discrepancy |" in text


def test_an_unknown_rule_is_refused_with_the_valid_ones():
    suite = bench.custom_suite(["deblur-gaussian-5pct"], shape=(32, 32), max_iter=5)
    with pytest.raises(ValueError, match="strength_rule.*discrepancy.*sure"):
        bench.run_suite(suite, methods=["fb/tv"], strength_rule="oracle")


def test_the_rule_arrays_are_finite(deblurring_run):
    _, run = deblurring_run
    assert all(np.isfinite(array).all() for array in run.arrays.values())
