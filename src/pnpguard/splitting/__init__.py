"""Splitting algorithms as data: one record per algorithm and its iteration map.

- :data:`ALGORITHMS`: the table (API name -> :class:`Algorithm`).
- :func:`algorithm`: look a record up by API name or short name.
- :class:`ForwardBackward`, :class:`DouglasRachford`: iteration maps on the
  governing variable the convergence theory is about.
"""

from ._schemes import (
    BACKTRACK_SHRINK,
    MAX_BACKTRACKS,
    SUFFICIENT_DECREASE,
    DescentStep,
    DouglasRachford,
    ForwardBackward,
    PotentialDescent,
    ProxForwardBackward,
    Scheme,
)
from ._table import ALGORITHMS, Algorithm, algorithm

__all__ = [
    "ALGORITHMS",
    "BACKTRACK_SHRINK",
    "MAX_BACKTRACKS",
    "SUFFICIENT_DECREASE",
    "Algorithm",
    "DescentStep",
    "DouglasRachford",
    "ForwardBackward",
    "PotentialDescent",
    "ProxForwardBackward",
    "Scheme",
    "algorithm",
]
