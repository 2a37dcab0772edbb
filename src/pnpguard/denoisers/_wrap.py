"""Turning a user's function or network into a :class:`Denoiser`."""

from __future__ import annotations

import inspect
from collections.abc import Callable, Iterable
from typing import Any

import numpy as np
import torch

from ._base import Denoiser, DenoiserError
from ._facts import ClaimLike, as_claim

_BACKENDS = ("numpy", "torch")
#: Words in an annotation that name each backend's array type.
_ANNOTATIONS = {"numpy": ("ndarray", "NDArray"), "torch": ("Tensor",)}


def as_denoiser(
    obj: Any,
    *,
    name: str | None = None,
    sigma: float | None = None,
    differentiable: bool | None = None,
    claims: Iterable[ClaimLike] = (),
    backend: str | None = None,
) -> Denoiser:
    """Turn a denoiser, a function or a torch module into a :class:`Denoiser`.

    Parameters
    ----------
    obj : Denoiser, callable or torch.nn.Module
        - A :class:`Denoiser` is returned as is (no other argument may be given).
        - A ``torch.nn.Module`` is put in eval mode (this changes the module's
          ``training`` flag) and always receives ``(N, C, H, W)`` tensors in
          its own parameter dtype and device; ``(H, W)`` inputs are reshaped
          to ``(1, 1, H, W)`` and back, and results are converted back to the
          caller's dtype and device.
        - A callable ``f(x) -> x`` on torch tensors receives the tensor as
          given (``(H, W)`` or ``(N, C, H, W)``); on numpy arrays it receives
          one float ``(H, W)`` image at a time (numpy image tools treat every
          axis as spatial), in the caller's dtype. Either way it gets a copy,
          so a function that writes into its argument cannot change the caller's
          data.
    name : str, optional
        Name used in reports; default the function's ``__name__`` or the
        module's class name.
    sigma : float, optional
        The strength the denoiser is set for, in intensity units.
    differentiable : bool, optional
        Whether torch autograd can differentiate the map. Default True for
        modules and False for functions (a torch function known to be
        differentiable should say so). Must be False for numpy functions.
    claims : iterable of Fact or short forms
        What the user states about the map: :class:`Fact` objects or the short
        forms ``"proximal"``, ``"nonexpansive"``, ``("averaged", theta)``,
        ``("linear_symmetric", (a, b))``. Always stored with
        ``verified=False`` and the source "the user's claim".
    backend : {"numpy", "torch"}, optional
        For callables: which arrays the function takes. When omitted it is
        decided without ever handing the function something it was not
        written for: ``differentiable=True`` means torch; otherwise an
        annotation of the first parameter as ``numpy.ndarray`` or
        ``torch.Tensor`` decides; otherwise the first call gives the
        function the first ``(H, W)`` image as a numpy array, exactly as a
        numpy function is always called, and keeps that result. If the
        function raises on it or returns a torch tensor, it is a torch
        function from then on and receives the tensor as given. A torch
        function that also works on numpy arrays is thus run on numpy images;
        give ``backend="torch"`` (or annotate its argument) to keep it on
        tensors.

    Returns
    -------
    Denoiser

    Raises
    ------
    TypeError
        If ``obj`` is neither a Denoiser, a module nor callable, or a module
        has parameters other than float32/float64 (e.g. half precision).
    ValueError
        For invalid options, or options given together with a Denoiser.

    Examples
    --------
    >>> import numpy as np
    >>> from scipy.ndimage import median_filter
    >>> den = as_denoiser(lambda x: median_filter(x, size=3), name="median",
    ...                   backend="numpy", claims=["nonexpansive"])
    >>> den(np.zeros((8, 8))).shape
    (8, 8)
    >>> den.facts[0].verified
    False
    """
    if isinstance(obj, Denoiser):
        given = {
            "name": name,
            "sigma": sigma,
            "differentiable": differentiable,
            "backend": backend,
        }
        extra = sorted(k for k, v in given.items() if v is not None)
        if tuple(claims):
            extra.append("claims")
        if extra:
            raise ValueError(
                f"`obj` is already a Denoiser ({obj.name!r}); options {extra} cannot be applied "
                "to it"
            )
        return obj
    facts = tuple(as_claim(claim) for claim in claims)
    if isinstance(obj, torch.nn.Module):
        if backend not in (None, "torch"):
            raise ValueError(f"a torch module runs on torch tensors; got backend={backend!r}")
        return _ModuleDenoiser(
            obj,
            name=name or type(obj).__name__,
            sigma=sigma,
            differentiable=True if differentiable is None else differentiable,
            facts=facts,
        )
    if callable(obj):
        return _FunctionDenoiser(
            obj,
            backend=backend,
            name=name or getattr(obj, "__name__", type(obj).__name__),
            sigma=sigma,
            differentiable=False if differentiable is None else differentiable,
            facts=facts,
        )
    raise TypeError(
        "`obj` must be a Denoiser, a torch.nn.Module or a callable image -> image, "
        f"got {type(obj).__name__}"
    )


class _FunctionDenoiser(Denoiser):
    """A user's function on torch tensors or numpy arrays."""

    def __init__(self, fn: Callable, *, backend: str | None, **options: Any):
        if backend is not None and backend not in _BACKENDS:
            raise ValueError(f"`backend` must be one of {sorted(_BACKENDS)}, got {backend!r}")
        super().__init__(**options)
        if backend == "numpy" and self.differentiable:
            raise ValueError("a numpy function cannot be differentiable; set differentiable=False")
        self._fn = fn
        if backend is None:
            backend = "torch" if self.differentiable else _annotated_backend(fn)
        self._backend = backend

    def _denoise(self, t: torch.Tensor) -> torch.Tensor:
        if self._backend == "torch":
            return self._from_torch(self._fn(t.clone()), t)
        if self._backend == "numpy":
            return self._through_numpy(t)
        return self._detect(t)

    def _detect(self, t: torch.Tensor) -> torch.Tensor:
        """Decide the backend on the first call, trying numpy first (see ``as_denoiser``)."""
        first = _images(t)[0]
        try:
            trial = self._fn(first.copy())
        except Exception as error:  # any failure means "not a numpy function"
            numpy_failure: Exception | None = error
        else:
            numpy_failure = None
            if not isinstance(trial, torch.Tensor):
                self._backend = "numpy"
                return self._through_numpy(t, first=trial)
        try:
            out = self._fn(t.clone())
        except Exception as error:
            if numpy_failure is None:
                raise
            raise DenoiserError(
                f"denoiser {self.name!r} failed on a numpy image of shape {first.shape} "
                f"({numpy_failure!r}) and on a torch tensor of shape {tuple(t.shape)} ({error!r}); "
                "pass backend='numpy' or backend='torch' to see only the relevant failure"
            ) from error
        self._backend = "torch"
        return self._from_torch(out, t)

    def _from_torch(self, out: Any, t: torch.Tensor) -> torch.Tensor:
        if not isinstance(out, torch.Tensor):
            raise DenoiserError(
                f"denoiser {self.name!r} returned {type(out).__name__} for a torch tensor of shape "
                f"{tuple(t.shape)}; expected a torch tensor"
            )
        if not out.is_floating_point():
            raise DenoiserError(
                f"denoiser {self.name!r} returned dtype {out.dtype}; expected a floating dtype"
            )
        return out.to(dtype=t.dtype, device=t.device)

    def _through_numpy(self, t: torch.Tensor, first: Any = None) -> torch.Tensor:
        """Call the function on each ``(H, W)`` image of ``t``; ``first``: its result on the first one."""
        images = _images(t)
        height, width = images.shape[-2:]
        results = []
        for index, image in enumerate(images):
            out = np.asarray(first if index == 0 and first is not None else self._fn(image.copy()))
            if out.shape != (height, width):
                raise DenoiserError(
                    f"denoiser {self.name!r} returned shape {out.shape} for an input image of "
                    f"shape {(height, width)}; a denoiser must return an image of its input's "
                    "shape"
                )
            if out.dtype.kind != "f":
                raise DenoiserError(
                    f"denoiser {self.name!r} returned dtype {out.dtype}; expected a floating dtype"
                )
            results.append(out)
        stacked = np.stack(results).reshape(t.shape)
        return torch.from_numpy(stacked).to(dtype=t.dtype, device=t.device)


def _images(t: torch.Tensor) -> np.ndarray:
    """The ``(H, W)`` images of ``t`` as a ``(K, H, W)`` numpy array in ``t``'s dtype."""
    return t.detach().cpu().numpy().reshape(-1, *t.shape[-2:])


def _annotated_backend(fn: Callable) -> str | None:
    """``"numpy"`` or ``"torch"`` when ``fn``'s first parameter is annotated as one of them."""
    try:
        parameters = list(inspect.signature(fn).parameters.values())
    except (TypeError, ValueError):  # builtins and some extension functions have no signature
        return None
    if not parameters or parameters[0].annotation is inspect.Parameter.empty:
        return None
    annotation = parameters[0].annotation
    text = annotation if isinstance(annotation, str) else repr(annotation)
    found = {name for name, marks in _ANNOTATIONS.items() if any(mark in text for mark in marks)}
    return found.pop() if len(found) == 1 else None


def _module_dtype_device(module: torch.nn.Module, name: str) -> tuple[torch.dtype, torch.device] | None:
    tensors = list(module.parameters()) + [b for b in module.buffers() if b.is_floating_point()]
    if not tensors:
        return None
    dtypes = sorted({str(p.dtype) for p in tensors})
    bad = [d for d in dtypes if d not in ("torch.float32", "torch.float64")]
    if bad:
        raise TypeError(
            f"module {name!r} has parameters of dtype {', '.join(bad)}; expected float32 or "
            "float64 (convert it with `module.float()` or `module.double()`)"
        )
    if len(dtypes) > 1:
        raise TypeError(f"module {name!r} mixes parameter dtypes {dtypes}; use one dtype")
    devices = {str(p.device) for p in tensors}
    if len(devices) > 1:
        raise ValueError(f"module {name!r} has parameters on several devices {sorted(devices)}")
    return tensors[0].dtype, tensors[0].device


class _ModuleDenoiser(Denoiser):
    """A torch module applied in eval mode on its own dtype and device."""

    def __init__(self, module: torch.nn.Module, **options: Any):
        super().__init__(**options)
        _module_dtype_device(module, self.name)
        module.eval()
        self._module = module

    @property
    def module(self) -> torch.nn.Module:
        """The wrapped module."""
        return self._module

    def precision(self, dtype: torch.dtype) -> torch.dtype:
        """The module's parameter dtype (``dtype`` for a module without parameters)."""
        placement = _module_dtype_device(self._module, self.name)
        return dtype if placement is None else placement[0]

    def _denoise(self, t: torch.Tensor) -> torch.Tensor:
        placement = _module_dtype_device(self._module, self.name)
        dtype, device = placement if placement is not None else (t.dtype, t.device)
        batch = t if t.ndim == 4 else t.reshape(1, 1, *t.shape)
        if dtype == t.dtype and device == t.device:
            moved = batch.clone()  # the module must not be able to write into the input
        else:
            moved = batch.to(dtype=dtype, device=device)
        out = self._module(moved)
        if not isinstance(out, torch.Tensor):
            raise DenoiserError(
                f"denoiser {self.name!r} returned {type(out).__name__}; expected a torch tensor"
            )
        if out.shape != batch.shape:
            return out
        return out.to(dtype=t.dtype, device=t.device).reshape(t.shape)
