"""Test-session settings.

The suite runs many tiny problems, for which torch's intra-op threads cost more
to wake than they save (and they make timings erratic on a loaded machine), so
tests use one thread. Benchmarks under benchmarks/ keep torch's default.
"""

import torch

torch.set_num_threads(1)
