"""Exact sums over every state of a small model: log partition function and exact statistics.

Only the smallest set of layers that touches every coupling is enumerated (see
``graph.smallest_cover``); the other layers are independent given it and summed out in closed
form. States are visited in chunks with a running log-sum-exp, so memory stays bounded
whatever the number of states.
"""

from __future__ import annotations

import math

import torch
from torch import Tensor, nn

from .._checks import check_model, check_size
from ..model import functional as F
from ..model.energy_model import EnergyModel
from ..model.graph import smallest_cover
from ..model.statistics import Statistics

__all__ = ["MAX_STATES", "ExactStatistics", "enumeration_cover", "exact_moments"]

MAX_STATES = 2**25
# Elements of one chunk's joint states; bounds the memory of an enumeration (float64: 8 MiB).
_CHUNK_ELEMENTS = 2**20


def enumeration_cover(model: EnergyModel, max_states: int = MAX_STATES) -> tuple[int, ...]:
    """The layers an exact sum enumerates; ``ValueError`` when their states exceed ``max_states``."""
    check_size("max_states", max_states)
    cover = smallest_cover(model.sizes, model.edges)
    bits = sum(model.sizes[i] for i in cover)
    if 2**bits > max_states:
        raise ValueError(
            f"exact enumeration of this model needs 2^{bits} = {2**bits:,} states of layers "
            f"{list(cover)} (sizes {[model.sizes[i] for i in cover]}), more than max_states="
            f"{max_states:,}; estimate log Z with annealed importance sampling instead"
        )
    return cover


def binary_codes(start: int, stop: int, bits: int, dtype: torch.dtype = torch.float64, device=None) -> Tensor:
    """Rows ``start..stop`` of the list of every binary vector of ``bits`` units ``(stop - start, bits)``:
    row ``r`` holds the bits of ``r``, unit 0 the lowest."""
    codes = torch.arange(start, stop, device=device)
    return ((codes[:, None] >> torch.arange(bits, device=device)) & 1).to(dtype)


@torch.no_grad()
def exact_moments(
    model: EnergyModel, *, statistics: bool = True, max_states: int = MAX_STATES
) -> tuple[Tensor, Statistics | None]:
    """Exact ``log Z`` (0-d) and, if ``statistics``, the exact model :class:`Statistics`.

    Computed in float64 from detached parameters; the result is float64 and detached.
    """
    cover = enumeration_cover(model, max_states)
    biases = [b.detach().to(torch.float64) for b in model.biases()]
    weights = [w.detach().to(torch.float64) for w in model.weights()]
    device = biases[0].device
    cover_sizes = [model.sizes[i] for i in cover]
    summed_out = [i for i in range(len(biases)) if i not in cover]
    bits, total = sum(cover_sizes), 2 ** sum(cover_sizes)
    rows = max(1, min(total, _CHUNK_ELEMENTS // sum(model.sizes)))

    log_scale = torch.tensor(-math.inf, dtype=torch.float64, device=device)
    weight_sum = torch.zeros((), dtype=torch.float64, device=device)
    means = [torch.zeros_like(b) for b in biases]
    pairs = [torch.zeros_like(w) for w in weights]
    for start in range(0, total, rows):
        cover_bits = binary_codes(start, min(start + rows, total), bits, device=device)
        given = dict(zip(cover, cover_bits.split(cover_sizes, dim=1)))
        summed_logits = {k: F.layer_logits(given, k, biases, weights, model.edges) for k in summed_out}
        log_weights = -F.marginal_free_energy(given, biases, weights, model.edges, summed_logits)
        # Running log-sum-exp: accumulators hold sums scaled by exp(-log_scale).
        new_scale = torch.maximum(log_scale, log_weights.max())
        rescale = torch.exp(log_scale - new_scale)
        chunk_weights = torch.exp(log_weights - new_scale)
        weight_sum = weight_sum * rescale + chunk_weights.sum()
        if statistics:
            # Summed-out layers enter through their exact conditional means given the cover.
            full = [given[i] if i in given else torch.sigmoid(summed_logits[i]) for i in range(len(biases))]
            chunk = Statistics.from_states(full, model.edges, chunk_weights)
            means = [m * rescale + c for m, c in zip(means, chunk.means)]
            pairs = [p * rescale + c for p, c in zip(pairs, chunk.pairs)]
        log_scale = new_scale
    log_z = log_scale + torch.log(weight_sum)
    if not statistics:
        return log_z, None
    return log_z, Statistics([m / weight_sum for m in means], [p / weight_sum for p in pairs])


class ExactStatistics(nn.Module):
    """The exact negative phase of a small model: :class:`Statistics` under the model by enumeration.

    The same interface as a sampler's ``statistics()``; for tests and for models whose
    enumerated layers have at most ``log2(max_states)`` units in total.

    Args:
        model: the :class:`EnergyModel`.
        max_states: refuse (``ValueError``) to enumerate more states than this.

    Shape:
        - ``statistics()``: ``means[i]`` ``(n_i,)``, ``pairs[k]`` ``(n_a, n_b)``, in the model's
          dtype, computed in float64, detached.

    Examples::

        >>> import ebm_layers as el
        >>> stats = el.ExactStatistics(el.rbm(6, 3)).statistics()
        >>> stats.pairs[0].shape
        torch.Size([6, 3])
    """

    def __init__(self, model: EnergyModel, *, max_states: int = MAX_STATES) -> None:
        super().__init__()
        check_model(model)
        enumeration_cover(model, max_states)  # refuse now rather than at the first statistics()
        self.model = model
        self.max_states = max_states

    def statistics(self) -> Statistics:
        _, stats = exact_moments(self.model, max_states=self.max_states)
        dtype = self.model.dtype
        return Statistics([m.to(dtype) for m in stats.means], [p.to(dtype) for p in stats.pairs])

    def forward(self) -> Statistics:
        return self.statistics()

    def extra_repr(self) -> str:
        return f"max_states={self.max_states:,}"
