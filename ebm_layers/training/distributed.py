"""Training on several processes with ``torch.distributed``: every rank keeps its own fantasy
particles, gradients are averaged by ``DistributedDataParallel``.

What each rank holds: the same parameters and optimizer state (DDP broadcasts rank 0's parameters
once, then every step applies the same averaged gradient); its own shard of every batch; its own
persistent particles and sampler generator (seeded from a base seed and the rank), never
broadcast. Running buffers that must agree (centering offsets, sparsity means) are averaged over
the ranks explicitly, and the divergence guard decides on all ranks together, so a rank whose
statistics turn non-finite stops the whole run with the error instead of leaving the others
waiting in an all-reduce.
"""

from __future__ import annotations

import warnings
from typing import TYPE_CHECKING

import torch
import torch.distributed as dist
from torch import Tensor
from torch.nn.parallel import DistributedDataParallel

if TYPE_CHECKING:  # the objective imports the collectives below
    from .objective import TwoPhaseObjective

__all__ = [
    "current_world",
    "on_any_rank",
    "rank_average",
    "rank_generator",
    "rank_states",
    "wrap_distributed",
]

# Odd 64-bit constant (the golden ratio's fraction, common practice for mixing seeds, no source):
# distinct ranks of one base seed get seeds far apart.
_SEED_STRIDE = 0x9E3779B97F4A7C15


def current_world() -> tuple[int, int]:
    """``(rank, world size)``, or ``ValueError`` when no process group is initialised."""
    if not (dist.is_available() and dist.is_initialized()):
        raise ValueError(
            "torch.distributed is not initialised: call torch.distributed.init_process_group first "
            "(torchrun sets up what it needs), or train without distributed=True"
        )
    return dist.get_rank(), dist.get_world_size()


def rank_generator(seed: int, rank: int | None = None) -> torch.Generator:
    """A ``torch.Generator`` for one rank, seeded from ``seed`` and ``rank`` (default: this
    process's rank), so that every rank's particles draw different numbers, reproducibly."""
    if isinstance(seed, bool) or not isinstance(seed, int):
        raise TypeError(f"seed must be an int, got {type(seed).__name__}")
    rank = current_world()[0] if rank is None else rank
    return torch.Generator().manual_seed((seed + rank * _SEED_STRIDE) % 2**63)


def wrap_distributed(
    objective: TwoPhaseObjective, *, process_group: dist.ProcessGroup | None = None
) -> DistributedDataParallel:
    """Wrap ``objective`` for data-parallel training: call the wrapper instead of the objective.

    DDP all-reduces gradients only for a loss that comes out of its own forward, so it wraps the
    objective (the model alone would compute no statistics), with ``broadcast_buffers=False``: the
    default would overwrite every rank's particles and generator state with rank 0's. The buffers
    are also put back after DDP's start-up broadcast. Sets ``objective.process_group``, which makes
    the objective average its running buffers over the ranks and run its divergence guard on all
    ranks together.

    Examples::

        ddp = el.wrap_distributed(objective)
        loss = ddp(shard)        # this rank's (B, n_0) share of the batch
        loss.backward()          # the gradient is averaged over the ranks
        optimizer.step()
    """
    from .objective import TwoPhaseObjective

    if not isinstance(objective, TwoPhaseObjective):
        raise TypeError(f"objective must be a TwoPhaseObjective, got {type(objective).__name__}")
    current_world()
    own = {name: buffer.detach().clone() for name, buffer in objective.named_buffers()}
    with warnings.catch_warnings():
        # Newer torch deprecates broadcast_buffers in favour of an option that still broadcasts at
        # start-up; broadcast_buffers=False stays the way to keep buffers rank-local (torch >= 2.2).
        warnings.filterwarnings("ignore", message=".*broadcast_buffers.*", category=FutureWarning)
        wrapped = DistributedDataParallel(objective, broadcast_buffers=False, process_group=process_group)
    with torch.no_grad():
        for name, buffer in objective.named_buffers():
            buffer.copy_(own[name])
    objective.process_group = process_group if process_group is not None else dist.group.WORLD
    return wrapped


def rank_states(objective: TwoPhaseObjective) -> list[dict[str, Tensor]]:
    """Every rank's buffers of ``objective`` (particles, generator states, ...), in rank order.

    A collective call: every rank must make it. Checkpoints keep the list so that each rank
    resumes its own particles and generators."""
    current_world()
    names = {name for name, _ in objective.named_buffers()}
    own = {key: value for key, value in objective.state_dict().items() if key in names}
    gathered: list[dict[str, Tensor] | None] = [None] * dist.get_world_size(objective.process_group)
    dist.all_gather_object(gathered, own, group=objective.process_group)
    return gathered


def on_any_rank(flag: bool, process_group: dist.ProcessGroup) -> bool:
    """Whether ``flag`` holds on any rank (a collective call on ``process_group``)."""
    tensor = torch.tensor([1.0 if flag else 0.0])
    dist.all_reduce(tensor, op=dist.ReduceOp.MAX, group=process_group)
    return bool(tensor.item())


def rank_average(tensors: list[Tensor], process_group: dist.ProcessGroup) -> list[Tensor]:
    """The average of each tensor over the ranks, in one all-reduce (a collective call)."""
    flat = torch.cat([t.reshape(-1) for t in tensors])
    dist.all_reduce(flat, group=process_group)
    flat /= dist.get_world_size(process_group)
    return [piece.view_as(t) for piece, t in zip(flat.split([t.numel() for t in tensors]), tensors)]
