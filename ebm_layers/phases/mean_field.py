"""MeanField: the mean-field marginals of the free layers as a differentiable fixed point."""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Collection, Mapping, Sequence
from dataclasses import dataclass, field, replace

import torch
from torch import Tensor, nn

from .._checks import check_index, check_model, check_positive_real, check_range, check_real, check_size
from ..model.energy_model import EnergyModel
from ..model.graph import UpdateSchedule
from ..model.parameters import substituted
from ..model.statistics import Statistics
from ..model.units import BinaryLayer, UnitLayer, resting_mean

__all__ = ["MeanField"]

UPDATES = ("colour", "parallel")
BACKWARDS = ("implicit", "unroll")

Marginals = dict[int, Tensor]


class MeanField(nn.Module):
    r"""Mean-field inference: factorised marginals ``mu`` of the free layers given clamped ones.

    Solves the fixed point ``mu_l = mean_l(input_l(mu))`` (binary units:
    ``sigmoid(b_l + sum_m mu_m W_ml)``) for every free layer ``l`` with the observed layers clamped
    to the data (and any layers in ``clamp``).

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
      iterations. When the forward did not converge, it falls back to unrolling, with a warning;
      at an unstable fixed point (a saddle) the adjoint diverges and the backward raises.
    - ``backward="unroll"``: backpropagate through every iteration.

    Under ``torch.no_grad()`` (or with nothing requiring grad) no graph and no extra update.
    The implicit backward gives first derivatives only (no ``create_graph`` double backward);
    use ``backward="unroll"`` for higher ones.

    Args:
        model: the :class:`EnergyModel`; registered as a submodule.
        update: ``"colour"`` or ``"parallel"``.
        damping: ``lam`` in [0, 1) for parallel updates (colour updates are not damped).
        tol: stop when the residual is below this.
        max_iter: most updates (sweeps, for colour) per call.
        backward: ``"implicit"`` or ``"unroll"``.
        init: value in [0, 1] of every free binary unit before the first update (other unit types
            start at their mean under zero input), or ``"bottom-up"``:
            each free layer from the layers below it, in index order, with the weights from below
            doubled for a layer that has couplings above it (as ``feedforward_network`` does).

    Shape:
        - ``mf(v, clamp, missing)``: ``v`` ``(B, n_0)``, or an observation of several observed
          layers (see :class:`EnergyModel`); ``clamp`` maps further layer indices to
          ``(B, n_i)``. Returns one ``(B, n_i)`` tensor per layer: the clamped values themselves
          and the marginals of the free layers.
        - ``missing``: optional bool, shaped like ``v`` (joined over the observed layers), True
          where ``v`` is unknown. Those units are inferred like free ones (``v`` may hold anything
          there, NaN included) and their layers come back filled in: observed values, and
          marginals where missing. Marking a whole observed layer missing predicts it from the
          others (a label layer from an image, say).

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
        check_model(model)
        if update not in UPDATES:
            raise ValueError(f"update must be one of {UPDATES}, got {update!r}")
        if backward not in BACKWARDS:
            raise ValueError(f"backward must be one of {BACKWARDS}, got {backward!r}")
        check_range("damping", damping, 0.0, 1.0)
        check_positive_real("tol", tol)
        self.max_iter = check_size("max_iter", max_iter)
        if isinstance(init, str):
            if init != "bottom-up":
                raise ValueError(f"init must be a value in [0, 1] or 'bottom-up', got {init!r}")
        else:
            check_real("init", init)
            if not 0.0 <= init <= 1.0:
                raise ValueError(f"init must be a value in [0, 1] or 'bottom-up', got {init}")
        self.model = model
        self.update, self.backward, self.init = update, backward, init
        self.damping, self.tol = float(damping), float(tol)
        self.iterations, self.converged, self.residual = 0, True, 0.0
        self._warned = self._warned_adjoint = False

    def forward(
        self, v: Tensor, clamp: Mapping[int, Tensor] | None = None, missing: Tensor | None = None
    ) -> list[Tensor]:
        """Marginals of every layer given ``v`` (layer 0) and ``clamp``; see the class docstring."""
        problem = self._problem(v, clamp, missing)
        if not problem.free:
            self.iterations, self.converged, self.residual = 0, True, 0.0
            return [problem.clamped[i] for i in range(len(self.model.layers))]
        graph = torch.is_grad_enabled() and problem.requires_grad()
        # One colour update is exact when the free layers form one class without lateral couplings
        # (an RBM): recording that single update is already the whole graph.
        classes = problem.classes(self.model.schedule)
        one_pass = (
            self.update == "colour"
            and len(classes) == 1
            and not self.model.schedule.unitwise & set(classes[0])
        )
        implicit = graph and self.backward == "implicit" and not one_pass
        with torch.set_grad_enabled(graph and not implicit):
            marginals = self._solve_once(problem, classes[0]) if one_pass else self._solve(problem)
        if implicit:
            if self.converged:
                marginals = self._attach_implicit(marginals, problem)
            else:
                warnings.warn(
                    "mean field did not converge, so the implicit backward does not apply; "
                    "recomputing with the iterations unrolled",
                    RuntimeWarning,
                    stacklevel=4,
                )
                marginals = self._solve(problem)
        return [marginals[i] for i in range(len(self.model.layers))]

    @torch.no_grad()
    def statistics(
        self,
        v: Tensor,
        clamp: Mapping[int, Tensor] | None = None,
        missing: Tensor | None = None,
        index: Tensor | None = None,
    ) -> Statistics:
        """:class:`Statistics` of the marginals (pairs ``mu_a^T mu_b / B``), detached."""
        if index is not None:
            raise ValueError("index is only used with DataParticles; MeanField needs no index")
        model = self.model
        marginals = self(v, clamp, missing)
        means: dict[int, Tensor | None] = {i: None for i in model.hidden if i not in (clamp or {})}
        if missing is not None:  # layers with missing units: means there, data elsewhere
            means.update(
                {i: ~unknown for i, unknown in model.clamped(missing).items() if bool(unknown.any())}
            )
        return model.statistics(marginals, means=means)

    # -- the forward iteration -------------------------------------------------------------

    def _initial(self, problem: _Problem) -> Marginals:
        model = self.model
        marginals = dict(problem.clamped)
        for i in problem.free:
            if self.init == "bottom-up":
                above = [j for j in range(i, len(model.layers))]
                input = model.layer_input(marginals, i, lateral=False, skip=above)
                input = (
                    torch.zeros(problem.batch, model.sizes[i], dtype=model.dtype) if input is None else input
                )
                # Below the top, a layer also gets input from above: doubling the bottom-up input
                # stands in for it (the recognition pass of "Efficient Learning of Deep Boltzmann
                # Machines", AISTATS 2010).
                if any(i in e and max(e) > i for e in model.edges):
                    input = 2 * input
                start = model.layers[i].mean(input).expand(problem.batch, -1)
            elif isinstance(model.layers[i], BinaryLayer):
                start = torch.full((problem.batch, model.sizes[i]), self.init, dtype=model.dtype)
            else:
                start = resting_mean(model.layers[i], problem.batch, model.dtype)
            observed = problem.observed_units(i)
            marginals[i] = start if observed is None else torch.where(*observed, start)
        return marginals

    def _solve_once(self, problem: _Problem, layers: Sequence[int]) -> Marginals:
        """The exact marginals when the free ``layers`` form one class without lateral couplings: one
        update from the clamped layers alone (no start values to build, no residual to check)."""
        marginals = dict(problem.clamped)
        marginals.update(self._class_update(marginals, layers, problem.reduced()))
        self.iterations, self.converged, self.residual = 1, True, 0.0
        return marginals

    def _solve(self, problem: _Problem) -> Marginals:
        """Iterate from the initial marginals until the residual is below ``tol`` or ``max_iter``.

        Sets ``iterations``, ``converged`` and ``residual``; warns once when not converged.
        """
        marginals = self._initial(problem)
        problem = problem.reduced()
        iterate = self._iterate_parallel if self.update == "parallel" else self._iterate_colour
        self.iterations, self.residual = iterate(marginals, problem)
        self.converged = self.residual < self.tol
        if not self.converged and not self._warned:
            self._warned = True
            resolution = 10 * torch.finfo(self.model.dtype).eps
            hint = f"; {self.model.dtype} resolves residuals only to about {resolution:.0e}"
            hint = hint if self.tol < resolution else ""
            remedy = "raise max_iter" + (", or use update='colour'" if self.update == "parallel" else "")
            warnings.warn(
                f"mean field did not converge in max_iter={self.max_iter} updates: residual "
                f"{self.residual:.3g} > tol={self.tol:g} (warned once per module); {remedy}{hint}",
                RuntimeWarning,
                stacklevel=5,
            )
        return marginals

    def _targets(self, marginals: Marginals, layers: Sequence[int], problem: _Problem) -> Marginals:
        """``sigmoid(input(mu))`` of ``layers``, all units at once (observed units keep their values)."""
        return self._layer_updates(marginals, layers, problem, unitwise=frozenset())

    def _damped(self, marginals: Marginals, targets: Marginals) -> Marginals:
        lam = self.damping
        return {i: lam * marginals[i] + (1 - lam) * target for i, target in targets.items()}

    def _iterate_parallel(self, marginals: Marginals, problem: _Problem) -> tuple[int, float]:
        """Damped parallel updates of ``marginals`` (replaced in the dict); returns (updates, residual)."""
        updates = 0
        while True:
            targets = self._targets(marginals, problem.free, problem)
            residual = _max_change(targets, marginals)
            if residual < self.tol or updates == self.max_iter:
                return updates, residual
            marginals.update(self._damped(marginals, targets))
            updates += 1

    def _iterate_colour(self, marginals: Marginals, problem: _Problem) -> tuple[int, float]:
        """Colour-ordered sweeps of ``marginals`` (replaced in the dict); returns (sweeps, residual)."""
        classes = problem.classes(self.model.schedule)
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
                new = pending or self._class_update(marginals, layers, problem)
                pending = {}
                marginals.update(new)
            sweeps += 1
            targets = self._targets(marginals, [i for layers in checked for i in layers], problem)
            residual = _max_change(targets, marginals)
            if residual < self.tol or sweeps == self.max_iter:
                return sweeps, residual
            pending = {i: targets[i] for i in classes[0]} if reuse else {}

    def _class_update(self, marginals: Marginals, layers: Sequence[int], problem: _Problem) -> Marginals:
        """New marginals of one colour class, all computed from the current ``marginals``."""
        return self._layer_updates(marginals, layers, problem, self.model.schedule.unitwise)

    def _layer_updates(
        self, marginals: Marginals, layers: Sequence[int], problem: _Problem, unitwise: Collection[int]
    ) -> Marginals:
        """Mean-field updates of ``layers`` from the current ``marginals``; those in ``unitwise``
        unit by unit, the others all units at once."""
        model = self.model
        with substituted(model, problem.parameters):
            return {
                i: model.update_layer(
                    marginals,
                    i,
                    _mean,
                    extra=problem.extra.get(i),
                    observed=problem.observed_units(i),
                    by_class=i in unitwise,
                    skip=problem.skip,
                )
                for i in layers
            }

    def _step(self, marginals: Marginals, problem: _Problem) -> Marginals:
        """One update of the iteration (a colour sweep, or a damped parallel step), out of place."""
        marginals = dict(marginals)
        if self.update == "parallel":
            marginals.update(self._damped(marginals, self._targets(marginals, problem.free, problem)))
        else:
            for layers in problem.classes(self.model.schedule):
                marginals.update(self._class_update(marginals, layers, problem))
        return marginals

    # -- the implicit backward -------------------------------------------------------------

    def _attach_implicit(self, fixed_point: Marginals, problem: _Problem) -> Marginals:
        """Record one update at the fixed point; its backward solves the adjoint equation."""
        problem = problem.reduced()
        free = problem.free
        sizes = [self.model.sizes[i] for i in free]
        star = torch.cat([fixed_point[i].detach() for i in free], dim=1)

        def step(flat: Tensor, problem: _Problem) -> Tensor:
            marginals = dict(problem.clamped)
            marginals.update(zip(free, flat.split(sizes, dim=1)))
            out = self._step(marginals, problem)
            return torch.cat([out[i] for i in free], dim=1)

        out = step(star, problem)
        if out.requires_grad:
            constants = problem.detached()
            out.register_hook(lambda grad: self._adjoint(lambda z: step(z, constants), star, grad))
        marginals = dict(problem.clamped)
        marginals.update(zip(free, out.split(sizes, dim=1)))
        return marginals

    def _adjoint(self, step: Callable[[Tensor], Tensor], star: Tensor, grad: Tensor) -> Tensor:
        """Solve ``u = grad + J^T u`` by iteration, ``J`` the Jacobian of ``step`` at ``star``.

        Converges at the forward's own rate near a stable fixed point; diverges (an error) at an
        unstable one, such as a saddle that damped parallel updates settled on by symmetry.
        """
        if grad is None:  # an undefined gradient stays undefined
            return grad
        point = star.clone().requires_grad_()
        with torch.enable_grad():
            image = step(point)
        # The adjoint is solved no more finely than the dtype resolves (float32: about 1e-6).
        tol = max(self.tol, 10 * torch.finfo(star.dtype).eps)
        u, scale, changes = grad, float(grad.abs().max()), []
        for _ in range(self.max_iter):
            (pulled,) = torch.autograd.grad(image, point, u, retain_graph=True)
            u_next = grad + pulled
            changes.append(float((u_next - u).abs().max()))
            u = u_next
            scale = max(scale, float(u.abs().max()))
            if changes[-1] <= tol * scale or not math.isfinite(changes[-1]):
                break
        if changes[-1] <= tol * scale:
            return u
        if not math.isfinite(changes[-1]) or changes[-1] > changes[0]:
            raise RuntimeError(
                "the implicit mean-field backward diverged: the fixed point is not stable under "
                f"the {self.update} update (for example a saddle that damped parallel updates "
                "settled on by symmetry); use update='colour' or backward='unroll'"
            )
        if not self._warned_adjoint:
            self._warned_adjoint = True
            warnings.warn(
                f"the implicit mean-field backward did not converge in max_iter={self.max_iter} "
                f"iterations (last change {changes[-1]:.3g}; warned once per module); gradients are "
                "approximate, consider raising max_iter or backward='unroll'",
                RuntimeWarning,
                stacklevel=2,
            )
        return u

    # -- input checks ----------------------------------------------------------------------

    def _problem(self, v: Tensor, clamp: Mapping[int, Tensor] | None, missing: Tensor | None) -> _Problem:
        """Validate the inputs of a call and gather what the iteration needs."""
        model = self.model
        if missing is not None:
            if not isinstance(missing, Tensor) or missing.dtype != torch.bool:
                raise TypeError(f"missing must be a bool tensor (True where v is unknown), got {missing!r}")
            if isinstance(v, Tensor):
                if missing.shape != v.shape:
                    raise ValueError(
                        f"missing must have the shape of v, {tuple(v.shape)}, got {tuple(missing.shape)}"
                    )
                # Unknown values may be anything, NaN included: each layer's mean under zero input
                # stands in for them until inferred (it is a valid value of every unit type).
                fill = torch.cat(
                    [resting_mean(model.layers[i], 1, model.dtype) for i in model.observed], dim=1
                )
                v = torch.where(missing, fill.to(v.dtype) if v.is_floating_point() else fill, v)
        v = model.checked("v", v)
        clamped, observed = model.clamped(v), {}
        if missing is not None:
            if missing.shape != v.shape:
                raise ValueError(
                    f"missing must have the shape of v joined over the observed layers, {tuple(v.shape)}, "
                    f"got {tuple(missing.shape)}"
                )
            for i, unknown in model.clamped(missing).items():
                if bool(unknown.any()):  # a layer with unknown units is inferred, its known ones kept
                    observed[i] = (~unknown, clamped.pop(i))
        if clamp is not None:
            if not isinstance(clamp, Mapping):
                raise TypeError(
                    f"clamp must be a dict {{layer index: (B, n_i) tensor}}, got {type(clamp).__name__}"
                )
            for i, x in clamp.items():
                i = check_index("clamp layer", i, len(model.layers))
                if i in model.observed:
                    raise ValueError(f"clamp must not contain layer {i}: it is observed (given by v)")
                clamped[i] = model.checked(f"clamp[{i}]", x, i, batch=v.shape[0])
        free = [i for i in range(len(model.layers)) if i not in clamped]
        return _Problem(model, clamped, free, v.shape[0], observed)

    def extra_repr(self) -> str:
        damping = f", damping={self.damping}" if self.update == "parallel" else ""
        return (
            f"update={self.update!r}{damping}, tol={self.tol:g}, max_iter={self.max_iter}, "
            f"backward={self.backward!r}, init={self.init!r}"
        )


@dataclass
class _Problem:
    """One call's inputs: clamped layers, free layers, partly observed layers, and (once reduced)
    the constant input the clamped layers send to the free ones."""

    model: EnergyModel
    clamped: Marginals
    free: list[int]
    batch: int
    observed: dict[int, tuple[Tensor, Tensor]] = field(
        default_factory=dict
    )  # (mask, values) where some are missing
    extra: Marginals = field(default_factory=dict)  # input from the clamped layers, once reduced
    skip: tuple[int, ...] = ()  # the layers whose input is in ``extra``
    parameters: dict[str, Tensor] = field(default_factory=dict)  # substituted (detached) parameters

    def requires_grad(self) -> bool:
        tensors = [*self.model.parameters(), *self.clamped.values()]
        tensors.extend(values for _, values in self.observed.values())
        return any(x.requires_grad for x in tensors)

    def classes(self, schedule: UpdateSchedule) -> list[tuple[int, ...]]:
        """The schedule's colour classes restricted to the free layers, empty ones dropped."""
        classes = [tuple(i for i in c if i in self.free) for c in schedule.classes]
        return [c for c in classes if c]

    def observed_units(self, layer: int) -> tuple[Tensor, Tensor] | None:
        return self.observed.get(layer)

    def reduced(self) -> _Problem:
        """The same problem with what the clamped layers send computed once.

        It does not change while the iteration runs: each free layer gets a ``(B, n_i)`` extra input
        from its clamped neighbours, and the iteration recomputes only what free layers send.
        """
        model, skip = self.model, tuple(self.clamped)
        extra = {}
        with substituted(model, self.parameters):
            for i in self.free:
                free_layers = [j for j in range(len(model.layers)) if j not in self.clamped]
                input = model.layer_input(self.clamped, i, lateral=False, skip=free_layers)
                if input is not None:
                    extra[i] = input.expand(self.batch, -1)
        return replace(self, extra=extra, skip=skip)

    def detached(self) -> _Problem:
        """The same problem with every tensor detached (for the adjoint iteration's graph)."""
        observed = {i: (mask, values.detach()) for i, (mask, values) in self.observed.items()}
        return replace(
            self,
            clamped={i: x.detach() for i, x in self.clamped.items()},
            extra={i: x.detach() for i, x in self.extra.items()},
            parameters={name: p.detach() for name, p in self.model.named_parameters()},
            observed=observed,
        )


def _mean(layer: UnitLayer, input: Tensor) -> Tensor:
    return layer.mean(input)


def _max_change(new: Marginals, old: Marginals) -> float:
    """``max |new - old|`` over the layers of ``new``, the batch and the units (0 when empty)."""
    return max((float((new[i] - old[i]).detach().abs().max()) for i in new), default=0.0)
