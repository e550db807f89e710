"""Unit layers: the protocol every unit type follows (``UnitLayer``) and binary units."""

from __future__ import annotations

import warnings

import torch
from torch import Tensor, nn
from torch.nn.functional import softplus

from .._checks import check_size
from . import functional as F
from .parameters import autograd_statistics

__all__ = ["RATE_CLIP", "BinaryLayer", "UnitLayer", "has_logits", "resting_mean"]

# Base rates of binary data are clipped to [RATE_CLIP, 1 - RATE_CLIP] for an annealing base model.
RATE_CLIP = 1e-3


class UnitLayer(nn.Module):
    r"""Base class of unit layers: ``size`` units ``x`` with the layer's own energy term ``U(x)``.

    The conditional of the layer given the rest of a model is
    :math:`p(x \mid \text{input}) \propto e^{-U(x) + x \cdot \text{input}}`, where ``input`` is
    ``-dC/dx`` summed over the couplings that touch the layer. Every algorithm of the library reaches
    a unit type only through the methods below, so a subclass defines ``size``, its parameters and:

    - ``energy(x)``: ``(B, n) -> (B,)``, the term ``U(x)``;
    - ``mean(input)``: ``(B, n) -> (B, n)``, ``E[x | input]``;
    - ``sample(input, generator)``: ``(B, n) -> (B, n)``, a draw of ``x`` given ``input`` using only
      ``generator`` (a ``torch.Generator``);
    - ``log_partition(input)``: ``(B, n) -> (B,)``, :math:`\log \sum_x e^{-U(x) + x \cdot \text{input}}`
      (an integral for continuous units): sums the layer out in closed form;
    - ``entropy(mean)``: ``(B, n) -> (B,)``, the entropy of the factorised distribution with that mean.

    Discrete layers that enumeration may visit also define ``num_states`` and ``states(start, stop)``
    (rows ``start..stop`` of the list of every joint state); a layer without them is summed out with
    ``log_partition`` instead. ``support = (low, high)`` bounds the values data and states may take
    (``None``: unbounded). ``statistics`` has a generic default by autograd of ``energy``.

    Optional hooks with defaults: ``as_states(x)`` turns data in the layer's own encoding (class
    labels) into states; ``check_states(name, x)`` rejects data the support alone does not rule out;
    ``expected_energy(mean)`` and ``expected_statistics(mean, weights)`` average ``U`` and the
    statistics over the factorised distribution with that mean (by default their values at the
    mean, exact for units whose term is linear in ``x``); ``base_parameters(data)`` gives the
    independent base model annealing and tempering start from. Layers of 0/1 units may define
    ``logits(input)``, the log-odds ``(B, n)`` of each unit being on (``mean`` is their sigmoid;
    ``logits(input) - input`` does not depend on the input, as for any independent 0/1 units): Gibbs
    sampling then draws them under a lateral coupling class by class at the cost of the products
    alone (:mod:`ebm_layers.phases.lateral`), and annealing takes the change of their log-partition
    from one step to the next from the logits, without two float64 log-partition passes.

    Annealing and tempering interpolate the parameters ``base_parameters`` returns
    (``beta * theta + (1 - beta) * theta_0``, possibly one row per chain) and keep the others; that
    follows the interpolated energy exactly (up to a constant) when ``U`` is linear in the
    interpolated parameters, as for binary and categorical biases and a Gaussian layer's mean.
    """

    size: int
    support: tuple[float, float] | None = None

    def energy(self, x: Tensor) -> Tensor:
        raise NotImplementedError(f"{type(self).__name__} must define energy(x)")

    def mean(self, input: Tensor) -> Tensor:
        raise NotImplementedError(f"{type(self).__name__} must define mean(input)")

    def sample(self, input: Tensor, generator: torch.Generator) -> Tensor:
        raise NotImplementedError(f"{type(self).__name__} must define sample(input, generator)")

    def log_partition(self, input: Tensor) -> Tensor:
        raise NotImplementedError(f"{type(self).__name__} must define log_partition(input)")

    def entropy(self, mean: Tensor) -> Tensor:
        raise NotImplementedError(f"{type(self).__name__} must define entropy(mean)")

    def statistics(self, x: Tensor, weights: Tensor | None = None) -> dict[str, Tensor]:
        """``{parameter name: batch average of -dU/dtheta}`` over states ``x`` ``(B, n)``; weighted by
        ``weights`` ``(B,)`` (summing to one) when given. Generic: autograd of ``energy``."""
        return autograd_statistics(self, lambda: self.energy(x.detach()), weights)

    def expected_statistics(
        self, mean: Tensor, weights: Tensor | None = None, known: Tensor | None = None
    ) -> dict[str, Tensor]:
        """:meth:`statistics` averaged over the factorised distribution with this ``mean`` ``(B, n)``
        (the layer's conditional, as mean field and exact enumeration give it); ``known`` ``(B, n)``
        bool marks units that hold states instead (observed values among missing ones). Default:
        ``statistics(mean)``, exact when ``-dU/dtheta`` is linear in ``x``; override otherwise."""
        return self.statistics(mean, weights)

    def as_states(self, x: Tensor, name: str = "x") -> Tensor:
        """Data in the layer's own encoding as ``(B, n)`` states (default: ``x`` itself); errors name
        the data ``name``."""
        return x

    def check_states(self, name: str, x: Tensor) -> None:
        """Raise ``ValueError`` naming ``name`` if ``x`` ``(B, n)``, within the support, is still not a
        batch of the layer's states or means (default: every value within the support is)."""

    def expected_energy(self, mean: Tensor) -> Tensor:
        """``E[U(x)]`` ``(B,)`` under the factorised distribution with this ``mean`` ``(B, n)``:
        ``energy(mean)``, exact when ``U`` is linear in ``x``; override otherwise."""
        return self.energy(mean)

    def base_parameters(self, data: Tensor | None = None) -> dict[str, Tensor]:
        """The parameters ``{name: tensor}`` of the base model of independent units that annealing
        starts from: every parameter zero (default), or fitted to ``data`` ``(N, n)`` where a layer
        knows how. Parameters left out keep the model's values along the whole path."""
        return {name: torch.zeros_like(p.detach()) for name, p in self.named_parameters()}

    def log_probability(self, x: Tensor, input: Tensor) -> Tensor:
        """``log p(x | input)`` ``(B,)`` of states ``x`` under the layer's conditional:
        ``-U(x) + x . input - log_partition(input)`` (a proposal's density in importance sampling)."""
        return -self.energy(x) + (x * input).sum(-1) - self.log_partition(input)

    def initial_states(self, batch: int, generator: torch.Generator, mean: Tensor | None = None) -> Tensor:
        """``(batch, n)`` starting states of chains: a draw from the layer alone (zero input), or
        the given ``mean`` ``(batch, n)`` itself (binary layers draw states with that mean)."""
        if mean is not None:
            return mean.clone()
        parameter = next(self.parameters(), None)
        dtype = torch.get_default_dtype() if parameter is None else parameter.dtype
        return self.sample(torch.zeros(batch, self.size, dtype=dtype), generator)


def has_logits(layer: UnitLayer) -> bool:
    """Whether ``layer`` has the optional ``logits`` hook of 0/1 units (see :class:`UnitLayer`)."""
    return callable(getattr(layer, "logits", None))


@torch.no_grad()
def resting_mean(layer: UnitLayer, batch: int, dtype: torch.dtype) -> Tensor:
    """The layer's mean under zero input, ``(batch, n)`` (an expanded view, detached): where mean
    field starts a layer, and a valid stand-in for values not known yet."""
    return layer.mean(torch.zeros(1, layer.size, dtype=dtype)).expand(batch, -1)


class BinaryLayer(UnitLayer):
    r"""A layer of ``size`` binary units ``x`` in {0, 1} with energy term :math:`-b \cdot x`.

    Args:
        size: number of units ``n``.
        dtype, device: factory keywords as in ``torch.nn.Linear``.

    Shape:
        - ``mean(input)``, ``sample(input, generator)``: ``(B, n) -> (B, n)``;
          ``energy(x)``, ``log_partition(input)``, ``entropy(mean)``: ``(B, n) -> (B,)``.

    Attributes:
        bias: learned ``(n,)`` bias, initialised to zero.

    Examples::

        >>> layer = BinaryLayer(3)
        >>> layer.mean(torch.zeros(2, 3)).detach()  # sigmoid(bias + input), differentiable in the bias
        tensor([[0.5000, 0.5000, 0.5000],
                [0.5000, 0.5000, 0.5000]])
    """

    bias: nn.Parameter
    support = (0.0, 1.0)
    # sample() also takes a functional.Uniforms block, so a sweep can draw all its uniforms at once.
    takes_uniform_blocks = True

    def __init__(self, size: int, *, dtype: torch.dtype | None = None, device=None) -> None:
        super().__init__()
        self.size = check_size("size", size)
        self.bias = nn.Parameter(torch.empty(self.size, dtype=dtype, device=device))
        self.reset_parameters()

    def reset_parameters(self) -> None:
        """Zero bias."""
        nn.init.zeros_(self.bias)

    def energy(self, x: Tensor) -> Tensor:
        """``-b . x`` per row."""
        return -(x @ self.bias)

    def logits(self, input: Tensor) -> Tensor:
        """The log-odds ``b + input`` of each unit being on, ``(B, n)``."""
        return input + self.bias

    def mean(self, input: Tensor) -> Tensor:
        """``p(x = 1) = sigmoid(b + input)``."""
        return self.logits(input).sigmoid_()  # in place on the sum: one tensor, one pass less

    def sample(self, input: Tensor, generator: torch.Generator | F.Uniforms) -> Tensor:
        """Binary draw with ``p(x = 1) = sigmoid(b + input)``; not differentiable."""
        probabilities = self.mean(input)
        return F.sample_bernoulli(
            probabilities.detach() if probabilities.requires_grad else probabilities, generator
        )

    def log_partition(self, input: Tensor) -> Tensor:
        """``sum_j softplus(b_j + input_j)``."""
        return softplus(input + self.bias).sum(-1)

    def entropy(self, mean: Tensor) -> Tensor:
        """Entropy of independent Bernoulli units with these means (``0 log 0 = 0``)."""
        return -(torch.xlogy(mean, mean) + torch.xlogy(1.0 - mean, 1.0 - mean)).sum(-1)

    def statistics(self, x: Tensor, weights: Tensor | None = None) -> dict[str, Tensor]:
        """``{"bias": mean of x}`` (weighted when ``weights`` is given)."""
        return {"bias": F.batch_mean(x, weights)}

    def base_parameters(self, data: Tensor | None = None) -> dict[str, Tensor]:
        """Zero bias (every unit on with probability 1/2), or the log-odds of ``data``'s base rates
        clipped to ``[RATE_CLIP, 1 - RATE_CLIP]`` (a unit constant in the data would otherwise get an
        infinite bias; a warning says how many were clipped)."""
        if data is None:
            return {"bias": torch.zeros_like(self.bias.detach())}
        rates = F.base_rates(data)
        clipped = rates.clamp(RATE_CLIP, 1.0 - RATE_CLIP)
        outside = int((clipped != rates).sum())
        if outside:
            warnings.warn(
                f"{outside} of {self.size} units have base rates outside [{RATE_CLIP}, {1 - RATE_CLIP}] "
                "in data (constant units); clipped for the base model",
                stacklevel=2,
            )
        return {"bias": torch.logit(clipped).to(self.bias.dtype)}

    def initial_states(self, batch: int, generator: torch.Generator, mean: Tensor | None = None) -> Tensor:
        """Every unit on with probability 1/2 whatever the bias, or with probability ``mean``."""
        if mean is None:
            mean = torch.full((batch, self.size), 0.5, dtype=self.bias.dtype)
        return torch.bernoulli(mean, generator=generator)

    @property
    def num_states(self) -> int:
        return 2**self.size

    def states(self, start: int, stop: int) -> Tensor:
        """Rows ``start..stop`` of every binary state, in counting order (unit 0 the lowest bit)."""
        codes = torch.arange(start, stop)
        bits = torch.arange(self.size)
        return ((codes[:, None] >> bits) & 1).to(self.bias.dtype)

    def extra_repr(self) -> str:
        return f"{self.size}"
