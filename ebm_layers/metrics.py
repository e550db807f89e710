"""Model metrics: how well a model explains data."""

from __future__ import annotations

import torch
from torch import Tensor

from . import functional as F
from ._checks import check_batch
from .enumeration import MAX_STATES
from .model import EnergyModel
from .partition import exact_log_partition

__all__ = ["exact_log_likelihood"]


def exact_log_likelihood(model: EnergyModel, v: Tensor, *, max_states: int = MAX_STATES) -> Tensor:
    """Exact ``log p(v) = -F(v) - log Z`` per example, float64 ``(B,)``, differentiable.

    For models with a closed-form free energy (no two non-visible units coupled) whose
    partition function can be enumerated; ``ValueError`` otherwise.
    """
    if not isinstance(model, EnergyModel):
        raise TypeError(f"model must be an EnergyModel, got {type(model).__name__}")
    model.check_summable([0])
    check_batch("v", v, model.sizes[0], dtype=model.dtype)
    biases = [b.to(torch.float64) for b in model.biases()]
    weights = [w.to(torch.float64) for w in model.weights()]
    free_energy = F.marginal_free_energy({0: v.to(torch.float64)}, biases, weights, model.edges)
    return -free_energy - exact_log_partition(model, max_states=max_states)
