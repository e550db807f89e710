"""Families of numbered buffers (``particles_0``, ``particles_1``, ...): one tensor per layer or per
parameter, registered, read and replaced the same way everywhere, so ``state_dict()`` keys stay
flat and stable."""

from __future__ import annotations

from collections.abc import Iterable, Sequence

from torch import Tensor, nn

__all__ = ["buffer_family", "register_buffer_family", "set_buffer_family"]


def register_buffer_family(module: nn.Module, prefix: str, tensors: Iterable[Tensor], start: int = 0) -> None:
    """Register ``tensors`` as buffers ``<prefix>_<start>``, ``<prefix>_<start + 1>``, ..."""
    for i, tensor in enumerate(tensors, start=start):
        module.register_buffer(f"{prefix}_{i}", tensor)


def buffer_family(module: nn.Module, prefix: str, count: int, start: int = 0) -> list[Tensor]:
    """The buffers ``<prefix>_<start>`` ... ``<prefix>_<start + count - 1>``, in order."""
    return [getattr(module, f"{prefix}_{i}") for i in range(start, start + count)]


def set_buffer_family(module: nn.Module, prefix: str, tensors: Sequence[Tensor], start: int = 0) -> None:
    """Replace the buffers ``<prefix>_<start>``, ... with ``tensors`` (no copy)."""
    for i, tensor in enumerate(tensors, start=start):
        setattr(module, f"{prefix}_{i}", tensor)
