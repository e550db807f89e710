"""MeanField: the mean-field marginals of the free layers as a differentiable fixed point."""

from __future__ import annotations

import math
import numbers
import warnings
from collections.abc import Callable, Mapping, Sequence

import torch
from torch import Tensor, nn

from . import functional as F
from ._checks import check_batch, check_index, check_size
from .model import EnergyModel
from .statistics import Statistics

__all__ = ["MeanField"]

UPDATES = ("colour", "parallel")
BACKWARDS = ("implicit", "unroll")

Marginals = dict[int, Tensor]


class MeanField(nn.Module):
    r"""Mean-field inference: factorised marginals ``mu`` of the free layers given clamped ones.

    Solves the fixed point ``mu_l = sigmoid(b_l + sum_m mu_m W_ml)`` for every free layer ``l``
    with layer 0 clamped to the data (and any layers in ``clamp``).

    - ``update="colour"`` (default): the colour classes of ``model.schedule`` in turn, each
      from the newest values of its neighbours (layers with lateral couplings unit by unit).
      Every update lowers the mean-field free energy, so the iteration cannot oscillate; with a
      single free class (an RBM) one update is exact and the call costs one pass.
    - ``update="parallel"``: every free layer at once, damped:
      ``mu <- damping * mu + (1 - damping) * sigmoid(input(mu))``. Undamped parallel updates can
      oscillate with period two; damping often stops that, but can also settle on a saddle.

    The iteration stops when the residual ``max |sigmoid(input(mu)) - mu|`` over the batch and
    the free units is below ``tol``, or after ``max_iter`` updates (with a warning, once per module).

    Gradients with respect to the parameters and the clamped inputs:

    - ``backward="implicit"`` (default): the iteration runs without a graph, and the backward
      pass differentiates the fixed point itself (implicit function theorem, as in "Deep
      Equilibrium Models", NeurIPS 2019): one more update is recorded, and its incoming gradient
      ``g`` is replaced by the solution of ``u = g + J^T u``, with ``J`` the Jacobian of that
      same update. Iterating it converges at the forward's own rate (the damped or colour-ordered
      update, never the plain undamped one), and memory does not grow with the number of
      iterations. When the forward did not converge, it falls back to unrolling, with a warning.
    - ``backward="unroll"``: backpropagate through every iteration.

    Under ``torch.no_grad()`` (or with nothing requiring grad) no graph and no extra update.

    Args:
        model: the :class:`EnergyModel`; registered as a submodule.
        update: ``"colour"`` or ``"parallel"``.
        damping: ``lam`` in [0, 1) for parallel updates (colour updates are not damped).
        tol: stop when the residual is below this.
        max_iter: most updates (sweeps, for colour) per call.
        backward: ``"implicit"`` or ``"unroll"``.
        init: value in [0, 1] of every free unit before the first update, or ``"bottom-up"``:
            each free layer from the layers below it, in index order.

    Shape:
        - ``mf(v, clamp)``: ``v`` ``(B, n_0)``; ``clamp`` maps further layer indices to
          ``(B, n_i)``. Returns one ``(B, n_i)`` tensor per layer: the clamped values themselves
          and the marginals of the free layers.

    Attributes:
        iterations: updates used by the last call.
        converged: whether the last call met ``tol``.
        residual: the residual of the returned marginals.

    Examples::

        >>> import ebm_layers as el
        >>> mf = el.MeanField(el.dbm(6, 4, 3, generator=torch.Generator().manual_seed(0)))
        >>> marginals = mf(torch.ones(2, 6))
        >>> [tuple(mu.shape) for mu in marginals], mf.converged
        ([(2, 6), (2, 4), (2, 3)], True)
    """

    iterations: int
    converged: bool
    residual: float

    def __init__(
        self,
        model: EnergyModel,
        update: str = "colour",
        damping: float = 0.5,
        tol: float = 1e-5,
        max_iter: int = 100,
        backward: str = "implicit",
        init: float | str = 0.5,
    ) -> None:
        super().__init__()
        if not isinstance(model, EnergyModel):
            raise TypeError(f"model must be an EnergyModel, got {type(model).__name__}")
        if update not in UPDATES:
            raise ValueError(f"update must be one of {UPDATES}, got {update!r}")
        if backward not in BACKWARDS:
            raise ValueError(f"backward must be one of {BACKWARDS}, got {backward!r}")
        _check_real("damping", damping)
        if not 0.0 <= damping < 1.0:
            raise ValueError(f"damping must lie in [0, 1), got {damping}")
        _check_real("tol", tol)
        if not 0.0 < tol < math.inf:
            raise ValueError(f"tol must be positive and finite, got {tol}")
        self.max_iter = check_size("max_iter", max_iter)
        if isinstance(init, str):
            if init != "bottom-up":
                raise ValueError(f"init must be a value in [0, 1] or 'bottom-up', got {init!r}")
        else:
            _check_real("init", init)
            if not 0.0 <= init <= 1.0:
                raise ValueError(f"init must be a value in [0, 1] or 'bottom-up', got {init}")
        self.model = model
        self.update, self.backward, self.init = update, backward, init
        self.damping, self.tol = float(damping), float(tol)
        self.iterations, self.converged, self.residual = 0, True, 0.0
        self._warned = False

    def forward(self, v: Tensor, clamp: Mapping[int, Tensor] | None = None) -> list[Tensor]:
        """Marginals of every layer given ``v`` (layer 0) and ``clamp``; see the class docstring."""
        clamped = self._check_clamp(v, clamp)
        free = [i for i in range(len(self.model.layers)) if i not in clamped]
        if not free:
            self.iterations, self.converged, self.residual = 0, True, 0.0
            return [clamped[i] for i in range(len(self.model.layers))]
        requires_grad = any(p.requires_grad for p in self.model.parameters()) or any(
            x.requires_grad for x in clamped.values()
        )
        graph = torch.is_grad_enabled() and requires_grad
        implicit = graph and self.backward == "implicit"
        biases, weights = self.model.biases(), self.model.weights()
        with torch.set_grad_enabled(graph and not implicit):
            marginals = self._solve(clamped, free, biases, weights)
        if implicit:
            if self.converged:
                marginals = self._attach_implicit(marginals, clamped, free, biases, weights)
            else:
                warnings.warn(
                    "mean field did not converge, so the implicit backward does not apply; "
                    "recomputing with the iterations unrolled",
                    RuntimeWarning,
                    stacklevel=4,
                )
                marginals = self._solve(clamped, free, biases, weights)
        return [marginals[i] for i in range(len(self.model.layers))]

    @torch.no_grad()
    def statistics(self, v: Tensor, clamp: Mapping[int, Tensor] | None = None) -> Statistics:
        """:class:`Statistics` of the marginals (pairs ``mu_a^T mu_b / B``), detached."""
        return Statistics.from_states(self(v, clamp), self.model.edges)

    # -- the forward iteration -------------------------------------------------------------

    def _free_classes(self, free: Sequence[int]) -> list[tuple[int, ...]]:
        """Colour classes restricted to the free layers, empty ones dropped."""
        classes = [tuple(i for i in c if i in free) for c in self.model.schedule.classes]
        return [c for c in classes if c]

    def _initial(self, clamped: Marginals, free: Sequence[int], biases, weights) -> Marginals:
        marginals = dict(clamped)
        batch = next(iter(clamped.values())).shape[0]
        for i in free:
            if self.init == "bottom-up":
                below = [(e, w) for e, w in zip(self.model.edges, weights) if i in e and min(e) < i]
                logits = F.layer_logits(marginals, i, biases, [w for _, w in below], [e for e, _ in below])
                marginals[i] = torch.sigmoid(logits).expand(batch, -1)
            else:
                marginals[i] = biases[i].new_full((batch, self.model.sizes[i]), self.init)
        return marginals

    def _solve(self, clamped: Marginals, free: Sequence[int], biases, weights) -> Marginals:
        """Iterate from the initial marginals until the residual is below ``tol`` or ``max_iter``.

        Sets ``iterations``, ``converged`` and ``residual``; warns once when not converged.
        """
        marginals = self._initial(clamped, free, biases, weights)
        iterate = self._iterate_parallel if self.update == "parallel" else self._iterate_colour
        self.iterations, self.residual = iterate(marginals, free, biases, weights)
        self.converged = self.residual < self.tol
        if not self.converged and not self._warned:
            self._warned = True
            warnings.warn(
                f"mean field did not converge in max_iter={self.max_iter} updates: residual "
                f"{self.residual:.3g} > tol={self.tol:g} (warned once per module); raise max_iter, "
                "or use damping / update='colour'",
                RuntimeWarning,
                stacklevel=5,
            )
        return marginals

    def _iterate_parallel(self, marginals: Marginals, free, biases, weights) -> tuple[int, float]:
        """Damped parallel updates of ``marginals`` (replaced in the dict); returns (updates, residual)."""
        edges, lam = self.model.edges, self.damping
        updates = 0
        while True:
            target = {i: torch.sigmoid(F.layer_logits(marginals, i, biases, weights, edges)) for i in free}
            residual = _max_change(target, marginals)
            if residual < self.tol or updates == self.max_iter:
                return updates, residual
            marginals.update({i: lam * marginals[i] + (1 - lam) * target[i] for i in free})
            updates += 1

    def _iterate_colour(self, marginals: Marginals, free, biases, weights) -> tuple[int, float]:
        """Colour-ordered sweeps of ``marginals`` (replaced in the dict); returns (sweeps, residual)."""
        classes = self._free_classes(free)
        unitwise = self.model.schedule.unitwise
        # After a sweep the last class is exactly at its update's value, so its residual is zero,
        # unless it was updated unit by unit. The first class's targets are its next update, so
        # checking them costs nothing extra.
        checked = classes if any(i in unitwise for i in classes[-1]) else classes[:-1]
        reuse = bool(checked) and checked[0] == classes[0] and not any(i in unitwise for i in classes[0])
        pending: Marginals = {}
        sweeps = 0
        while True:
            for layers in classes:
                new = pending or self._class_update(marginals, layers, biases, weights)
                pending = {}
                marginals.update(new)
            sweeps += 1
            targets = {
                i: torch.sigmoid(F.layer_logits(marginals, i, biases, weights, self.model.edges))
                for layers in checked
                for i in layers
            }
            residual = _max_change(targets, marginals)
            if residual < self.tol or sweeps == self.max_iter:
                return sweeps, residual
            pending = {i: targets[i] for i in classes[0]} if reuse else {}

    def _class_update(self, marginals: Marginals, layers, biases, weights) -> Marginals:
        """New marginals of one colour class, all computed from the current ``marginals``."""
        edges = self.model.edges
        return {i: F.update_layer(marginals, i, biases, weights, edges, torch.sigmoid) for i in layers}

    def _step(self, marginals: Marginals, free: Sequence[int], biases, weights) -> Marginals:
        """One update of the iteration (a colour sweep, or a damped parallel step), out of place."""
        marginals = dict(marginals)
        if self.update == "parallel":
            edges, lam = self.model.edges, self.damping
            target = {i: torch.sigmoid(F.layer_logits(marginals, i, biases, weights, edges)) for i in free}
            marginals.update({i: lam * marginals[i] + (1 - lam) * target[i] for i in free})
        else:
            for layers in self._free_classes(free):
                marginals.update(self._class_update(marginals, layers, biases, weights))
        return marginals

    # -- the implicit backward -------------------------------------------------------------

    def _attach_implicit(
        self, fixed_point: Marginals, clamped: Marginals, free: Sequence[int], biases, weights
    ) -> Marginals:
        """Record one update at the fixed point; its backward solves the adjoint equation."""
        sizes = [self.model.sizes[i] for i in free]
        star = torch.cat([fixed_point[i].detach() for i in free], dim=1)

        def step(flat: Tensor, clamped: Marginals, biases, weights) -> Tensor:
            marginals = dict(clamped)
            marginals.update(zip(free, flat.split(sizes, dim=1)))
            out = self._step(marginals, free, biases, weights)
            return torch.cat([out[i] for i in free], dim=1)

        out = step(star, clamped, biases, weights)
        if out.requires_grad:
            constants = (
                {i: x.detach() for i, x in clamped.items()},
                [b.detach() for b in biases],
                [w.detach() for w in weights],
            )
            out.register_hook(lambda grad: self._adjoint(lambda z: step(z, *constants), star, grad))
        marginals = dict(clamped)
        marginals.update(zip(free, out.split(sizes, dim=1)))
        return marginals

    def _adjoint(self, step: Callable[[Tensor], Tensor], star: Tensor, grad: Tensor) -> Tensor:
        """Solve ``u = grad + J^T u`` by iteration, ``J`` the Jacobian of ``step`` at ``star``."""
        if grad is None:  # an undefined gradient stays undefined
            return grad
        point = star.clone().requires_grad_()
        with torch.enable_grad():
            image = step(point)
        u = grad
        scale = float(grad.abs().max())
        for _ in range(self.max_iter):
            (pulled,) = torch.autograd.grad(image, point, u, retain_graph=True)
            u_next = grad + pulled
            change = float((u_next - u).abs().max())
            u = u_next
            scale = max(scale, float(u.abs().max()))
            if change <= self.tol * scale or not math.isfinite(change):
                break
        if not change <= self.tol * scale:
            warnings.warn(
                f"the implicit mean-field backward did not converge in max_iter={self.max_iter} "
                f"iterations (last change {change:.3g}); gradients are approximate, consider "
                "backward='unroll'",
                RuntimeWarning,
                stacklevel=2,
            )
        return u

    # -- input checks ----------------------------------------------------------------------

    def _check_clamp(self, v: Tensor, clamp: Mapping[int, Tensor] | None) -> Marginals:
        model = self.model
        clamped = {0: check_batch("v", v, model.sizes[0], dtype=model.dtype)}
        if clamp is None:
            return clamped
        if not isinstance(clamp, Mapping):
            raise TypeError(
                f"clamp must be a dict {{layer index: (B, n_i) tensor}}, got {type(clamp).__name__}"
            )
        for i, x in clamp.items():
            i = check_index("clamp layer", i, len(model.layers))
            if i == 0:
                raise ValueError("clamp must not contain layer 0: it is clamped to v")
            clamped[i] = check_batch(f"clamp[{i}]", x, model.sizes[i], dtype=model.dtype, batch=v.shape[0])
        return clamped

    def extra_repr(self) -> str:
        damping = f", damping={self.damping}" if self.update == "parallel" else ""
        return (
            f"update={self.update!r}{damping}, tol={self.tol:g}, max_iter={self.max_iter}, "
            f"backward={self.backward!r}, init={self.init!r}"
        )


def _max_change(new: Marginals, old: Marginals) -> float:
    """``max |new - old|`` over the layers of ``new``, the batch and the units (0 when empty)."""
    return max((float((new[i] - old[i]).detach().abs().max()) for i in new), default=0.0)


def _check_real(name: str, value: object) -> None:
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise TypeError(f"{name} must be a number, got {value!r} ({type(value).__name__})")
