"""Exact sums over every state of a small model: log partition function and exact statistics.

Only the smallest set of layers that touches every coupling is enumerated (see
``graph.smallest_cover``); the other layers are independent given it and summed out in closed
form. States are visited in chunks with a running log-sum-exp, so memory stays bounded
whatever the number of states.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import torch
from torch import Tensor, nn

from .._checks import check_model, check_size
from ..model.energy_model import EnergyModel
from ..model.graph import smallest_cover
from ..model.parameters import substituted
from ..model.statistics import Statistics

__all__ = ["MAX_STATES", "ExactStatistics", "enumeration_cover", "exact_moments"]

MAX_STATES = 2**25
# Elements of one chunk's joint states; bounds the memory of an enumeration (float64: 8 MiB).
_CHUNK_ELEMENTS = 2**20


def enumeration_cover(model: EnergyModel, max_states: int = MAX_STATES) -> tuple[int, ...]:
    """The layers an exact sum enumerates; ``ValueError`` when their states exceed ``max_states``
    or a coupling joins two layers that cannot be enumerated (no ``num_states``)."""
    check_size("max_states", max_states)
    bits = [
        math.log2(layer.num_states) if hasattr(layer, "num_states") else math.inf for layer in model.layers
    ]
    cover = smallest_cover(bits, model.edges)
    if math.isinf(sum(bits[i] for i in cover)):
        missing = [i for i in cover if math.isinf(bits[i])]
        raise ValueError(
            f"exact enumeration needs the states of layers {missing}, whose unit types do not list "
            "them (no num_states); estimate log Z with annealed importance sampling instead"
        )
    total = math.prod(model.layers[i].num_states for i in cover)
    if total > max_states:
        width = round(sum(bits[i] for i in cover))
        raise ValueError(
            f"exact enumeration of this model needs 2^{width} = {total:,} states of layers "
            f"{list(cover)} (sizes {[model.sizes[i] for i in cover]}), more than max_states="
            f"{max_states:,}; estimate log Z with annealed importance sampling instead"
        )
    return cover


def binary_codes(start: int, stop: int, bits: int, dtype: torch.dtype = torch.float64, device=None) -> Tensor:
    """Rows ``start..stop`` of the list of every binary vector of ``bits`` units ``(stop - start, bits)``:
    row ``r`` holds the bits of ``r``, unit 0 the lowest."""
    codes = torch.arange(start, stop, device=device)
    return ((codes[:, None] >> torch.arange(bits, device=device)) & 1).to(dtype)


def joint_states(model: EnergyModel, layers: Sequence[int], start: int, stop: int) -> dict[int, Tensor]:
    """Rows ``start..stop`` of every joint state of ``layers``, one ``(rows, n_i)`` tensor each,
    from the layers' own ``states`` lists; the first layer varies fastest."""
    rows = torch.arange(start, stop)
    out, stride = {}, 1
    for i in layers:
        count = model.layers[i].num_states
        index = (rows // stride) % count
        low, high = int(index.min()), int(index.max())
        out[i] = model.layers[i].states(low, high + 1)[index - low]
        stride *= count
    return out


@torch.no_grad()
def exact_moments(
    model: EnergyModel, *, statistics: bool = True, max_states: int = MAX_STATES
) -> tuple[Tensor, Statistics | None]:
    """Exact ``log Z`` (0-d) and, if ``statistics``, the exact model :class:`Statistics`.

    Computed in float64 from detached parameters; the result is float64 and detached.
    """
    cover = enumeration_cover(model, max_states)
    total = math.prod(model.layers[i].num_states for i in cover)
    summed_out = [i for i in range(len(model.layers)) if i not in cover]
    rows = max(1, min(total, _CHUNK_ELEMENTS // sum(model.sizes)))
    wide = {name: p.detach().to(torch.float64) for name, p in model.named_parameters()}

    log_scale = torch.tensor(-math.inf, dtype=torch.float64)
    weight_sum = torch.zeros((), dtype=torch.float64)
    sums: dict[str, Tensor] = {}
    with substituted(model, wide):
        for start in range(0, total, rows):
            stop = min(start + rows, total)
            given = {i: x.to(torch.float64) for i, x in joint_states(model, cover, start, stop).items()}
            inputs = {k: model.input_or_zeros(given, k, batch=stop - start) for k in summed_out}
            log_weights = -model.summed_free_energy(given, inputs)
            # Running log-sum-exp: accumulators hold sums scaled by exp(-log_scale).
            new_scale = torch.maximum(log_scale, log_weights.max())
            rescale = torch.exp(log_scale - new_scale)
            chunk_weights = torch.exp(log_weights - new_scale)
            weight_sum = weight_sum * rescale + chunk_weights.sum()
            if statistics:
                # Summed-out layers enter through their exact conditional means given the cover.
                full = [
                    given[i] if i in given else model.layers[i].mean(inputs[i])
                    for i in range(len(model.layers))
                ]
                chunk = model.statistics(full, chunk_weights, means=summed_out)
                sums = {
                    name: sums[name] * rescale + value if name in sums else value
                    for name, value in chunk.items()
                }
            log_scale = new_scale
    log_z = log_scale + torch.log(weight_sum)
    if not statistics:
        return log_z, None
    return log_z, Statistics({name: value / weight_sum for name, value in sums.items()})


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
        >>> stats["couplings.0.weight"].shape
        torch.Size([6, 3])
    """

    def __init__(self, model: EnergyModel, *, max_states: int = MAX_STATES) -> None:
        super().__init__()
        check_model(model)
        enumeration_cover(model, max_states)  # refuse now rather than at the first statistics()
        self.model = model
        self.max_states = max_states

    def statistics(self, v: Tensor | None = None, **kwargs) -> Statistics:
        """The exact model Statistics (the batch ``v`` a negative phase receives is not used)."""
        _, stats = exact_moments(self.model, max_states=self.max_states)
        dtype = self.model.dtype
        return Statistics({name: value.to(dtype) for name, value in stats.items()})

    def forward(self) -> Statistics:
        return self.statistics()

    def extra_repr(self) -> str:
        return f"max_states={self.max_states:,}"
