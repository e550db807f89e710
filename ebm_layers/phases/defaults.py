"""The phases an objective uses when none is given."""

from __future__ import annotations

from ..model.energy_model import EnergyModel
from .gibbs import PersistentSampler
from .mean_field import MeanField

__all__ = ["default_negative", "default_positive"]


def default_positive(model: EnergyModel) -> MeanField:
    """Mean field: the data statistics of deep models, exact for an RBM."""
    return MeanField(model)


def default_negative(model: EnergyModel) -> PersistentSampler:
    """100 persistent chains, one sweep per update."""
    return PersistentSampler(model)
