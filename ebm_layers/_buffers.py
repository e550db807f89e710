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
    buffers = module._buffers  # read directly: Module.__getattr__ costs ~1 us per name on the hot path
    return [buffers[f"{prefix}_{i}"] for i in range(start, start + count)]


def set_buffer_family(module: nn.Module, prefix: str, tensors: Sequence[Tensor], start: int = 0) -> None:
    """Replace the registered buffers ``<prefix>_<start>``, ... with ``tensors`` (no copy)."""
    buffers = module._buffers  # written directly: Module.__setattr__ costs ~4 us per buffer per sweep
    for i, tensor in enumerate(tensors, start=start):
        name = f"{prefix}_{i}"
        if name not in buffers:
            raise KeyError(f"{type(module).__name__} has no buffer {name}")
        buffers[name] = tensor
