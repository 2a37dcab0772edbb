"""The main job runs end to end and reaches its claims."""

from __future__ import annotations

import pnpguard as pg
from pnpguard.demo import run_demo


def test_demo_guarantees_tv_and_refuses_non_local_means():
    outcome = run_demo(size=48, seed=3, verbose=False)
    for name, result in outcome.runs.items():
        assert result.guarantee is not None and result.guarantee.status == "proved", name
        assert not result.flags, name
        # The reconstruction improves on the blurred, noisy data it started from.
        assert result.metrics["psnr"][-1] > outcome.data_psnr + 1.0, name
    assert outcome.black_box_report.verdict == "refuted"
    assert isinstance(outcome.refusal, pg.Refused)
