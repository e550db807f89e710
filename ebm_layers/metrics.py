"""Model metrics: how well a model explains data."""

from __future__ import annotations

import torch
from torch import Tensor

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
    free_energy = model.free_energy(v, dtype=torch.float64)
    return -free_energy - exact_log_partition(model, max_states=max_states)
