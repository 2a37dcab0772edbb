"""The public API, imported on first use by ``pnpguard/__init__.py`` (see its docstring)."""


from . import phantoms
from .check import *  # noqa: F403
from .check import __all__ as _check_all
from .denoisers import *  # noqa: F403
from .denoisers import __all__ as _denoisers_all
from .fidelity import LeastSquares
from .guarantee import *  # noqa: F403
from .guarantee import __all__ as _guarantee_all
from .learned import *  # noqa: F403
from .learned import __all__ as _learned_all
from .metrics import psnr, ssim
from .operators import *  # noqa: F403
from .operators import __all__ as _operators_all
from .solvers import *  # noqa: F403
from .solvers import __all__ as _solvers_all
from .starts import fill_missing, interpolated_start
from .strength import *  # noqa: F403
from .strength import __all__ as _strength_all


__all__ = [
    "LeastSquares",
    "fill_missing",
    "interpolated_start",
    "phantoms",
    "psnr",
    "ssim",
    *_check_all,
    *_denoisers_all,
    *_guarantee_all,
    *_learned_all,
    *_operators_all,
    *_solvers_all,
    *_strength_all,
]
