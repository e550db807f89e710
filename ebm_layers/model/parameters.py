"""Working with a module's parameters by name: substituting other tensors for them, and the
statistics ``-dE/dtheta`` of an energy term by autograd (the generic default of every module)."""

from __future__ import annotations

from collections.abc import Callable, Mapping

import torch
from torch import Tensor, nn

__all__ = ["autograd_statistics", "substituted"]


class substituted:  # lower case: used like a function, ``with substituted(module, values):``
    """Within the block, ``module`` computes with ``values`` (keyed by names of
    ``module.named_parameters()``) in place of those parameters; they are put back on exit.

    Parametrized tensors follow (a lateral weight is rebuilt from a substituted free matrix). The
    values may have any shape the module's computations broadcast with. Empty ``values`` cost
    nothing (the hot paths enter it on every call).
    """

    def __init__(self, module: nn.Module, values: Mapping[str, Tensor]) -> None:
        self.module, self.values, self.swapped = module, values, []

    def __enter__(self) -> None:
        try:
            for name, value in self.values.items():
                *path, leaf = name.split(".")
                owner = self.module
                for part in path:  # the submodules' own dicts: get_submodule's checks cost more here
                    owner = owner._modules.get(part)
                    if owner is None:
                        raise KeyError(f"{name!r} is not a parameter of {type(self.module).__name__}")
                if leaf not in owner._parameters:
                    raise KeyError(f"{name!r} is not a parameter of {type(self.module).__name__}")
                self.swapped.append((owner, leaf, owner._parameters[leaf]))
                owner._parameters[leaf] = value
        except BaseException:
            self.__exit__()
            raise

    def __exit__(self, *exception) -> None:
        for owner, leaf, original in reversed(self.swapped):
            owner._parameters[leaf] = original
        self.swapped = []


def autograd_statistics(
    module: nn.Module, energy: Callable[[], Tensor], weights: Tensor | None = None
) -> dict[str, Tensor]:
    """``{name: batch average of -dE/dtheta}`` for every parameter of ``module``, by autograd.

    ``energy()`` returns the module's ``(B,)`` energy term on detached states; ``weights`` ``(B,)``
    (summing to one) weigh the rows instead of the plain average. Parameters the term does not
    use get zeros.
    """
    names = [name for name, _ in module.named_parameters()]
    if not names:
        return {}
    leaves = {name: p.detach().requires_grad_() for name, p in module.named_parameters()}
    with torch.enable_grad(), substituted(module, leaves):
        term = energy()
        total = term.mean() if weights is None else weights.to(term.dtype) @ term
        grads = torch.autograd.grad(-total, list(leaves.values()), allow_unused=True)
    return {
        name: torch.zeros_like(leaves[name]) if g is None else g.detach() for name, g in zip(names, grads)
    }
