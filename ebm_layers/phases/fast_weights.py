"""Fast weights for persistent chains: a quickly decaying addition to the parameters, used only by
the fantasy particles, that pushes them out of the modes they have just visited."""

from __future__ import annotations

import torch
from torch import Tensor

from .._buffers import buffer_family, register_buffer_family
from .._checks import check_range
from ..model.energy_model import EnergyModel
from ..model.statistics import Statistics
from .gibbs import PersistentSampler

__all__ = ["FastWeightsSampler"]


class FastWeightsSampler(PersistentSampler):
    """Persistent chains that sample with the model's parameters plus fast weights ("Using Fast
    Weights to Improve Persistent Contrastive Divergence", ICML 2009).

    In that paper the fast weights take the same steps as the ordinary ("slow") ones and decay
    towards zero, so they hold the last few steps' worth of change. Here they follow the update
    the optimizer actually applied, whatever the optimizer: every call of :meth:`statistics`
    (once per training step) first takes the change of every bias and weight since the previous
    call, ``delta``, and sets ``fast <- fast_decay * fast + fast_scale * delta``. Under SGD that
    is the paper's rule; under Adam the fast weights move by Adam's steps, not by the raw
    gradient. Any change of the parameters between two calls counts as a step, so after editing
    the weights by hand call :meth:`reset_fast_weights`.

    Only the particles see the fast weights; the model, its statistics and every evaluation use
    the ordinary parameters. The chains therefore do not sample the model exactly while the fast
    weights are non-zero: they are a mixing aid for training, not a sampler for evaluation (use
    :class:`PersistentSampler` for that). ``forward`` and ``sample`` leave the fast weights as
    they are.

    Args:
        model, num_particles, sweeps, generator, init, probabilities: as in :class:`PersistentSampler`.
        fast_scale: the fast step as a multiple of the applied step (1: the same size, as in the paper).
        fast_decay: factor in [0, 1) applied to the fast weights at every step (0.95 in the paper).

    Attributes:
        fast_<j>: buffer shaped like the ``j``-th of ``model.named_parameters()``, its fast weight.
        last_<j>: buffers, the parameters at the previous call.
        following: 0-d bool buffer, whether ``last_*`` hold the parameters of a previous call.
    """

    def __init__(
        self,
        model: EnergyModel,
        num_particles: int = 100,
        sweeps: int = 1,
        generator: torch.Generator | None = None,
        init: str | Tensor = "uniform",
        probabilities: bool = False,
        *,
        fast_scale: float = 1.0,
        fast_decay: float = 0.95,
    ) -> None:
        super().__init__(model, num_particles, sweeps, generator, init, probabilities)
        fast_scale = check_range("fast_scale", fast_scale, 0.0)
        fast_decay = check_range("fast_decay", fast_decay, 0.0, 1.0)
        self.fast_scale, self.fast_decay = fast_scale, fast_decay
        zeros = [torch.zeros_like(parameter.detach()) for parameter in model.parameters()]
        register_buffer_family(self, "fast", zeros)
        register_buffer_family(self, "last", [z.clone() for z in zeros])
        self.register_buffer("following", torch.tensor(False))
        self._register_load_state_dict_pre_hook(_rename_old_buffers, with_module=True)

    def _named(self) -> list[tuple[str, Tensor, Tensor, Tensor]]:
        """``(name, parameter, fast, last)`` of every model parameter."""
        named = list(self.model.named_parameters())
        fast, last = buffer_family(self, "fast", len(named)), buffer_family(self, "last", len(named))
        return [(name, parameter, f, s) for (name, parameter), f, s in zip(named, fast, last)]

    def _sweep_parameters(self) -> dict[str, Tensor]:
        return {name: parameter.detach() + fast for name, parameter, fast, _ in self._named()}

    @torch.no_grad()
    def statistics(self, v: Tensor | None = None, **kwargs) -> Statistics:
        """Move the fast weights by the parameters' change since the last call, then advance the
        chains by ``sweeps`` sweeps and return their :class:`Statistics` (detached)."""
        following = bool(self.following)
        for _, parameter, fast, last in self._named():
            if following:
                fast.mul_(self.fast_decay).add_(parameter - last, alpha=self.fast_scale)
            last.copy_(parameter)
        self.following.fill_(True)
        return super().statistics(v, **kwargs)

    @torch.no_grad()
    def reset_fast_weights(self) -> None:
        """Set the fast weights to zero and forget the last parameters (the next call takes no step)."""
        for _, _, fast, _ in self._named():
            fast.zero_()
        self.following.fill_(False)

    def extra_repr(self) -> str:
        return f"{super().extra_repr()}, fast_scale={self.fast_scale}, fast_decay={self.fast_decay}"


def _rename_old_buffers(module: FastWeightsSampler, state_dict, prefix: str, *args) -> None:
    """Checkpoints written before the buffers were keyed by parameter (``fast_bias_<i>``,
    ``fast_weight_<k>``, ...) load into ``fast_<j>`` / ``last_<j>``; a lateral coupling's old full
    weight becomes the strict upper triangle of its free matrix."""
    names = [name for name, _ in module.model.named_parameters()]
    for kind in ("fast", "last"):
        for old_key in [key for key in state_dict if key.startswith(f"{prefix}{kind}_bias_")]:
            i = old_key.rsplit("_", 1)[1]
            state_dict[f"{prefix}{kind}_{names.index(f'layers.{i}.bias')}"] = state_dict.pop(old_key)
        for old_key in [key for key in state_dict if key.startswith(f"{prefix}{kind}_weight_")]:
            k = old_key.rsplit("_", 1)[1]
            j = next(j for j, name in enumerate(names) if name.startswith(f"couplings.{k}."))
            value = state_dict.pop(old_key)
            state_dict[f"{prefix}{kind}_{j}"] = value.triu(1) if "parametrizations" in names[j] else value
