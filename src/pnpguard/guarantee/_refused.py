"""The exception raised when no theorem covers a requested run."""

from __future__ import annotations

from collections.abc import Sequence


class Refused(Exception):
    """No published theorem guarantees convergence for this run.

    Attributes
    ----------
    reasons : tuple of str
        Why each route to a guarantee failed, with the numbers involved.
    suggestions : tuple of str
        Concrete, computed ways out (another algorithm with its admissible
        step, a relaxed denoiser with the factor that makes the case
        admissible, a lower denoiser strength).
    relaxed_factor : float or None
        The factor ``s`` of the suggested relaxed denoiser ``(1 - s) I + s D``
        (:func:`pnpguard.relaxed`), when relaxing the denoiser can repair the
        case. (Not the iteration's relaxation ``lam``.)
    """

    def __init__(
        self,
        reasons: Sequence[str],
        suggestions: Sequence[str] = (),
        *,
        relaxed_factor: float | None = None,
    ):
        self.reasons = tuple(reasons)
        self.suggestions = tuple(suggestions)
        self.relaxed_factor = relaxed_factor
        super().__init__(self._text())

    def _text(self) -> str:
        lines = ["no convergence guarantee applies:"]
        lines += [f"  - {reason}" for reason in self.reasons]
        if self.suggestions:
            lines.append("ways out:")
            lines += [f"  * {suggestion}" for suggestion in self.suggestions]
        return "\n".join(lines)
