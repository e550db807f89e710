"""Categorical (softmax) units: groups of one-hot units, for categories and class labels."""

from __future__ import annotations

import torch
from torch import Tensor, nn

from .._checks import check_size
from . import functional as F
from .units import UnitLayer

__all__ = ["CategoricalLayer"]


class CategoricalLayer(UnitLayer):
    r"""``groups`` groups of ``categories`` one-hot units (softmax units): ``size = groups * categories``.

    Energy term :math:`-b \cdot x`; in every state exactly one unit of each group is on. Given its
    input, the groups are independent and group ``g`` takes category ``k`` with probability
    ``softmax(b_g + input_g)_k``: the softmax units of "Replicated Softmax: an Undirected Topic
    Model" (NIPS 2009) and the label units of "Classification using Discriminative Restricted
    Boltzmann Machines" (ICML 2008). Units are ordered group by group (group ``g`` holds units
    ``g * categories .. (g + 1) * categories - 1``).

    Data may be given one-hot ``(B, size)`` or as category indices: ``(B, groups)`` integers, or
    ``(B,)`` integers when ``groups == 1`` (class labels); :meth:`as_states` turns them one-hot.

    Args:
        groups: number of groups ``G`` (variables).
        categories: categories per group ``K`` (at least 2).
        dtype, device: factory keywords as in ``torch.nn.Linear``.

    Attributes:
        bias: learned ``(G * K,)`` bias, initialised to zero.

    Examples::

        >>> layer = CategoricalLayer(1, 3)
        >>> layer.as_states(torch.tensor([2, 0]))
        tensor([[0., 0., 1.],
                [1., 0., 0.]])
    """

    bias: nn.Parameter
    support = (0.0, 1.0)

    def __init__(
        self, groups: int, categories: int, *, dtype: torch.dtype | None = None, device=None
    ) -> None:
        super().__init__()
        self.groups = check_size("groups", groups)
        self.categories = check_size("categories", categories)
        if self.categories < 2:
            raise ValueError(f"categories must be at least 2, got {categories}")
        self.size = self.groups * self.categories
        self.bias = nn.Parameter(torch.empty(self.size, dtype=dtype, device=device))
        self.reset_parameters()

    def reset_parameters(self) -> None:
        """Zero bias (every category equally likely)."""
        nn.init.zeros_(self.bias)

    def _grouped(self, x: Tensor) -> Tensor:
        return x.reshape(*x.shape[:-1], self.groups, self.categories)

    def energy(self, x: Tensor) -> Tensor:
        """``-b . x`` per row."""
        return -(x @ self.bias)

    def mean(self, input: Tensor) -> Tensor:
        """Softmax of ``b + input`` within each group."""
        return self._grouped(input + self.bias).softmax(-1).flatten(-2)

    def sample(self, input: Tensor, generator: torch.Generator) -> Tensor:
        """One-hot draws, one category per group with the probabilities of :meth:`mean`."""
        with torch.no_grad():
            return self._draw(self.mean(input), generator)

    def _draw(self, probabilities: Tensor, generator: torch.Generator) -> Tensor:
        """One-hot ``(B, size)`` draws with these per-group probabilities: the category whose
        cumulative probability first exceeds a uniform (inverse CDF, in float64)."""
        cumulative = self._grouped(probabilities).to(torch.float64).cumsum(-1)
        uniform = torch.rand(cumulative.shape[:-1] + (1,), dtype=torch.float64, generator=generator)
        # The total is 1 up to rounding: scale the uniform by it so the last category is never skipped.
        index = (cumulative < uniform * cumulative[..., -1:]).sum(-1, keepdim=True)
        index = index.clamp_(max=self.categories - 1)
        out = torch.zeros(cumulative.shape, dtype=probabilities.dtype)
        return out.scatter_(-1, index, 1.0).flatten(-2)

    def log_partition(self, input: Tensor) -> Tensor:
        """``sum_g logsumexp_k (b + input)_{g,k}``."""
        return self._grouped(input + self.bias).logsumexp(-1).sum(-1)

    def entropy(self, mean: Tensor) -> Tensor:
        """Entropy of independent categorical groups with these probabilities (``0 log 0 = 0``)."""
        return -torch.xlogy(mean, mean).sum(-1)

    def statistics(self, x: Tensor, weights: Tensor | None = None) -> dict[str, Tensor]:
        """``{"bias": mean of x}`` (weighted when ``weights`` is given)."""
        return {"bias": F.batch_mean(x, weights)}

    def as_states(self, x: Tensor, name: str = "x") -> Tensor:
        """Category indices (``(B, groups)`` integers, or ``(B,)`` when ``groups == 1``) made one-hot
        ``(B, size)`` in the layer's dtype; anything else returned as it is."""
        if not isinstance(x, Tensor) or x.is_floating_point() or x.is_complex() or x.dtype == torch.bool:
            return x
        if x.ndim == 1 and self.groups == 1:
            x = x[:, None]
        if x.ndim != 2 or x.shape[1] != self.groups or self.groups == self.size:
            return x
        if x.numel() and (int(x.min()) < 0 or int(x.max()) >= self.categories):
            raise ValueError(
                f"{name}: category indices must lie in 0..{self.categories - 1}, got values from "
                f"{int(x.min())} to {int(x.max())}"
            )
        out = torch.zeros(x.shape[0], self.groups, self.categories, dtype=self.bias.dtype)
        return out.scatter_(-1, x.long()[..., None], 1.0).flatten(1)

    def check_states(self, name: str, x: Tensor) -> None:
        """Raise ``ValueError`` unless every group of ``x`` ``(B, size)`` sums to one (one-hot data or
        probabilities)."""
        totals = self._grouped(x.detach()).sum(-1)
        wrong = (totals - 1.0).abs() > 1e-4
        if bool(wrong.any()):
            row, group = (int(k) for k in torch.nonzero(wrong)[0])
            raise ValueError(
                f"{name} must hold one-hot groups of {self.categories} units (or probabilities summing "
                f"to one per group); row {row}, group {group} sums to {float(totals[row, group])}"
            )

    def base_parameters(self, data: Tensor | None = None) -> dict[str, Tensor]:
        """A base model of independent groups for annealing: uniform, or the data's category
        frequencies (smoothed by one count per category)."""
        if data is None:
            return {"bias": torch.zeros_like(self.bias.detach())}
        counts = self._grouped(data.detach().to(torch.float64)).sum(0) + 1.0
        return {"bias": (counts / counts.sum(-1, keepdim=True)).log().flatten().to(self.bias.dtype)}

    def initial_states(self, batch: int, generator: torch.Generator, mean: Tensor | None = None) -> Tensor:
        """One category per group drawn uniformly, or with the probabilities ``mean`` ``(batch, size)``."""
        if mean is None:
            mean = torch.full((batch, self.size), 1.0 / self.categories, dtype=self.bias.dtype)
        return self._draw(mean, generator)

    @property
    def num_states(self) -> int:
        return self.categories**self.groups

    def states(self, start: int, stop: int) -> Tensor:
        """Rows ``start..stop`` of every joint state, in counting order base ``categories``
        (group 0 the lowest digit), one-hot."""
        codes = torch.arange(start, stop)
        powers = self.categories ** torch.arange(self.groups)
        digits = (codes[:, None] // powers) % self.categories
        out = torch.zeros(len(codes), self.groups, self.categories, dtype=self.bias.dtype)
        return out.scatter_(-1, digits[..., None], 1.0).flatten(1)

    def extra_repr(self) -> str:
        return f"groups={self.groups}, categories={self.categories}"
