"""Unit types. A layer holds its bias and turns total inputs (logits) into means or samples."""

from __future__ import annotations

import torch
from torch import Tensor, nn

from .._checks import check_size
from . import functional as F

__all__ = ["BinaryLayer"]


class BinaryLayer(nn.Module):
    r"""A layer of ``size`` binary units ``x`` in {0, 1} with energy term :math:`-b \cdot x`.

    Args:
        size: number of units ``n``.
        dtype, device: factory keywords as in ``torch.nn.Linear``.

    Shape:
        - ``mean(logits)``, ``sample(logits, generator)``: ``(B, n) -> (B, n)``.

    Attributes:
        bias: learned ``(n,)`` bias, initialised to zero.

    Examples::

        >>> layer = BinaryLayer(3)
        >>> layer.mean(torch.zeros(2, 3))
        tensor([[0.5000, 0.5000, 0.5000],
                [0.5000, 0.5000, 0.5000]])
    """

    size: int
    bias: nn.Parameter

    def __init__(self, size: int, *, dtype: torch.dtype | None = None, device=None) -> None:
        super().__init__()
        self.size = check_size("size", size)
        self.bias = nn.Parameter(torch.empty(self.size, dtype=dtype, device=device))
        self.reset_parameters()

    def reset_parameters(self) -> None:
        """Zero bias."""
        nn.init.zeros_(self.bias)

    def mean(self, logits: Tensor) -> Tensor:
        """``p(x = 1) = sigmoid(logits)``, where ``logits`` is the total input including the bias."""
        return torch.sigmoid(logits)

    def sample(self, logits: Tensor, generator: torch.Generator) -> Tensor:
        """Binary draw with ``p(x = 1) = sigmoid(logits)``; not differentiable."""
        return F.bernoulli(logits, generator)

    def extra_repr(self) -> str:
        return f"{self.size}"
