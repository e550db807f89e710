"""Explicit random number generators: every random draw in the library goes through one."""

from __future__ import annotations

import torch

__all__ = ["resolve_generator"]


def resolve_generator(generator: torch.Generator | None) -> torch.Generator:
    """Return ``generator``, or a private CPU generator seeded once from the global RNG.

    Seeding from the global RNG means ``torch.manual_seed`` still makes a run repeatable when
    no generator is passed.
    """
    if generator is None:
        seed = int(torch.randint(0, 2**62, (), dtype=torch.int64))
        return torch.Generator().manual_seed(seed)
    if not isinstance(generator, torch.Generator):
        raise TypeError(f"generator must be a torch.Generator or None, got {type(generator).__name__}")
    return generator
