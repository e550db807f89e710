"""Partition functions: exact enumeration for small models."""

from __future__ import annotations

import torch
from torch import Tensor
from torch.autograd.function import once_differentiable

from .enumeration import MAX_STATES, exact_moments
from .model import EnergyModel

__all__ = ["exact_log_partition"]


class _ExactLogPartition(torch.autograd.Function):
    """``log Z`` with the gradient d log Z / d theta = <-dE/d theta>_model, from one enumeration.

    The backward reuses the exact statistics gathered in the forward pass instead of keeping
    every chunk's graph, so memory stays bounded however many states are enumerated.
    """

    @staticmethod
    def forward(ctx, model: EnergyModel, max_states: int, *parameters: Tensor) -> Tensor:
        log_z, ctx.stats = exact_moments(model, max_states=max_states)
        ctx.edges, ctx.dtypes = model.edges, [p.dtype for p in parameters]
        return log_z

    @staticmethod
    @once_differentiable
    def backward(ctx, grad: Tensor):
        stats = ctx.stats
        # -E contains b.x, x_a W x_b^T, and 1/2 x L x^T for a lateral L (taken entrywise).
        pair_grads = [p * 0.5 if a == b else p for p, (a, b) in zip(stats.pairs, ctx.edges)]
        grads = [grad * g for g in stats.means + pair_grads]
        return (None, None, *(g.to(dtype) for g, dtype in zip(grads, ctx.dtypes)))


def exact_log_partition(model: EnergyModel, *, max_states: int = MAX_STATES) -> Tensor:
    """Exact ``log Z = log sum_x exp(-E(x))`` by enumeration: a float64 0-d tensor.

    Differentiable with respect to every parameter (its gradient is the exact model statistics).
    Enumerates the smallest set of layers touching every coupling and sums the others out in
    closed form, in chunks; raises ``ValueError`` with the state count when that set has more
    than ``max_states`` states.

    Examples::

        >>> import ebm_layers as el
        >>> model = el.rbm(4, 2)
        >>> with torch.no_grad():
        ...     _ = model.couplings[0].weight.zero_()
        >>> round(el.exact_log_partition(model).item(), 4)  # 6 free units: 6 log 2
        4.1589
    """
    if not isinstance(model, EnergyModel):
        raise TypeError(f"model must be an EnergyModel, got {type(model).__name__}")
    parameters = [*model.biases(), *model.weights()]
    if torch.is_grad_enabled() and any(p.requires_grad for p in parameters):
        return _ExactLogPartition.apply(model, max_states, *parameters)
    return exact_moments(model, statistics=False, max_states=max_states)[0]
