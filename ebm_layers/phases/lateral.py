"""Gibbs updates of binary layers with a lateral coupling at the cost of their products.

A layer with a :class:`~ebm_layers.model.couplings.LateralCoupling` is drawn one class of mutually
uncoupled units at a time (one unit at a time without a mask). The generic update
(:meth:`EnergyModel.update_layer`) works for any unit type and coupling but computes every class's
conditional on all ``n`` units; here, for units with ``logits`` (binary units) and the built-in
lateral coupling, a class costs only its own products:

- each class's lateral input comes from the current states by one product with its rows of the
  weight: a matrix-vector product for a single unit, a gathered product over the neighbours when
  the mask is sparse (a lattice), a dense one otherwise;
- the uniforms of the whole layer are drawn in one block, and the exactness correction of
  :func:`~ebm_layers.model.functional.sample_bernoulli` (the rare uniform in the grid cell of its
  probability) is checked once per layer instead of once per class: if any draw fell in a cell,
  the layer is drawn again from the same uniforms with the correction on every class, which
  repeats the first pass up to that draw, so the states are exactly those of the exact draw.

States are kept transposed, ``(n, B)``, so a unit's chains are one contiguous row.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import Tensor

from ..model import functional as F
from ..model.couplings import LateralCoupling
from ..model.energy_model import EnergyModel
from ..model.units import has_logits

__all__ = ["can_sample_fast", "sample_lateral_layer"]

# A class takes the gathered product when its units have at most n / GATHER_RATIO neighbours each: a
# gathered multiply-add cost 13-16 times a dense one here (B = 100, n = 1,024 and 4,096, one
# thread), in chunks of at most GATHER_CHUNK gathered numbers (larger ones left the cache: 25-100x).
GATHER_RATIO = 16
GATHER_CHUNK = 1 << 20


@dataclass(frozen=True)
class _Class:
    """One class of mutually uncoupled units: ``units`` (k,), or ``unit`` alone; ``neighbours``
    ``(k, m)`` their coupled units padded with the unit itself (its weight is zero), when gathered."""

    units: Tensor
    unit: int | None
    neighbours: Tensor | None


def _plan(coupling: LateralCoupling) -> list[_Class]:
    """The classes of ``coupling``'s units and how each gets its lateral input (cached on the
    coupling until its mask changes)."""
    mask = coupling.mask
    version = None if mask is None else mask._version
    cached = getattr(coupling, "_sampling_plan", None)
    if cached is not None and cached[0] == version:
        return cached[1]
    n = coupling.weight.shape[0]
    plan = []
    for units in coupling.unit_classes():
        neighbours = None
        if mask is not None and len(units) > 1:
            rows = mask[units]
            counts = rows.sum(1, keepdim=True)
            degree = int(counts.max())
            if degree * GATHER_RATIO <= n:
                # The neighbours of each unit first, then the unit itself as padding (zero weight).
                order = torch.sort(rows.to(torch.int8), dim=1, descending=True, stable=True).indices
                padded = torch.where(torch.arange(n) < counts, order, units[:, None])
                neighbours = padded[:, : max(degree, 1)].contiguous()
        plan.append(_Class(units, int(units[0]) if len(units) == 1 else None, neighbours))
    coupling._sampling_plan = (version, plan)
    return plan


def can_sample_fast(model: EnergyModel, target: int) -> bool:
    """Whether :func:`sample_lateral_layer` can draw layer ``target``: units with ``logits``, the
    built-in lateral coupling with one ``(n, n)`` matrix, float32 or float64. Other layers with a
    lateral coupling take the generic :meth:`EnergyModel.update_layer`."""
    layer, lateral = model.layers[target], model.lateral_coupling(target)
    return (
        has_logits(layer)
        and isinstance(lateral, LateralCoupling)
        and lateral.free_weight().ndim == 2
        and model.dtype in (torch.float32, torch.float64)
    )


@torch.no_grad()
def sample_lateral_layer(
    model: EnergyModel,
    states: list[Tensor],
    target: int,
    source: torch.Generator | F.Uniforms,
    scale: float | Tensor | None = None,
) -> Tensor:
    """A Gibbs draw ``(B, n)`` of layer ``target`` given ``states``, class by class, for a layer
    :func:`can_sample_fast` accepts; ``scale`` multiplies what the couplings send (an inverse
    temperature)."""
    layer, lateral = model.layers[target], model.lateral_coupling(target)
    current = states[target]
    batch, n = current.shape
    base = model.layer_input(states, target, lateral=False, scale=scale)
    logits = layer.logits(torch.zeros_like(current) if base is None else base)
    offset = logits.expand(batch, n).mT.contiguous()  # (n, B): the input from outside the layer
    generator = source.generator if isinstance(source, F.Uniforms) else source
    if isinstance(source, F.Uniforms) and source.dtype == current.dtype:
        uniform = source.take((n, batch))
    else:
        uniform = F.draw_uniforms((n, batch), current.dtype, generator)
    plan = _plan(lateral)
    per_chain = scale.to(current.dtype) if isinstance(scale, Tensor) else None
    factor = 1.0 if scale is None or per_chain is not None else float(scale)
    gathered = [
        None if c.neighbours is None else lateral.entries(c.units[:, None], c.neighbours) for c in plan
    ]
    # The whole (n, n) weight only when some class takes a dense product.
    weight = None if all(w is not None for w in gathered) else lateral.weight
    grid = F.UNIFORM_GRID[current.dtype]
    args = (weight, plan, gathered, offset, uniform, factor, per_chain, grid)
    drawn, differences = _draw_classes(current.mT.contiguous(), *args, generator=None)
    if bool(((differences > 0) & (differences < grid)).any()):
        drawn, _ = _draw_classes(current.mT.contiguous(), *args, generator=generator)
    return drawn.mT.contiguous()


def _draw_classes(
    states: Tensor,
    weight: Tensor | None,
    plan: list[_Class],
    gathered: list[Tensor | None],
    offset: Tensor,
    uniform: Tensor,
    factor: float,
    per_chain: Tensor | None,
    grid: float,
    *,
    generator: torch.Generator | None,
) -> tuple[Tensor, Tensor]:
    """Draw ``states`` ``(n, B)`` in place class by class; returns them and the differences
    ``p - u`` ``(n, B)`` of every draw. With ``generator`` every class gets the exact correction of
    the grid cell; without, none (the caller checks the differences)."""
    differences = torch.empty_like(uniform)
    field = uniform.new_empty(uniform.shape[1])  # one unit's chains, reused: no allocation per unit
    for c, weights in zip(plan, gathered):
        if c.unit is not None:
            j = c.unit
            if per_chain is None:
                torch.addmv(offset[j], states.mT, weight[j], alpha=factor, out=field)
            else:
                torch.addcmul(offset[j], torch.mv(states.mT, weight[j], out=field), per_chain, out=field)
            probability = field.sigmoid_()
            difference = torch.sub(probability, uniform[j], out=differences[j])
            if generator is None:
                torch.ge(difference, grid, out=states[j])
            else:
                states[j] = F.bernoulli_from_uniforms(probability, uniform[j].clone(), generator)
            continue
        lateral = weight[c.units] @ states if weights is None else _gathered(states, c.neighbours, weights)
        if per_chain is None:
            probability = torch.add(offset[c.units], lateral, alpha=factor).sigmoid_()
        else:
            probability = torch.addcmul(offset[c.units], lateral, per_chain).sigmoid_()
        u = uniform[c.units]  # a copy: the exact draw may overwrite it
        difference = probability - u
        differences[c.units] = difference
        if generator is None:
            new = torch.ge(difference, grid).to(states.dtype)
        else:
            new = F.bernoulli_from_uniforms(probability, u, generator)
        states.index_copy_(0, c.units, new)
    return states, differences


def _gathered(states: Tensor, neighbours: Tensor, weights: Tensor) -> Tensor:
    """``sum_m weights[i, m] * states[neighbours[i, m]]`` ``(k, B)`` for ``neighbours`` and ``weights``
    ``(k, m)`` and ``states`` ``(n, B)``, gathered in chunks of units."""
    k, m = neighbours.shape
    out = states.new_empty(k, states.shape[1])
    rows = max(1, GATHER_CHUNK // (m * states.shape[1]))
    for start in range(0, k, rows):
        near = states.index_select(0, neighbours[start : start + rows].flatten()).view(-1, m, states.shape[1])
        torch.bmm(
            weights[start : start + rows].unsqueeze(1), near, out=out[start : start + rows].unsqueeze(1)
        )
    return out
