"""Step-size guarantees from published theorems, or a refusal with reasons."""

from ._admissible import ALGORITHMS, DEFAULT_MARGIN, Guarantee, admissible
from ._refused import Refused

__all__ = ["ALGORITHMS", "DEFAULT_MARGIN", "Guarantee", "Refused", "admissible"]
