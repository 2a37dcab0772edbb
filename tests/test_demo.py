"""The main job runs end to end and reaches its claims."""

from __future__ import annotations

import pytest

import pnpguard as pg
from pnpguard.demo import main, run_demo


def test_demo_guarantees_tv_and_refuses_non_local_means():
    outcome = run_demo(size=48, seed=3, verbose=False)
    for name, result in outcome.runs.items():
        assert result.guarantee is not None and result.guarantee.status == "proved", name
        assert not result.flags, name
        # The reconstruction improves on the blurred, noisy data it started from.
        assert result.metrics["psnr"][-1] > outcome.data_psnr + 1.0, name
    assert outcome.black_box_report.verdict == "refuted"
    assert isinstance(outcome.refusal, pg.Refused)


def test_demo_entry_point_passes_its_arguments_on(capsys):
    # `python -m pnpguard.demo --size 24 --seed 4` (what `make demo` runs, with arguments).
    assert main(["--size", "24", "--seed", "4"]) == 0
    assert "synthetic 24x24 frame of fluorescent cells (seed 4)" in capsys.readouterr().out
    assert main(["--size", "12"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--size" in err[0] and ">= 16" in err[0], err


def test_run_demo_rejects_a_frame_smaller_than_its_kernel():
    with pytest.raises(ValueError, match=r"`size` must be an integer >= 16, got 8"):
        run_demo(size=8, verbose=False)
