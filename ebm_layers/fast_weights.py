"""Fast weights for persistent chains: a quickly decaying addition to the parameters, used only by
the fantasy particles, that pushes them out of the modes they have just visited."""

from __future__ import annotations

import torch
from torch import Tensor

from ._checks import check_real
from .model import EnergyModel
from .sampling import PersistentSampler
from .statistics import Statistics

__all__ = ["FastWeightsSampler"]


class FastWeightsSampler(PersistentSampler):
    """Persistent chains that sample with the model's parameters plus fast weights ("Using Fast
    Weights to Improve Persistent Contrastive Divergence", ICML 2009).

    The fast weights start at zero and, after every accepted training step of the
    :class:`~ebm_layers.objective.TwoPhaseObjective` that uses this sampler, move by their own
    plain SGD step on the raw statistics gradient and decay:
    ``fast <- fast_decay * fast + fast_learning_rate * (data statistics - model statistics)``,
    independent of the optimizer of the ordinary parameters. Only the particles see them; the
    model, its statistics and every evaluation use the ordinary parameters. The chains therefore
    do not sample the model exactly while the fast weights are non-zero: they are a mixing aid
    for training, not a sampler for evaluation (use :class:`PersistentSampler` for that).

    Args:
        model, num_particles, sweeps, generator, init, probabilities: as in :class:`PersistentSampler`.
        fast_learning_rate: step of the fast weights (the paper used about the ordinary one's scale).
        fast_decay: factor in [0, 1) applied to the fast weights at every update (0.95 in the paper).

    Attributes:
        fast_bias_<i>: buffer ``(n_i,)``; fast_weight_<k>: buffer, the shape of coupling ``k``'s weight.
    """

    def __init__(
        self, model: EnergyModel, *args, fast_learning_rate: float = 0.01, fast_decay: float = 0.95, **kwargs
    ) -> None:
        super().__init__(model, *args, **kwargs)  # num_particles, sweeps, generator, init, probabilities
        fast_learning_rate = check_real("fast_learning_rate", fast_learning_rate)
        if not 0.0 <= fast_learning_rate < float("inf"):
            raise ValueError(f"fast_learning_rate must be >= 0 and finite, got {fast_learning_rate}")
        fast_decay = check_real("fast_decay", fast_decay)
        if not 0.0 <= fast_decay < 1.0:
            raise ValueError(f"fast_decay must lie in [0, 1), got {fast_decay}")
        self.fast_learning_rate, self.fast_decay = fast_learning_rate, fast_decay
        for i, bias in enumerate(model.biases()):
            self.register_buffer(f"fast_bias_{i}", torch.zeros_like(bias.detach()))
        for k, weight in enumerate(model.weights()):
            self.register_buffer(f"fast_weight_{k}", torch.zeros_like(weight.detach()))

    @property
    def fast_biases(self) -> list[Tensor]:
        return [getattr(self, f"fast_bias_{i}") for i in range(len(self.model.layers))]

    @property
    def fast_weights(self) -> list[Tensor]:
        return [getattr(self, f"fast_weight_{k}") for k in range(len(self.model.couplings))]

    def _sweep_parameters(self) -> dict[str, list[Tensor]]:
        return {
            "biases": [b + f for b, f in zip(self.model.biases(), self.fast_biases)],
            "weights": [w + f for w, f in zip(self.model.weights(), self.fast_weights)],
        }

    @torch.no_grad()
    def learn(self, difference: Statistics) -> None:
        """One update of the fast weights from the step's data minus model statistics (called by
        the objective once the step is accepted)."""
        for fast, step in zip(self.fast_biases, difference.means):
            fast.mul_(self.fast_decay).add_(step, alpha=self.fast_learning_rate)
        for fast, step, (a, b) in zip(self.fast_weights, difference.pairs, self.model.edges):
            if a == b:  # a lateral weight stays symmetric with a zero diagonal
                step = step - torch.diag(step.diagonal())
            fast.mul_(self.fast_decay).add_(step, alpha=self.fast_learning_rate)

    def extra_repr(self) -> str:
        fast = f"fast_learning_rate={self.fast_learning_rate}, fast_decay={self.fast_decay}"
        return f"{super().extra_repr()}, {fast}"
