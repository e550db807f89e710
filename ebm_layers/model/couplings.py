"""Couplings: the weights between two layers, or among the units of one layer."""

from __future__ import annotations

import torch
from torch import Tensor, nn
from torch.nn.utils import parametrize

from .._checks import check_index, check_size
from .._random import resolve_generator
from . import functional as F

__all__ = ["DenseCoupling", "LateralCoupling"]

# Small zero-mean Gaussian weights: common practice, "A Practical Guide to Training
# Restricted Boltzmann Machines" (Hinton, UTML TR 2010-003, 2010), section 8.
INIT_STD = 0.01


class _Coupling(nn.Module):
    """What every coupling shares: the indices ``a``, ``b`` of the layers it joins, and its input."""

    a: int
    b: int
    weight: Tensor

    def input_to(self, target: int, x: Tensor) -> Tensor:
        """Input ``(B, n_target)`` sent to layer ``target`` from the state ``x`` ``(B, n_other)`` of
        the other end: ``x_a @ W`` into ``b``, ``x_b @ W.T`` into ``a`` (lateral: ``x @ W``)."""
        if target not in (self.a, self.b):
            raise ValueError(
                f"target must be one of the layers this coupling joins ({self.a}, {self.b}), got {target}"
            )
        _, matrix = F.coupling_input((self.a, self.b), self.weight, target)
        return x @ matrix


class DenseCoupling(_Coupling):
    r"""Weights between layers ``a`` and ``b``, energy term :math:`-x_a W x_b^\top`.

    Args:
        a, b: indices of the two layers it joins (``a != b``).
        n_a, n_b: their sizes.
        dtype, device: factory keywords as in ``torch.nn.Linear``.

    Shape:
        - input to layer ``b``: ``x_a @ weight``, ``(B, n_a) -> (B, n_b)``;
          input to layer ``a``: ``x_b @ weight.T``.

    Attributes:
        weight: learned ``(n_a, n_b)`` matrix, initialised from N(0, 0.01^2).

    Examples::

        >>> coupling = DenseCoupling(0, 1, 6, 4)
        >>> coupling.weight.shape
        torch.Size([6, 4])
    """

    weight: nn.Parameter

    def __init__(
        self, a: int, b: int, n_a: int, n_b: int, *, dtype: torch.dtype | None = None, device=None
    ) -> None:
        super().__init__()
        self.a = check_index("a", a)
        self.b = check_index("b", b)
        if a == b:
            raise ValueError(
                f"a DenseCoupling joins two different layers, got a = b = {a}; "
                "use LateralCoupling for weights within one layer"
            )
        n_a, n_b = check_size("n_a", n_a), check_size("n_b", n_b)
        self.weight = nn.Parameter(torch.empty(n_a, n_b, dtype=dtype, device=device))
        self.reset_parameters()

    def reset_parameters(self, generator: torch.Generator | None = None) -> None:
        """Draw the weights from N(0, 0.01^2) with ``generator``."""
        nn.init.normal_(self.weight, 0.0, INIT_STD, generator=resolve_generator(generator))

    def extra_repr(self) -> str:
        n_a, n_b = self.weight.shape
        return f"a={self.a}, b={self.b}, n_a={n_a}, n_b={n_b}"


class _SymmetricZeroDiagonal(nn.Module):
    """Parametrization: the strict upper triangle of a free matrix, mirrored below the diagonal."""

    def forward(self, free: Tensor) -> Tensor:
        upper = free.triu(1)
        return upper + upper.mT

    def right_inverse(self, weight: Tensor) -> Tensor:
        if weight.ndim != 2 or weight.shape[0] != weight.shape[1]:
            raise ValueError(f"a lateral weight must be square, got shape {tuple(weight.shape)}")
        if not torch.equal(weight, weight.mT) or bool(weight.diagonal().any()):
            raise ValueError("a lateral weight must be symmetric with a zero diagonal")
        return weight.triu(1)


class LateralCoupling(_Coupling):
    r"""Symmetric weights among the ``n`` units of one layer, energy term :math:`-\tfrac12 x W x^\top`.

    ``weight`` is a parametrized ``(n, n)`` matrix (``torch.nn.utils.parametrize``), symmetric
    with a zero diagonal by construction, so it stays so after any optimizer step; the free
    matrix behind it is ``parametrizations.weight.original`` (only its strict upper triangle
    matters). Assigning ``coupling.weight = W`` accepts a symmetric zero-diagonal ``W``.

    Args:
        layer: index of the layer (``a == b == layer``).
        n: its size.
        dtype, device: factory keywords as in ``torch.nn.Linear``.

    Shape:
        - input to the layer: ``x @ weight``, ``(B, n) -> (B, n)``.

    Attributes:
        weight: ``(n, n)`` symmetric zero-diagonal matrix, off-diagonal entries from N(0, 0.01^2).

    Examples::

        >>> coupling = LateralCoupling(0, 5)
        >>> weight = coupling.weight.detach()
        >>> torch.equal(weight, weight.T), weight.diagonal().count_nonzero().item()
        (True, 0)
    """

    def __init__(self, layer: int, n: int, *, dtype: torch.dtype | None = None, device=None) -> None:
        super().__init__()
        self.a = self.b = check_index("layer", layer)
        n = check_size("n", n)
        self.weight = nn.Parameter(torch.zeros(n, n, dtype=dtype, device=device))
        parametrize.register_parametrization(self, "weight", _SymmetricZeroDiagonal())
        self.reset_parameters()

    def reset_parameters(self, generator: torch.Generator | None = None) -> None:
        """Draw the off-diagonal weights from N(0, 0.01^2) with ``generator``."""
        free = self.parametrizations.weight.original
        with torch.no_grad():
            nn.init.normal_(free, 0.0, INIT_STD, generator=resolve_generator(generator))
            free.copy_(free.triu(1))

    def extra_repr(self) -> str:
        return f"layer={self.a}, n={self.parametrizations.weight.original.shape[0]}"
