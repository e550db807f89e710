"""Gaussian units: real-valued layers (grey levels, sensor readings, standardised measurements)."""

from __future__ import annotations

import math

import torch
from torch import Tensor, nn

from .._checks import check_positive_real, check_size
from . import functional as F
from .units import UnitLayer

__all__ = ["GaussianLayer"]

_LOG_2PI = math.log(2.0 * math.pi)


class GaussianLayer(UnitLayer):
    r"""A layer of ``size`` real-valued units with energy term :math:`\sum_i (x_i - b_i)^2 / (2 \sigma_i^2)`.

    Joined to other layers by the usual couplings (``-x W h`` for a dense one), a unit's
    conditional is Gaussian: :math:`x_i \mid \text{input} \sim N(b_i + \sigma_i^2 \,\text{input}_i,
    \sigma_i^2)`, and a binary unit above it receives ``W^T x``. This is the Gaussian-Bernoulli RBM in
    the natural parametrisation of exponential-family harmoniums ("Exponential Family Harmoniums
    with an Application to Information Retrieval", NIPS 2004): for a fixed ``std`` of 1 it is the
    model of "A Practical Guide to Training Restricted Boltzmann Machines" (UTML TR 2010-003, 2010),
    section 13, and that of "Improved Learning of Gaussian-Bernoulli Restricted Boltzmann
    Machines" (ICANN 2011) with its weight equal to ``std^2`` times this one.

    Input scaling: the input from the other layers is not divided by ``std``, so a unit's pull on
    the hidden layers grows with the data's own scale. Standardise each column of the data (zero
    mean, unit variance) and keep the default ``std=1``: weights then start on the scale binary
    models use, one learning rate fits every unit, and the noise is the size the practical guide
    recommends. Learning ``std`` (``learn_std=True``, per unit, as ``log_std``) is the ICANN 2011
    paper's option; it is less stable with large learning rates.

    Args:
        size: number of units ``n``.
        std: the standard deviation ``sigma`` (a positive number, all units), default 1.
        learn_std: make ``log_std`` a parameter (per unit) instead of a fixed buffer.
        dtype, device: factory keywords as in ``torch.nn.Linear``.

    Shape:
        - ``mean(input)``, ``sample(input, generator)``: ``(B, n) -> (B, n)``;
          ``energy(x)``, ``log_partition(input)``, ``entropy(mean)``: ``(B, n) -> (B,)``.

    Attributes:
        bias: learned ``(n,)`` mean at zero input, initialised to zero.
        log_std: ``(n,)`` log standard deviation: a buffer, or a parameter with ``learn_std``.

    Examples::

        >>> layer = GaussianLayer(2)
        >>> layer.mean(torch.tensor([[1.0, -2.0]])).detach()  # bias + std^2 * input
        tensor([[ 1., -2.]])
    """

    bias: nn.Parameter
    log_std: Tensor
    support = None

    def __init__(
        self,
        size: int,
        *,
        std: float = 1.0,
        learn_std: bool = False,
        dtype: torch.dtype | None = None,
        device=None,
    ) -> None:
        super().__init__()
        self.size = check_size("size", size)
        self.initial_std = check_positive_real("std", std)
        if not isinstance(learn_std, bool):
            raise TypeError(f"learn_std must be a bool, got {learn_std!r}")
        self.bias = nn.Parameter(torch.empty(self.size, dtype=dtype, device=device))
        log_std = torch.empty(self.size, dtype=dtype, device=device)
        self.learn_std = learn_std  # a flag: the parameter may be substituted by a plain tensor
        if learn_std:
            self.log_std = nn.Parameter(log_std)
        else:
            self.register_buffer("log_std", log_std)
        self.reset_parameters()

    def reset_parameters(self) -> None:
        """Zero bias, every standard deviation at ``std``."""
        nn.init.zeros_(self.bias)
        with torch.no_grad():
            self.log_std.fill_(math.log(self.initial_std))

    def _variance(self) -> Tensor:
        return (2.0 * self.log_std).exp()

    def energy(self, x: Tensor) -> Tensor:
        """``sum_i (x_i - b_i)^2 / (2 sigma_i^2)`` per row."""
        return ((x - self.bias).square() / (2.0 * self._variance())).sum(-1)

    def mean(self, input: Tensor) -> Tensor:
        """``b + sigma^2 * input``."""
        return self.bias + self._variance() * input

    def sample(self, input: Tensor, generator: torch.Generator) -> Tensor:
        """A draw from ``N(b + sigma^2 input, sigma^2)``; not differentiable."""
        with torch.no_grad():
            mean = self.mean(input)
            noise = torch.randn(mean.shape, dtype=mean.dtype, generator=generator)
            return mean + self.log_std.exp() * noise

    def log_partition(self, input: Tensor) -> Tensor:
        r"""The Gaussian integral :math:`\sum_i b_i u_i + \sigma_i^2 u_i^2 / 2 + \log(2\pi\sigma_i^2) / 2`."""
        variance = self._variance()
        terms = self.bias * input + variance * input.square() / 2.0 + (0.5 * _LOG_2PI + self.log_std)
        return terms.sum(-1)

    def entropy(self, mean: Tensor) -> Tensor:
        """Entropy of independent Gaussians with the layer's variances (it does not depend on the mean)."""
        per_unit = (0.5 * (_LOG_2PI + 1.0) + self.log_std).sum()
        return per_unit.expand(mean.shape[:-1])

    def expected_energy(self, mean: Tensor) -> Tensor:
        """``E[U(x)]`` ``(B,)`` under independent Gaussians with this mean and the layer's variances:
        ``U(mean) + n / 2``."""
        return self.energy(mean) + self.size / 2.0

    def statistics(self, x: Tensor, weights: Tensor | None = None) -> dict[str, Tensor]:
        """``{"bias": average of (x - b) / sigma^2}`` and, when learned, ``{"log_std": average of
        (x - b)^2 / sigma^2}`` (the averages of ``-dU/dtheta``)."""
        variance = self._variance().detach()
        centred = x - self.bias.detach()
        out = {"bias": F.batch_mean(centred, weights) / variance}
        if self.learn_std:
            out["log_std"] = F.batch_mean(centred.square(), weights) / variance
        return out

    def expected_statistics(
        self, mean: Tensor, weights: Tensor | None = None, known: Tensor | None = None
    ) -> dict[str, Tensor]:
        """:meth:`statistics` averaged over independent Gaussians with this mean and the layer's
        variances: ``E[(x - b)^2] / sigma^2 = (mean - b)^2 / sigma^2 + 1`` for ``log_std``, the ``+ 1``
        only where ``known`` ``(B, n)`` (bool) is False when given (units holding data, not means)."""
        out = self.statistics(mean, weights)
        if self.learn_std:
            if known is None:  # the weights' total: they need not be normalised (enumeration's chunks)
                variance_term = 1.0 if weights is None else weights.sum().to(mean.dtype)
            else:
                variance_term = F.batch_mean((~known).to(mean.dtype), weights)
            out["log_std"] = out["log_std"] + variance_term
        return out

    def base_parameters(self, data: Tensor | None = None) -> dict[str, Tensor]:
        """A base model of independent units for annealing: the layer's own standard deviations
        (kept, so the path stays linear in the parameters) and a zero mean, or the data's mean."""
        bias = torch.zeros_like(self.bias.detach()) if data is None else data.mean(0).to(self.bias.dtype)
        out = {"bias": bias}
        if self.learn_std:
            out["log_std"] = self.log_std.detach().clone()
        return out

    def extra_repr(self) -> str:
        std = "learned" if self.learn_std else f"{self.initial_std:g}"
        return f"{self.size}, std={std}"
