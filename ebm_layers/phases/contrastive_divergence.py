"""Contrastive divergence: a negative phase whose chains restart at the batch every update."""

from __future__ import annotations

import torch
from torch import Tensor, nn

from .._checks import check_model, check_size
from .._random import resolve_generator, track_generator_state
from ..model.energy_model import EnergyModel
from ..model.statistics import Statistics
from .gibbs import gibbs_sweep

__all__ = ["ContrastiveDivergence"]


class ContrastiveDivergence(nn.Module):
    """Model statistics from ``steps`` Gibbs sweeps started at the data, CD-k ("Training Products
    of Experts by Minimizing Contrastive Divergence", Neural Computation, 2002).

    Every call starts new chains at the batch: the visible layer is set to ``v``, the other layers
    are drawn given it (one sweep with the visible layer clamped), then ``steps`` full sweeps run.
    The chains are short, so the statistics are biased towards the data; persistent chains
    (:class:`PersistentSampler`) remove that bias at the price of mixing. Nothing persists between
    calls but the generator.

    Args:
        model: the :class:`EnergyModel`; registered as a submodule.
        steps: full sweeps after the start (``k``; 1 is CD-1).
        generator: the ``torch.Generator`` of every draw (``None``: a private one seeded from the
            global RNG); its state is saved in ``state_dict()``.
        probabilities: use the conditional means of the last sweep's last colour class instead of
            its binary states (lower variance, the same expectation given the rest).

    Shape:
        - ``statistics(v)``: ``v`` ``(B, n_0)``; returns :class:`Statistics` (detached).

    Examples::

        >>> import ebm_layers as el
        >>> g = torch.Generator().manual_seed(0)
        >>> model = el.rbm(6, 3, generator=g)
        >>> cd = el.ContrastiveDivergence(model, steps=1, generator=g)
        >>> objective = el.TwoPhaseObjective(model, el.MeanField(model), cd)
        >>> objective(torch.ones(4, 6)).shape
        torch.Size([])
    """

    generator_state: Tensor

    def __init__(
        self,
        model: EnergyModel,
        steps: int = 1,
        generator: torch.Generator | None = None,
        probabilities: bool = False,
    ) -> None:
        super().__init__()
        check_model(model)
        self.steps = check_size("steps", steps)
        if not isinstance(probabilities, bool):
            raise TypeError(f"probabilities must be a bool, got {probabilities!r}")
        self.model = model
        self.generator = resolve_generator(generator)
        self.probabilities = probabilities
        track_generator_state(self)

    @torch.no_grad()
    def statistics(self, v: Tensor, **kwargs) -> Statistics:
        """Run ``steps`` sweeps from the batch ``v`` ``(B, n_0)``; the final states' Statistics."""
        model = self.model
        v = model.checked("v", v)
        given = model.clamped(v)
        states = [
            given[i] if i in given else layer.initial_states(v.shape[0], self.generator)
            for i, layer in enumerate(model.layers)
        ]
        gibbs_sweep(model, states, self.generator, clamped=given.keys())
        probabilities: dict[int, Tensor] = {}
        for step in range(self.steps):
            last = self.probabilities and step == self.steps - 1
            probabilities = gibbs_sweep(model, states, self.generator, keep_probabilities=last)
        return model.statistics([probabilities.get(i, x) for i, x in enumerate(states)], means=probabilities)

    def extra_repr(self) -> str:
        return f"steps={self.steps}, probabilities={self.probabilities}"
