"""Replica exchange for persistent chains: copies of every particle at higher temperatures, where
the model is flattened towards independent units, swap states with their neighbours."""

from __future__ import annotations

import torch
from torch import Tensor

from .._buffers import buffer_family, register_buffer_family, set_buffer_family
from .._checks import check_size
from ..model.energy_model import EnergyModel, bias_from_data
from ..model.parameters import substituted
from .gibbs import PersistentSampler, gibbs_sweep

__all__ = ["ReplicaExchangeSampler"]


class ReplicaExchangeSampler(PersistentSampler):
    """Persistent chains with replica exchange ("Tempered Markov Chain Monte Carlo for training of
    Restricted Boltzmann Machines", AISTATS 2010).

    Each of the ``P`` particles has ``K - 1`` hotter copies, one per inverse temperature
    ``beta_1 < ... < beta_K = 1`` on the path ``E_beta = (1 - beta) E_A + beta E`` from a base
    model ``A`` of independent units (visible biases the log-odds of ``data``'s base rates, or
    zero; hidden biases zero) to the model, as in annealed importance sampling. A call advances
    every replica by ``sweeps`` Gibbs sweeps at its own temperature, each sweep followed by
    Metropolis swaps between neighbouring temperatures (even pairs after even sweeps, odd pairs
    after odd ones), accepted with probability ``min(1, exp((beta_k - beta_k+1)(D_k - D_k+1)))``,
    ``D = E - E_A``. Each step leaves the product of the replicas' distributions invariant, so the
    ``beta = 1`` replica samples the model; it is what ``particles``, ``statistics()`` and
    ``sample()`` show.

    Args:
        model: the :class:`EnergyModel`.
        num_particles: ``P``, the chains at ``beta = 1``.
        sweeps, generator, init: as in :class:`PersistentSampler`.
        probabilities: as in :class:`PersistentSampler`: ``statistics()`` uses the conditional
            probabilities of the last colour class given the rest of the ``beta = 1`` replica.
        num_replicas: ``K``, temperatures per particle (``K = 1`` is a plain persistent sampler).
        data: ``(N, n_0)`` data for the base model's visible biases (default: zero biases).
        inverse_temperatures: ``K`` increasing values in ``(0, 1]`` ending at 1 (default: evenly
            spaced, ``1/K, 2/K, ..., 1``).

    Attributes:
        hot_<i>: buffer ``((K - 1) P, n_i)``: the hotter replicas of layer ``i``, coolest last.
        inverse_temperatures: buffer ``(K,)`` float64.
        swap_attempts, swap_accepts: buffers ``(K - 1,)`` float64, per neighbouring pair.
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
        num_replicas: int = 10,
        data: Tensor | None = None,
        inverse_temperatures: Tensor | None = None,
    ) -> None:
        super().__init__(model, num_particles, sweeps, generator, init, probabilities)
        num_replicas = check_size("num_replicas", num_replicas)
        if inverse_temperatures is None:
            betas = torch.arange(1, num_replicas + 1, dtype=torch.float64) / num_replicas
        else:
            betas = torch.as_tensor(inverse_temperatures, dtype=torch.float64).detach().clone()
            steps = betas[1:] - betas[:-1]
            if betas.shape != (num_replicas,) or betas[0] <= 0 or betas[-1] != 1 or bool((steps <= 0).any()):
                raise ValueError(
                    f"inverse_temperatures must be {num_replicas} increasing values in (0, 1] ending at 1, "
                    f"got {betas.tolist()}"
                )
        base = torch.zeros(model.sizes[0], dtype=model.dtype)
        if data is not None and 0 in model.observed and hasattr(model.layers[0], "bias"):
            base = bias_from_data(model.layers[0], model.clamped(model.checked("data", data))[0])
        self.register_buffer("inverse_temperatures", betas)
        self.register_buffer("base_bias", base)
        self.register_buffer("swap_attempts", torch.zeros(num_replicas - 1, dtype=torch.float64))
        self.register_buffer("swap_accepts", torch.zeros(num_replicas - 1, dtype=torch.float64))
        self.register_buffer("sweeps_done", torch.zeros((), dtype=torch.int64))
        register_buffer_family(self, "hot", self._fresh_hot())

    @torch.no_grad()
    def reset(self) -> None:
        """Draw fresh particles from ``init``, and fresh uniform hotter replicas."""
        super().reset()
        if hasattr(self, "hot_0"):  # not yet during PersistentSampler.__init__
            set_buffer_family(self, "hot", self._fresh_hot())

    def _fresh_hot(self) -> list[Tensor]:
        """New states of the hotter replicas, one ``(rows, n_i)`` per layer, from the layers' own draws."""
        return [layer.initial_states(self._hot_rows, self.generator) for layer in self.model.layers]

    @property
    def _hot_rows(self) -> int:
        """Rows of the hotter replicas, stacked above the model's particles."""
        return (self.num_replicas - 1) * self.num_particles

    @property
    def num_replicas(self) -> int:
        return self.inverse_temperatures.numel()

    @property
    def acceptance_rates(self) -> Tensor:
        """Share of accepted swaps per neighbouring pair of temperatures ``(K - 1,)`` (NaN before any)."""
        return self.swap_accepts / self.swap_attempts

    @torch.no_grad()
    def _advance(self, sweeps: int, keep_probabilities: bool = False) -> dict[int, Tensor]:
        model, count = self.model, self.num_particles
        hot = buffer_family(self, "hot", len(model.sizes))
        states = [torch.cat([h, x]).to(model.dtype) for h, x in zip(hot, self.particles)]
        # E_beta = beta * E + (1 - beta) * E_base: the couplings' inputs scaled by beta, the layers'
        # parameters interpolated towards the base model's; one sweep per replica.
        base = self._base_parameters()
        target = {name: p.detach() for name, p in model.named_parameters() if name in base}
        tempered = [
            {name: beta * value + (1.0 - beta) * base[name] for name, value in target.items()}
            for beta in self.inverse_temperatures.tolist()
        ]
        for _ in range(sweeps):
            for k, (beta, parameters) in enumerate(zip(self.inverse_temperatures.tolist(), tempered)):
                rows = [x[k * count : (k + 1) * count] for x in states]
                gibbs_sweep(model, rows, self.generator, parameters=parameters, inverse_temperature=beta)
                for x, new in zip(states, rows):
                    x[k * count : (k + 1) * count] = new
            self._swap(states)
        rows = self._hot_rows
        set_buffer_family(self, "hot", [x[:rows] for x in states])
        self._set_particles([x[rows:] for x in states])
        if not keep_probabilities:
            return {}
        # After the swaps the beta = 1 replica is a draw of the model: its last class's conditional
        # probabilities given the rest have the same expectation as its states (Rao-Blackwell).
        schedule, particles = model.schedule, self.particles
        return {
            i: model.layers[i].mean(model.input_or_zeros(particles, i))
            for i in schedule.classes[-1]
            if i not in schedule.unitwise
        }

    def _base_parameters(self) -> dict[str, Tensor]:
        """The base model's layer parameters (:meth:`EnergyModel.base_parameters`), layer 0's bias
        at ``base_bias``."""
        base = self.model.base_parameters()
        if hasattr(self.model.layers[0], "bias"):  # tied copies: the free tensor behind it
            base.update(self.model.layer_values(0, {"bias": self.base_bias}))
        return base

    def _base_energy(self, states: list[Tensor]) -> Tensor:
        """The base model's energy ``(B,)``: the layers' own terms under the base parameters."""
        with substituted(self.model, self._base_parameters()):
            return sum(layer.energy(x) for layer, x in zip(self.model.layers, states))

    def _swap(self, states: list[Tensor]) -> None:
        """Metropolis swaps between neighbouring temperatures, in place on ``states``."""
        count, replicas = self.num_particles, self.num_replicas
        first = int(self.sweeps_done) % 2
        self.sweeps_done += 1
        if first >= replicas - 1:
            return
        lower, upper = slice(first, replicas - 1, 2), slice(first + 1, replicas, 2)  # the pairs (k, k + 1)
        gap = (
            (self.model.joint_energy(states) - self._base_energy(states))
            .to(torch.float64)
            .view(replicas, count)
        )
        betas = self.inverse_temperatures
        log_ratio = (betas[lower] - betas[upper])[:, None] * (gap[lower] - gap[upper])  # (pairs, P)
        uniform = torch.rand(log_ratio.shape, dtype=torch.float64, generator=self.generator)
        accept = self._accept(log_ratio, uniform)
        self.swap_attempts[lower] += count
        self.swap_accepts[lower] += accept.sum(1).to(torch.float64)
        order = torch.arange(replicas * count).view(replicas, count)  # row r of the result: row order[r]
        below, above = order[lower], order[upper]
        order[lower], order[upper] = torch.where(accept, above, below), torch.where(accept, below, above)
        order = order.view(-1)
        for i, x in enumerate(states):
            states[i] = x.index_select(0, order)

    @staticmethod
    def _accept(log_ratio: Tensor, uniform: Tensor) -> Tensor:
        """Metropolis: accept with probability ``min(1, exp(log_ratio))``."""
        return torch.log(uniform) < log_ratio

    def extra_repr(self) -> str:
        return f"{super().extra_repr()}, num_replicas={self.num_replicas}"
