"""Fast weights for persistent chains: a quickly decaying addition to the parameters, used only by
the fantasy particles, that pushes them out of the modes they have just visited."""

from __future__ import annotations

import torch
from torch import Tensor

from .._checks import check_real
from ..model.energy_model import EnergyModel
from ..model.statistics import Statistics
from .gibbs import PersistentSampler

__all__ = ["FastWeightsSampler"]


class FastWeightsSampler(PersistentSampler):
    """Persistent chains that sample with the model's parameters plus fast weights ("Using Fast
    Weights to Improve Persistent Contrastive Divergence", ICML 2009).

    In that paper the fast weights take the same steps as the ordinary ("slow") ones and decay
    towards zero, so they hold the last few steps' worth of change. Here they follow the update
    the optimizer actually applied, whatever the optimizer: every call of :meth:`statistics`
    (once per training step) first takes the change of every bias and weight since the previous
    call, ``delta``, and sets ``fast <- fast_decay * fast + fast_scale * delta``. Under SGD that
    is the paper's rule; under Adam the fast weights move by Adam's steps, not by the raw
    gradient. Any change of the parameters between two calls counts as a step, so after editing
    the weights by hand call :meth:`reset_fast_weights`.

    Only the particles see the fast weights; the model, its statistics and every evaluation use
    the ordinary parameters. The chains therefore do not sample the model exactly while the fast
    weights are non-zero: they are a mixing aid for training, not a sampler for evaluation (use
    :class:`PersistentSampler` for that). ``forward`` and ``sample`` leave the fast weights as
    they are.

    Args:
        model, num_particles, sweeps, generator, init, probabilities: as in :class:`PersistentSampler`.
        fast_scale: the fast step as a multiple of the applied step (1: the same size, as in the paper).
        fast_decay: factor in [0, 1) applied to the fast weights at every step (0.95 in the paper).

    Attributes:
        fast_bias_<i>: buffer ``(n_i,)``; fast_weight_<k>: buffer, the shape of coupling ``k``'s weight.
        last_bias_<i>, last_weight_<k>: buffers, the parameters at the previous call.
        following: 0-d bool buffer, whether ``last_*`` hold the parameters of a previous call.
    """

    def __init__(
        self,
        model: EnergyModel,
        num_particles: int = 100,
        sweeps: int = 1,
        generator: torch.Generator | None = None,
        init: str | Tensor = "uniform",
        probabilities: bool = False,
        *,
        fast_scale: float = 1.0,
        fast_decay: float = 0.95,
    ) -> None:
        super().__init__(model, num_particles, sweeps, generator, init, probabilities)
        fast_scale = check_real("fast_scale", fast_scale)
        if not 0.0 <= fast_scale < float("inf"):
            raise ValueError(f"fast_scale must be >= 0 and finite, got {fast_scale}")
        fast_decay = check_real("fast_decay", fast_decay)
        if not 0.0 <= fast_decay < 1.0:
            raise ValueError(f"fast_decay must lie in [0, 1), got {fast_decay}")
        self.fast_scale, self.fast_decay = fast_scale, fast_decay
        for kind, parameters in (("bias", model.biases()), ("weight", model.weights())):
            for i, parameter in enumerate(parameters):
                self.register_buffer(f"fast_{kind}_{i}", torch.zeros_like(parameter.detach()))
                self.register_buffer(f"last_{kind}_{i}", torch.zeros_like(parameter.detach()))
        self.register_buffer("following", torch.tensor(False))

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
    def statistics(self) -> Statistics:
        """Move the fast weights by the parameters' change since the last call, then advance the
        chains by ``sweeps`` sweeps and return their :class:`Statistics` (detached)."""
        named = [(f"bias_{i}", b) for i, b in enumerate(self.model.biases())]
        named += [(f"weight_{k}", w) for k, w in enumerate(self.model.weights())]
        following = bool(self.following)
        for name, parameter in named:
            fast, last = getattr(self, f"fast_{name}"), getattr(self, f"last_{name}")
            if following:
                fast.mul_(self.fast_decay).add_(parameter - last, alpha=self.fast_scale)
            last.copy_(parameter)
        self.following.fill_(True)
        return super().statistics()

    @torch.no_grad()
    def reset_fast_weights(self) -> None:
        """Set the fast weights to zero and forget the last parameters (the next call takes no step)."""
        for fast in self.fast_biases + self.fast_weights:
            fast.zero_()
        self.following.fill_(False)

    def extra_repr(self) -> str:
        return f"{super().extra_repr()}, fast_scale={self.fast_scale}, fast_decay={self.fast_decay}"
