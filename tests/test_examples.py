"""The example scripts run end to end (small frames), so they never rot."""

from __future__ import annotations

import os
import runpy
from pathlib import Path

import pytest

EXAMPLES = sorted((Path(__file__).resolve().parent.parent / "examples").glob("*.py"))


@pytest.mark.parametrize("path", EXAMPLES, ids=lambda p: p.name)
def test_example_runs(path, tmp_path, monkeypatch, capsys):
    monkeypatch.setenv("PNPGUARD_EXAMPLE_SIZE", "48")
    monkeypatch.setenv("PNPGUARD_EXAMPLE_OUTPUT", str(tmp_path / "figure.png"))
    monkeypatch.chdir(tmp_path)
    namespace = runpy.run_path(str(path), run_name="__main__")
    printed = capsys.readouterr().out
    if "result" in namespace:
        assert namespace["result"].guarantee is not None
        assert not any(flag.kind == "blow_up" for flag in namespace["result"].flags)
    if path.name.startswith("repair"):
        assert "no convergence guarantee applies" in printed
        assert namespace["result"].converged or namespace["result"].iterations == 300
    assert os.environ["PNPGUARD_EXAMPLE_SIZE"] == "48"
