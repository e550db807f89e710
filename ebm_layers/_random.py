"""Explicit random number generators: every random draw in the library goes through one."""

from __future__ import annotations

import torch

__all__ = ["resolve_generator", "track_generator_state"]


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


def track_generator_state(module: torch.nn.Module) -> None:
    """Keep ``module.generator``'s state in a ``generator_state`` buffer across ``state_dict()``.

    ``state_dict()`` records the generator's current state in the buffer; ``load_state_dict()``
    continues the generator from the loaded state when the dict carries one, so a resumed run
    draws the same numbers as an uninterrupted one.
    """
    module.register_buffer("generator_state", module.generator.get_state())
    module._loading_generator = False
    module.register_state_dict_pre_hook(_record_generator_state)
    module.register_load_state_dict_pre_hook(_note_generator_state)
    module.register_load_state_dict_post_hook(_restore_generator_state)


def _record_generator_state(module: torch.nn.Module, prefix: str, keep_vars: bool) -> None:
    module.generator_state = module.generator.get_state()


def _note_generator_state(module: torch.nn.Module, state_dict, prefix: str, *args) -> None:
    module._loading_generator = prefix + "generator_state" in state_dict


def _restore_generator_state(module: torch.nn.Module, incompatible_keys) -> None:
    if module._loading_generator:
        module.generator.set_state(module.generator_state)
    module._loading_generator = False
