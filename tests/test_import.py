"""The package imports in every interpreter mode a user may run it in."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

SRC = Path(__file__).resolve().parent.parent / "src"


def test_import_with_docstrings_stripped():
    # `python -OO` sets every __doc__ to None; nothing at import time may rely on docstrings.
    # This checkout's sources come first; the caller's PYTHONPATH is kept after them.
    path = os.pathsep.join(filter(None, [str(SRC), os.environ.get("PYTHONPATH")]))
    completed = subprocess.run(
        [sys.executable, "-OO", "-c", "import pnpguard; print(pnpguard.__file__)"],
        env={**os.environ, "PYTHONPATH": path},
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert completed.returncode == 0, completed.stderr
    assert Path(completed.stdout.strip()).resolve().is_relative_to(SRC)
