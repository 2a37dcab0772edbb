"""Step-size guarantees from published theorems, or a refusal with reasons.

- :func:`admissible`: admissible parameters for an algorithm, or :class:`Refused`.
- :data:`ROUTES`: the theorem table (one :class:`Route` record per result).
"""

from ._admissible import DEFAULT_MARGIN, Guarantee, admissible
from ._refused import Refused
from ._routes import ROUTES, Constants, IterationMap, Route, Window

__all__ = ["DEFAULT_MARGIN", "ROUTES", "Constants", "Guarantee", "IterationMap", "Refused", "Route", "Window", "admissible"]
