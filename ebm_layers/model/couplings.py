"""Couplings: the protocol every coupling follows (``Coupling``), dense weights between two
layers and lateral weights within one, both with an optional fixed mask."""

from __future__ import annotations

import torch
from torch import Tensor, nn
from torch.nn.utils import parametrize

from .._checks import check_index, check_size
from .._random import resolve_generator
from .parameters import autograd_statistics

__all__ = ["Coupling", "DenseCoupling", "LateralCoupling"]

# Small zero-mean Gaussian weights: common practice, "A Practical Guide to Training Restricted
# Boltzmann Machines" (Hinton, UTML TR 2010-003, 2010), section 8.
INIT_STD = 0.01


class Coupling(nn.Module):
    r"""Base class of couplings: an energy term ``C(x_a, x_b)`` linear in each of its two layers' states.

    Attributes ``a`` and ``b`` are the indices of the layers it joins (``a == b``: within one layer,
    a *lateral* coupling). A subclass defines its parameters and:

    - ``input_to(target, x)``: ``(B, n_other) -> (B, n_target)``, the input ``-dC/dx_target`` sent
      to layer ``target`` from the state ``x`` of the other end (of the layer itself when lateral);
    - ``energy(x_a, x_b)``: ``(B,)``, the term ``C`` (lateral: ``x_a`` and ``x_b`` are the same state).

    ``statistics`` has a generic default by autograd of ``energy``. A lateral coupling tells which
    of its units are mutually uncoupled with ``unit_classes()`` (default: every unit on its own), so
    those update together; ``input_change`` may be overridden with a cheaper product.
    """

    a: int
    b: int

    def input_to(self, target: int, x: Tensor) -> Tensor:
        raise NotImplementedError(f"{type(self).__name__} must define input_to(target, x)")

    def energy(self, x_a: Tensor, x_b: Tensor) -> Tensor:
        raise NotImplementedError(f"{type(self).__name__} must define energy(x_a, x_b)")

    def statistics(self, x_a: Tensor, x_b: Tensor, weights: Tensor | None = None) -> dict[str, Tensor]:
        """``{parameter name: batch average of -dC/dtheta}`` over the states ``(B, n_a)``, ``(B, n_b)``;
        weighted by ``weights`` ``(B,)`` (summing to one) when given. Generic: autograd of ``energy``."""
        return autograd_statistics(self, lambda: self.energy(x_a.detach(), x_b.detach()), weights)

    def unit_classes(self) -> list[Tensor]:
        """Lateral couplings: the units of the layer in classes of mutually uncoupled units (index
        tensors), updated one class at a time. Default: one unit per class."""
        size = self._lateral_size()
        return [torch.tensor([j]) for j in range(size)]

    def add_input(self, target: int, x: Tensor, input: Tensor) -> Tensor:
        """``input + input_to(target, x)``, a new tensor (matrix couplings fuse the sum into the product)."""
        return input + self.input_to(target, x)

    def input_change(self, target: int, change: Tensor, units: Tensor) -> Tensor:
        """Change of ``input_to(target, x)`` when ``x`` changes by ``change`` ``(B, n)``, non-zero
        only in columns ``units`` (the coupling is linear in ``x``, so it is ``input_to`` of it)."""
        return self.input_to(target, change)

    def _lateral_size(self) -> int:
        raise NotImplementedError(f"{type(self).__name__} must define unit_classes() to be lateral")

    def _check_target(self, target: int) -> None:
        if target not in (self.a, self.b):
            raise ValueError(
                f"target must be one of the layers this coupling joins ({self.a}, {self.b}), got {target}"
            )


class _Masked(nn.Module):
    """Parametrization: the free matrix with the entries outside ``mask`` set to exactly zero."""

    def __init__(self, mask: Tensor) -> None:
        super().__init__()
        self.register_buffer("mask", mask)

    def forward(self, free: Tensor) -> Tensor:
        return free * self.mask

    def right_inverse(self, weight: Tensor) -> Tensor:
        if bool(weight[~self.mask].any()):
            raise ValueError("a masked weight must be zero outside its mask")
        return weight


def _check_mask(mask: object, shape: tuple[int, int]) -> Tensor:
    if not isinstance(mask, Tensor) or mask.dtype != torch.bool:
        raise TypeError(f"mask must be a bool tensor of shape {shape}, got {mask!r}")
    if tuple(mask.shape) != shape:
        raise ValueError(f"mask must have the weight's shape {shape}, got {tuple(mask.shape)}")
    return mask.detach().clone()


class _MatrixCoupling(Coupling):
    """What the two built-in couplings share: one weight matrix, optionally masked."""

    weight: Tensor

    @property
    def mask(self) -> Tensor | None:
        """The fixed bool mask of the weight (``None``: every entry free)."""
        if not parametrize.is_parametrized(self, "weight"):
            return None
        masks = [p.mask for p in self.parametrizations.weight if isinstance(p, _Masked)]
        return masks[0] if masks else None

    def input_to(self, target: int, x: Tensor) -> Tensor:
        """``x_a @ W`` into ``b``, ``x_b @ W.T`` into ``a`` (lateral: ``x @ W``)."""
        self._check_target(target)
        return x @ (self.weight if target == self.b else self.weight.mT)

    def add_input(self, target: int, x: Tensor, input: Tensor) -> Tensor:
        """``input + input_to(target, x)`` in one ``addmm``."""
        self._check_target(target)
        return torch.addmm(input, x, self.weight if target == self.b else self.weight.mT)

    def free_weight(self) -> Tensor:
        """The ``weight`` parameter itself, or the free matrix behind a parametrized one."""
        if parametrize.is_parametrized(self, "weight"):
            return self.parametrizations.weight.original
        return self.weight


class DenseCoupling(_MatrixCoupling):
    r"""Weights between layers ``a`` and ``b``, energy term :math:`-x_a W x_b^\top`.

    Args:
        a, b: indices of the two layers it joins (``a != b``).
        n_a, n_b: their sizes.
        mask: optional bool ``(n_a, n_b)``: entries where it is False are exactly zero, whatever an
            optimizer does (the weight is the free matrix times the mask, by ``parametrize``).
        dtype, device: factory keywords as in ``torch.nn.Linear``.

    Shape:
        - input to layer ``b``: ``x_a @ weight``, ``(B, n_a) -> (B, n_b)``;
          input to layer ``a``: ``x_b @ weight.T``.

    Attributes:
        weight: learned ``(n_a, n_b)`` matrix, initialised from N(0, 0.01^2) (zero outside the mask).

    Examples::

        >>> coupling = DenseCoupling(0, 1, 6, 4)
        >>> coupling.weight.shape
        torch.Size([6, 4])
    """

    def __init__(
        self,
        a: int,
        b: int,
        n_a: int,
        n_b: int,
        *,
        mask: Tensor | None = None,
        dtype: torch.dtype | None = None,
        device=None,
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
        mask = None if mask is None else _check_mask(mask, (n_a, n_b))
        self.weight = nn.Parameter(torch.zeros(n_a, n_b, dtype=dtype, device=device))
        if mask is not None:
            parametrize.register_parametrization(self, "weight", _Masked(mask.to(device)))
        self.reset_parameters()

    def reset_parameters(self, generator: torch.Generator | None = None) -> None:
        """Draw the weights from N(0, 0.01^2) with ``generator`` (zero outside the mask)."""
        free = self.free_weight()
        with torch.no_grad():
            nn.init.normal_(free, 0.0, INIT_STD, generator=resolve_generator(generator))
            if self.mask is not None:
                free.mul_(self.mask)

    def energy(self, x_a: Tensor, x_b: Tensor) -> Tensor:
        """``-x_a W x_b^T`` per row."""
        return -((x_a @ self.weight) * x_b).sum(-1)

    def statistics(self, x_a: Tensor, x_b: Tensor, weights: Tensor | None = None) -> dict[str, Tensor]:
        """The average ``x_a^T x_b`` in one product (masked outside the mask)."""
        pair = _pair_mean(x_a, x_b, weights)
        mask = self.mask
        if mask is None:
            return {"weight": pair}
        return {"parametrizations.weight.original": pair * mask}

    def extra_repr(self) -> str:
        n_a, n_b = self.weight.shape
        masked = "" if self.mask is None else f", mask={int(self.mask.sum())}/{self.mask.numel()}"
        return f"a={self.a}, b={self.b}, n_a={n_a}, n_b={n_b}{masked}"


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


class LateralCoupling(_MatrixCoupling):
    r"""Symmetric weights among the ``n`` units of one layer, energy term :math:`-\tfrac12 x W x^\top`.

    ``weight`` is a parametrized ``(n, n)`` matrix (``torch.nn.utils.parametrize``), symmetric
    with a zero diagonal by construction, so it stays so after any optimizer step; the free
    matrix behind it is ``parametrizations.weight.original`` (only its strict upper triangle
    matters). Assigning ``coupling.weight = W`` accepts a symmetric zero-diagonal ``W``.

    With a ``mask`` (symmetric bool ``(n, n)``; its diagonal is ignored) the entries outside it are
    exactly zero, and the units are coloured from it: units with no weight between them form one
    class and are drawn together (a lattice needs two classes instead of one unit at a time).

    Args:
        layer: index of the layer (``a == b == layer``).
        n: its size.
        mask: optional symmetric bool ``(n, n)``, True where units may be coupled.
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

    def __init__(
        self,
        layer: int,
        n: int,
        *,
        mask: Tensor | None = None,
        dtype: torch.dtype | None = None,
        device=None,
    ) -> None:
        super().__init__()
        self.a = self.b = check_index("layer", layer)
        n = check_size("n", n)
        if mask is not None:
            mask = _check_mask(mask, (n, n))
            if not torch.equal(mask, mask.mT):
                raise ValueError("mask of a LateralCoupling must be symmetric")
            mask.fill_diagonal_(False)
        self.weight = nn.Parameter(torch.zeros(n, n, dtype=dtype, device=device))
        parametrize.register_parametrization(self, "weight", _SymmetricZeroDiagonal())
        if mask is not None:
            parametrize.register_parametrization(self, "weight", _Masked(mask.to(device)))
        self._classes = _colour_units(mask) if mask is not None else None
        self.reset_parameters()

    def reset_parameters(self, generator: torch.Generator | None = None) -> None:
        """Draw the off-diagonal weights from N(0, 0.01^2) with ``generator`` (zero outside the mask)."""
        free = self.free_weight()
        with torch.no_grad():
            nn.init.normal_(free, 0.0, INIT_STD, generator=resolve_generator(generator))
            free.copy_(free.triu(1) if self.mask is None else free.triu(1) * self.mask)

    def energy(self, x_a: Tensor, x_b: Tensor) -> Tensor:
        """``-1/2 x W x^T`` per row (``x_a`` and ``x_b`` are the layer's state)."""
        return -0.5 * ((x_a @ self.weight) * x_b).sum(-1)

    def statistics(self, x_a: Tensor, x_b: Tensor, weights: Tensor | None = None) -> dict[str, Tensor]:
        """The gradient of the free matrix: the strict upper triangle of the average ``x^T x``."""
        pair = _pair_mean(x_a, x_b, weights).triu(1)
        mask = self.mask
        return {"parametrizations.weight.original": pair if mask is None else pair * mask}

    def unit_classes(self) -> list[Tensor]:
        """Classes of mutually uncoupled units (from the mask; one unit each without one)."""
        if self._classes is None:
            return super().unit_classes()
        return self._classes

    def input_change(self, target: int, change: Tensor, units: Tensor) -> Tensor:
        """Only the changed units' rows of the weight: a ``(B, k) @ (k, n)`` product."""
        return change[:, units] @ self.weight[units]

    def entries(self, rows: Tensor, columns: Tensor) -> Tensor:
        """``weight[rows, columns]`` for index tensors of one shape, read from the free matrix
        without building the ``(n, n)`` weight (the same values: a few entries of a sparse mask)."""
        upper = self.free_weight()[torch.minimum(rows, columns), torch.maximum(rows, columns)]
        coupled = rows != columns if self.mask is None else self.mask[rows, columns]
        return torch.where(coupled, upper, 0.0)

    def _lateral_size(self) -> int:
        return self.weight.shape[0]

    def extra_repr(self) -> str:
        masked = "" if self.mask is None else f", mask={int(self.mask.sum()) // 2} pairs"
        return f"layer={self.a}, n={self.weight.shape[0]}{masked}"


def _pair_mean(x_a: Tensor, x_b: Tensor, weights: Tensor | None) -> Tensor:
    """Average outer product ``<x_a^T x_b>`` over the batch, ``(n_a, n_b)``; weighted when
    ``weights`` ``(B,)`` (summing to one) is given."""
    if weights is None:
        # The 1/B inside the product (beta=0: the zero input is never read) saves a pass over (n_a, n_b).
        return torch.addmm(x_a.new_zeros(()), x_a.mT, x_b, beta=0, alpha=1.0 / x_a.shape[0])
    return (x_a * weights.to(x_a.dtype)[:, None]).mT @ x_b


def _colour_units(mask: Tensor) -> list[Tensor]:
    """Greedy colouring of the units of a lateral mask, in index order: each unit takes the lowest
    class none of its neighbours has. A checkerboard lattice gets two classes."""
    colours: list[int] = []
    neighbours = [torch.nonzero(row).flatten().tolist() for row in mask]
    for unit, near in enumerate(neighbours):
        taken = {colours[m] for m in near if m < unit}
        colours.append(next(c for c in range(len(colours) + 1) if c not in taken))
    colour = torch.tensor(colours)
    return [torch.nonzero(colour == c).flatten() for c in range(int(colour.max()) + 1)]
