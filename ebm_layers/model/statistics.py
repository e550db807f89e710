"""Statistics: what the positive and negative phases hand to the objective."""

from __future__ import annotations

from torch import Tensor

__all__ = ["Statistics"]


class Statistics(dict[str, Tensor]):
    """One tensor per model parameter, keyed by its name in ``model.named_parameters()``: the
    average of ``-dE/dtheta`` over a phase's states (or marginals, or enumeration), shaped like
    the parameter. A binary layer's bias gets the mean state, a dense weight the average
    ``x_a^T x_b``. Built by ``model.statistics(states, weights)``; arithmetic is per key.

    Examples::

        >>> import torch, ebm_layers as el
        >>> model = el.rbm(3, 2)
        >>> stats = model.statistics([torch.ones(4, 3), torch.zeros(4, 2)])
        >>> sorted(stats), stats["layers.0.bias"]
        (['couplings.0.weight', 'layers.0.bias', 'layers.1.bias'], tensor([1., 1., 1.]))
    """

    def __sub__(self, other: Statistics) -> Statistics:
        return Statistics({name: value - other[name] for name, value in self.items()})

    def of_module(self, prefix: str) -> dict[str, Tensor]:
        """The entries of one module, such as ``"layers.1"`` or ``"couplings.0"``, without the prefix."""
        start = prefix + "."
        return {name[len(start) :]: value for name, value in self.items() if name.startswith(start)}
