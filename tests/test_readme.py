"""The README's Python blocks run, in order, in one namespace, as a reader would run them.

Only what cannot run offline or quickly is replaced, by the exact substitutions
in ``SUBSTITUTIONS`` (each must match the README exactly once, so a changed
README fails here instead of silently running something else), and names the
README leaves to the reader get a tiny definition in ``PREAMBLE``. Everything
else runs as written, so a README call that no longer matches the API fails.
"""

from __future__ import annotations

import re
from pathlib import Path

import matplotlib
import pytest
import skimage.data
import skimage.io

README = Path(__file__).resolve().parent.parent / "README.md"

#: README text -> what runs instead, and why.
SUBSTITUTIONS = {
    # a 64-pixel frame keeps the checks and runs below a few seconds
    "pg.phantoms.cells(256, seed=0)": "pg.phantoms.cells(64, seed=0)",
    # training budgets: two optimiser steps exercise the same code paths; the averaged
    # network is also made small, since proving its layer norms dominates the cost
    'architecture="averaged", seconds=600,': 'architecture="averaged", steps=2, depth=2, width=9,',
    "initial_weights=pg.learned.RESIDUAL_WEIGHTS, steps=500)": "initial_weights=pg.learned.RESIDUAL_WEIGHTS, steps=2)",
    "steps=2000, save_to=": "steps=2, batch_size=2, patch_size=32, save_to=",
    # the whole quick suite is CI's job (.ci/run); one baseline method over its tasks here
    'bench.run_suite("quick")': 'bench.run_suite("quick", methods=["tikhonov"])',
    # the guarantee is settled before the first iteration; five iterations show the run
    "pg.WaveletShrinkage(sigma=0.002), max_iter=100)": "pg.WaveletShrinkage(sigma=0.002), max_iter=5)",
    # the strength choice and the sweep: fewer strengths, iterations and check calls
    '(1e-4, 1e-1), rule="discrepancy")': '(1e-4, 1e-1), rule="discrepancy", points=3, refine=1, max_iter=20)',
    "fidelity, [0.1, 0.3, 1.0])": "fidelity, [0.1, 1.0], budget=20)",
}

#: Names (and files) the README leaves to the reader.
PREAMBLE = '''
import numpy as np
import scipy.ndimage
import scipy.sparse

from pnpguard import phantoms
from pnpguard.operators._projection import _transposed_system_matrix

# The reader's scanner: a 30-view, 128-bin system matrix for 128 x 128 images, and a sinogram.
_matrix = _transposed_system_matrix((128, 128), np.arange(30) * 6.0, 128).T.tocsr()
scipy.sparse.save_npz("scanner.npz", _matrix)
_sinogram = (_matrix @ phantoms.make_phantom("porous_disk", (128, 128), seed=0).ravel()).reshape(30, 128)
np.save("sinogram.npy", _sinogram + 0.5 * np.random.default_rng(0).standard_normal(_sinogram.shape))


def my_function_or_torch_module(image):
    """A reader's denoiser: a 3 x 3 box average (nonexpansive, as the README claims)."""
    return scipy.ndimage.uniform_filter(image, 3, mode="wrap")
'''

#: Bundled scikit-image pictures that stand in for the reader's frames in ``my_frames/``.
FRAMES = ("coins", "moon", "camera")


def python_blocks(text: str) -> list[tuple[int, str]]:
    """The ```python blocks of ``text`` as ``(first line number, code)``."""
    blocks = []
    for match in re.finditer(r"^```python\n(.*?)^```", text, flags=re.MULTILINE | re.DOTALL):
        blocks.append((text.count("\n", 0, match.start(1)) + 1, match.group(1)))
    return blocks


def _substituted(blocks: list[tuple[int, str]]) -> list[tuple[int, str]]:
    joined = "\n".join(code for _, code in blocks)
    for old in SUBSTITUTIONS:
        assert joined.count(old) == 1, f"the README no longer contains {old!r} exactly once; update SUBSTITUTIONS"
    result = []
    for line, code in blocks:
        for old, new in SUBSTITUTIONS.items():
            code = code.replace(old, new)
        result.append((line, code))
    return result


def test_readme_blocks_are_found():
    blocks = python_blocks(README.read_text())
    assert len(blocks) >= 6
    assert all(code.strip() for _, code in blocks)


@pytest.mark.slow
def test_readme_python_blocks_run(tmp_path, monkeypatch):
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    monkeypatch.chdir(tmp_path)
    folder = tmp_path / "my_frames"
    folder.mkdir()
    for name in FRAMES:
        skimage.io.imsave(folder / f"{name}.png", getattr(skimage.data, name)()[:96, :96], check_contrast=False)
    namespace: dict = {"__name__": "readme"}
    exec(compile(PREAMBLE, "test_readme PREAMBLE", "exec"), namespace)
    for line, code in _substituted(python_blocks(README.read_text())):
        exec(compile(code, f"README.md block at line {line}", "exec"), namespace)
    plt.close("all")
    # what the README promises along the way
    assert namespace["safe"].facts[0].verified and namespace["safe"].facts[0].theta == 0.75
    assert namespace["wider"].facts == ()
    # the trained file loads without `theta`: its recorded default, the middle of (0.5, 0.95)
    assert Path("mine.pt").is_file() and namespace["mine"].facts[0].theta == pytest.approx(0.725)
    assert namespace["tuned"].steps == 2
    assert namespace["result"].x.shape == namespace["frame"].shape
    assert {entry["method"] for entry in namespace["results"].document["results"]} == {"tikhonov"}
    assert namespace["scanner"].norm_bound().basis == "certified" and namespace["ct"].guarantee.status == "proved"
