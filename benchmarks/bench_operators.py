"""Speed of the periodic blur against a bare torch.fft convolution, in one run.

Reports the median time of forward + adjoint for a 512 x 512 periodic blur through
the public operator API (with input validation) and through the fast path (`apply`),
next to a bare ``torch.fft`` implementation of the same arithmetic, and their ratios.

Run: ``.venv/bin/python benchmarks/bench_operators.py``
"""

from __future__ import annotations

import statistics
import time

import torch

import pnpguard as pg

SIZE = 512
REPEATS = 50


def _interleaved_medians(functions, repeats: int = REPEATS) -> list[float]:
    """Median seconds of each function, timed in turn within every round.

    Interleaving exposes all candidates to the same machine load, which matters
    on a shared machine more than the number of repeats.
    """
    for function in functions:
        function()  # warm-up (caches, FFT plans)
    times = [[] for _ in functions]
    for _ in range(repeats):
        for slot, function in zip(times, functions):
            start = time.perf_counter()
            function()
            slot.append(time.perf_counter() - start)
    return [statistics.median(slot) for slot in times]


def main() -> None:
    torch.manual_seed(0)
    for dtype in (torch.float32, torch.float64):
        x = torch.rand(SIZE, SIZE, dtype=dtype)
        op = pg.Convolution(pg.gaussian_psf(9, 1.6), (SIZE, SIZE))
        transfer = op._transfer.like(x)
        conjugate = transfer.conj()

        def bare():
            y = torch.fft.irfft2(torch.fft.rfft2(x) * transfer, s=(SIZE, SIZE))
            return torch.fft.irfft2(torch.fft.rfft2(y) * conjugate, s=(SIZE, SIZE))

        def public():
            return op.adjoint(op.forward(x))

        def fast_path():
            return op.apply_adjoint(op.apply(x))

        t_bare, t_public, t_fast = _interleaved_medians((bare, public, fast_path))
        print(f"{SIZE}x{SIZE} periodic blur, forward + adjoint, {str(dtype).replace('torch.', '')}, "
              f"{torch.get_num_threads()} threads, median of {REPEATS} interleaved rounds")
        print(f"  bare torch.fft      {1e3 * t_bare:8.2f} ms")
        print(f"  pnpguard fast path  {1e3 * t_fast:8.2f} ms   ratio {t_fast / t_bare:.2f}")
        print(f"  pnpguard public API {1e3 * t_public:8.2f} ms   ratio {t_public / t_bare:.2f}")


if __name__ == "__main__":
    main()
