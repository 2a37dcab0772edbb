"""Adversarial search for pairs that maximise the pairwise statistics of a denoiser.

A black box only yields lower bounds, so the search tries hard, in stages,
within a budget of denoiser calls:

1. *Exploration*: random perturbations ``y = x + a`` of every sample ``x`` at
   several scales, from tiny (where the Jacobian dominates) to twice the
   denoiser's noise level.
2. *Jacobian chains* (differentiable denoisers): power iterations with exact
   Jacobian-vector and vector-Jacobian products (``torch.func``) at a sample.
3. *Power chains*: at the most revealing scales, iterate the perturbation
   direction along the residual difference ``r`` (a nonlinear power
   iteration on ``I - D``: for a symmetric Jacobian with eigenvalues ``h`` it
   converges to the eigenvector of the smallest ``h``, which maximises the
   averagedness statistic ``(1 - h) / 2``) and along the output difference
   ``Dx - Dy`` (power iteration on ``D``, which maximises the Lipschitz ratio).
4. *Ascent*: from the best pair, maximise the averagedness statistic over
   perturbations of fixed size, by gradient ascent through torch autograd when
   the denoiser is differentiable, otherwise by a (1+1) evolution strategy
   with step-size adaptation (derivative-free).

References
----------
.. [1] I. Rechenberg, *Evolutionsstrategie*, Frommann-Holzboog, 1973 (the
   (1+1) strategy and its one-fifth success rule; from memory).
.. [2] E. K. Ryu, J. Liu, S. Wang, X. Chen, Z. Wang and W. Yin, "Plug-and-play
   methods provably converge with properly trained denoisers", ICML 2019,
   PMLR 97 (estimating denoiser constants by search; from memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import torch

from ..denoisers import Denoiser
from ._pairs import PairStatistics, pair_statistics

QUANTITIES = ("theta", "lipschitz", "residual_lipschitz")

#: Perturbation sizes, as multiples of the reference noise level (RMS per pixel).
SCALES = (0.01, 0.1, 0.5, 1.0, 2.0)


@dataclass
class _Chain:
    """One power chain: where it runs, what it follows, and its history."""

    index: int
    scale: float
    along_residual: bool
    direction: torch.Tensor
    inputs: list[torch.Tensor] = field(default_factory=list)
    responses: list[torch.Tensor] = field(default_factory=list)


def ritz_direction(
    inputs: list[torch.Tensor], responses: list[torch.Tensor], theta_statistic: bool
) -> torch.Tensor | None:
    """Best unit direction in the span of ``inputs`` under a linear model.

    Assumes ``responses[k] = M inputs[k]`` for one matrix ``M`` (exact for a
    linear map, a local model otherwise). With an orthonormal basis ``U`` of
    the inputs (truncated SVD) and ``B = M U``, it maximises over ``c`` either
    ``||B c||^2 / (2 c^T sym(U^T B) c)`` (the averagedness statistic, a
    generalised symmetric eigenproblem; skipped when ``sym(U^T B)`` is not
    positive definite) or ``||B c|| / ||c||`` (the Lipschitz ratio).

    Returns None when the history is too short or degenerate.

    References
    ----------
    .. [1] B. N. Parlett, *The Symmetric Eigenvalue Problem*, SIAM, 1998,
       ch. 11 (Rayleigh-Ritz approximations from a subspace).
    """
    if len(inputs) < 2:
        return None
    shape = inputs[0].shape
    a = torch.cat([t.reshape(1, -1) for t in inputs]).double().T
    r = torch.cat([t.reshape(1, -1) for t in responses]).double().T
    u, s, vh = torch.linalg.svd(a, full_matrices=False)
    keep = s > 1e-8 * s[0]
    u, s, vh = u[:, keep], s[keep], vh[keep]
    b = r @ vh.T / s
    if theta_statistic:
        g1 = u.T @ b
        g1 = 0.5 * (g1 + g1.T)
        g2 = b.T @ b
        low = torch.linalg.eigvalsh(g1)
        if float(low[0]) <= 1e-12 * float(low[-1].abs().clamp_min(1e-300)):
            return None
        # Reduce g2 c = lam g1 c to a standard problem with the Cholesky factor of g1.
        chol = torch.linalg.cholesky(g1)
        inv = torch.linalg.inv(chol)
        _, vectors = torch.linalg.eigh(inv @ g2 @ inv.T)
        coefficients = inv.T @ vectors[:, -1]
    else:
        _, vectors = torch.linalg.eigh(b.T @ b)
        coefficients = vectors[:, -1]
    direction = u @ coefficients
    norm = torch.linalg.vector_norm(direction)
    if not bool(torch.isfinite(norm)) or float(norm) == 0.0:
        return None
    return (direction / norm).reshape(shape)


class BudgetExhausted(Exception):
    """Raised internally when the call budget is used up."""


@dataclass
class Best:
    """The best pair found so far for one quantity."""

    value: float = -math.inf
    x: torch.Tensor | None = None
    y: torch.Tensor | None = None


class PairSearch:
    """Evaluate pairs within a call budget and keep the best pair per quantity.

    Parameters
    ----------
    denoiser : Denoiser
        The map under test.
    samples : list of torch.Tensor
        Base points, each ``(1, C, H, W)``.
    budget : int
        Maximum number of denoiser calls (images evaluated).
    reference_sigma : float
        The noise level that sets the perturbation scales.
    generator : torch.Generator
        Source of randomness.
    """

    def __init__(
        self,
        denoiser: Denoiser,
        samples: list[torch.Tensor],
        *,
        budget: int,
        reference_sigma: float,
        generator: torch.Generator,
    ):
        self.denoiser = denoiser
        self.budget = budget
        self.calls = 0
        self.reference_sigma = reference_sigma
        self.generator = generator
        self.best = {name: Best() for name in QUANTITIES}
        self.expansive_found = False
        self.informative_found = False
        self.samples = samples
        self.sample_outputs = [self._evaluate(x) for x in samples]

    # ------------------------------------------------------------ evaluation
    def remaining(self) -> int:
        return self.budget - self.calls

    def _evaluate(self, batch: torch.Tensor) -> torch.Tensor:
        count = batch.shape[0]
        if self.calls + count > self.budget:
            raise BudgetExhausted
        self.calls += count
        return self.denoiser.apply(batch)

    def evaluate_pairs(self, index: int, ys: torch.Tensor) -> tuple[torch.Tensor, PairStatistics]:
        """Evaluate ``D`` on perturbed points ``ys`` (``(K, C, H, W)``) of sample ``index``."""
        dy = self._evaluate(ys)
        x = self.samples[index].expand_as(ys)
        dx = self.sample_outputs[index].expand_as(ys)
        stats = pair_statistics(x, ys, dx, dy, self.denoiser.rounding_eps(dy.dtype))
        self._record(x, ys, stats)
        return dy, stats

    def _record(self, x: torch.Tensor, ys: torch.Tensor, stats: PairStatistics) -> None:
        self.expansive_found |= bool(stats.expansive.any())
        self.informative_found |= bool(stats.informative.any())
        for name, values in zip(QUANTITIES, (stats.theta, stats.lipschitz, stats.residual)):
            k = int(torch.argmax(values))
            value = float(values[k])
            if value > self.best[name].value:
                self.best[name] = Best(value, x[k : k + 1].clone(), ys[k : k + 1].clone())

    # ------------------------------------------------------------- helpers
    def _unit(self, shape: torch.Size, like: torch.Tensor) -> torch.Tensor:
        noise = torch.randn(shape, generator=self.generator, dtype=torch.float64)
        noise = noise.to(dtype=like.dtype, device=like.device)
        return noise / torch.linalg.vector_norm(noise.reshape(shape[0], -1), dim=1).reshape(
            -1, *([1] * (len(shape) - 1))
        )

    def _radius(self, index: int, scale: float) -> float:
        """Perturbation norm for an RMS per-pixel size ``scale * reference_sigma``."""
        return scale * self.reference_sigma * math.sqrt(self.samples[index].numel())

    @staticmethod
    def _normalise(t: torch.Tensor) -> torch.Tensor:
        norms = torch.linalg.vector_norm(t.reshape(t.shape[0], -1).double(), dim=1)
        norms = norms.clamp_min(torch.finfo(torch.float64).tiny).to(t.dtype)
        return t / norms.reshape(-1, *([1] * (t.ndim - 1)))

    # -------------------------------------------------------------- stages
    def explore(self, directions: int) -> dict[tuple[int, float], float]:
        """Random perturbations at every scale; returns the best theta per (sample, scale)."""
        found = {}
        for index, x in enumerate(self.samples):
            for scale in SCALES:
                shape = torch.Size((directions, *x.shape[1:]))
                ys = x + self._radius(index, scale) * self._unit(shape, x)
                _, stats = self.evaluate_pairs(index, ys)
                found[(index, scale)] = float(stats.theta.max())
        return found

    def power_chains(self, starts: list[tuple[int, float]], steps: int) -> None:
        """Power iterations along ``r`` and along ``Dx - Dy``, then Ritz candidates.

        Each chain keeps its perturbations ``a_k`` and responses (``r_k`` or
        ``Dx - Dy_k``); after the last step the best combination of the
        perturbations under the local-linear model (a Rayleigh-Ritz step, see
        :func:`ritz_direction`) is evaluated as one more pair. The model only
        proposes the pair: the statistics reported are those measured on it.
        """
        chains = [
            _Chain(index, scale, along_residual, self._unit(torch.Size((1, *self.samples[index].shape[1:])), self.samples[index]))
            for index, scale in starts
            for along_residual in (True, False)
        ]
        for _ in range(steps):
            for chain in chains:
                x = self.samples[chain.index]
                y = x + self._radius(chain.index, chain.scale) * chain.direction
                dy, _ = self.evaluate_pairs(chain.index, y)
                a = x - y
                out = self.sample_outputs[chain.index] - dy
                response = a - out if chain.along_residual else out
                chain.inputs.append(a)
                chain.responses.append(response)
                if float(torch.linalg.vector_norm(response.double())) > 0.0:
                    chain.direction = self._normalise(-response)
                else:
                    chain.direction = self._unit(chain.direction.shape, x)
        for chain in chains:
            candidate = ritz_direction(chain.inputs, chain.responses, chain.along_residual)
            if candidate is not None:
                x = self.samples[chain.index]
                radius = self._radius(chain.index, chain.scale)
                self.evaluate_pairs(chain.index, x - radius * candidate.to(x.dtype))

    def jacobian_chain(self, index: int, steps: int) -> None:
        """Local power iterations with exact Jacobian products at sample ``index``.

        For a differentiable denoiser, ``(I - J) v`` comes from a Jacobian-vector
        product (:func:`torch.func.jvp`) and ``J^T J u`` from a JVP followed by a
        vector-Jacobian product (:func:`torch.func.vjp`): power iterations for
        the direction maximising the local averagedness statistic
        ``||(I - J) v||^2 / (2 <v, (I - J) v>)`` (sharpened by a Rayleigh-Ritz
        step) and for the spectral norm of ``J``. Each direction found is then
        evaluated as an actual pair at the smallest perturbation scale, so the
        reported values are measured, not modelled. A JVP counts as two calls,
        a JVP plus VJP as three.
        """
        x = self.samples[index]
        function = self.denoiser.apply_traced
        shape = torch.Size((1, *x.shape[1:]))
        radius = self._radius(index, SCALES[0])
        direction = self._unit(shape, x)
        inputs, responses = [], []
        for _ in range(steps):
            if self.remaining() < 3:
                raise BudgetExhausted
            self.calls += 2
            _, pushed = torch.func.jvp(function, (x,), (direction,))
            residual = direction - pushed.detach()
            inputs.append(direction)
            responses.append(residual)
            direction = self._normalise(residual)
        candidate = ritz_direction(inputs, responses, True)
        self.evaluate_pairs(index, x + radius * (direction if candidate is None else candidate.to(x.dtype)))
        vector = self._unit(shape, x)
        _, pullback = torch.func.vjp(function, x)
        for _ in range(steps // 2):
            if self.remaining() < 4:
                raise BudgetExhausted
            self.calls += 3
            _, pushed = torch.func.jvp(function, (x,), (vector,))
            (normal,) = pullback(pushed.detach())
            vector = self._normalise(normal.detach())
        self.evaluate_pairs(index, x + radius * vector)

    def ascend(self, steps: int) -> None:
        """Maximise the averagedness statistic from the best pair found so far."""
        best = self.best["theta"]
        if best.x is None or math.isinf(best.value):
            return
        index = next(
            i for i, s in enumerate(self.samples) if torch.equal(s, best.x)
        )
        if self.denoiser.differentiable:
            self._ascend_gradient(index, best.y, steps)
        else:
            self._ascend_evolution(index, best.y, steps)

    def _theta_of(self, index: int, y: torch.Tensor, dy: torch.Tensor) -> torch.Tensor:
        x, dx = self.samples[index], self.sample_outputs[index]
        a = (x - y).double().reshape(-1)
        r = a - (dx - dy).double().reshape(-1)
        return torch.sum(r * r) / (2.0 * torch.sum(a * r))

    def _ascend_evolution(self, index: int, y: torch.Tensor, steps: int) -> None:
        x = self.samples[index]
        radius = float(torch.linalg.vector_norm((y - x).double()))
        direction = self._normalise(y - x)
        value = self.best["theta"].value
        spread = 0.3
        for _ in range(steps):
            candidate = self._normalise(direction + spread * self._unit(direction.shape, x))
            _, stats = self.evaluate_pairs(index, x + radius * candidate)
            if float(stats.theta[0]) > value:
                value, direction = float(stats.theta[0]), candidate
                spread = min(spread * 1.5, 2.0)
            else:
                spread *= 0.85

    def _ascend_gradient(self, index: int, y: torch.Tensor, steps: int) -> None:
        x = self.samples[index]
        radius = float(torch.linalg.vector_norm((y - x).double()))
        best_direction = self._normalise(y - x)
        best_value = -math.inf
        best_step = None
        rate = 0.3
        direction = best_direction
        for _ in range(steps // 2):
            if self.remaining() < 2:
                raise BudgetExhausted
            self.calls += 2  # one forward and one backward pass
            point = (x + radius * direction).detach().requires_grad_(True)
            with torch.enable_grad():
                dy = self.denoiser.apply_traced(point)
                statistic = self._theta_of(index, point, dy)
                (gradient,) = torch.autograd.grad(statistic, point)
            stats = pair_statistics(
                x, point.detach(), self.sample_outputs[index], dy.detach(), self.denoiser.rounding_eps(dy.dtype)
            )
            self._record(x, point.detach(), stats)
            current = float(stats.theta[0])
            if not math.isfinite(current) or not bool(torch.isfinite(gradient).all()):
                return
            if current > best_value:
                tangent = gradient - torch.sum(gradient * direction) * direction
                norm = float(torch.linalg.vector_norm(tangent.double()))
                if norm == 0.0:
                    return
                best_value, best_direction, best_step = current, direction, tangent / norm
                rate *= 1.2
            else:
                rate *= 0.5
            direction = self._normalise(best_direction + rate * best_step)
