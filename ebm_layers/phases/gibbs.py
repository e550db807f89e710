"""Block Gibbs sampling: one sweep (``gibbs_sweep``), fantasy particles that persist in buffers
(``PersistentSampler``), and persistent hidden states per training example (``DataParticles``)."""

from __future__ import annotations

import math
from collections.abc import Collection, Sequence

import torch
from torch import Tensor, nn
from tqdm.auto import tqdm

from .._checks import check_batch, check_count, check_example_index, check_model, check_size
from .._random import resolve_generator, track_generator_state
from ..model import functional as F
from ..model.energy_model import EnergyModel
from ..model.statistics import Statistics

__all__ = ["DataParticles", "PersistentSampler", "gibbs_sweep"]


@torch.no_grad()
def gibbs_sweep(
    model: EnergyModel,
    states: list[Tensor],
    generator: torch.Generator | F.Uniforms,
    *,
    clamped: Collection[int] = (),
    keep_probabilities: bool = False,
    biases: Sequence[Tensor] | None = None,
    inverse_temperature: float | Tensor = 1.0,
    weights: Sequence[Tensor] | None = None,
) -> dict[int, Tensor]:
    """Advance ``states`` (one ``(B, n_i)`` per layer, replaced in the list) by one block Gibbs sweep.

    The colour classes of ``model.schedule`` are visited in turn; every layer of a class is drawn
    from the states before the class update, ``schedule.unitwise`` layers unit by unit. Layers in
    ``clamped`` keep their states. ``biases`` (one per layer) replace the model's and
    ``inverse_temperature`` (a number, or a ``(B,)`` tensor: one per chain, with ``(B, n_i)``
    biases to match) multiplies every logit: the sweep then samples
    ``exp(-inverse_temperature * E'(x))`` with ``E'`` the model's energy under those biases (the
    intermediate distributions of annealing); ``weights`` (one per coupling) replace the model's
    weights likewise. Returns the conditional probabilities of the last
    class's layers without lateral couplings when ``keep_probabilities``, else an empty dict.
    The sweep's uniforms are drawn in one block from ``generator`` (or taken from ``Uniforms``).
    """
    biases = model.biases() if biases is None else biases
    weights = model.weights() if weights is None else weights
    edges = model.edges
    classes, unitwise = model.schedule.classes, model.schedule.unitwise
    if not isinstance(generator, F.Uniforms):  # every uniform of the sweep in one block
        drawn = [layer for layers in classes for layer in layers if layer not in clamped]
        batch = next(x.shape[0] for x in states if x is not None)
        count = batch * sum(model.sizes[layer] for layer in drawn)
        generator = F.Uniforms(generator, model.dtype, count)

    scaled = isinstance(inverse_temperature, Tensor) or inverse_temperature != 1.0

    def conditional(logits: Tensor) -> Tensor:
        if not scaled:
            return torch.sigmoid(logits)
        factor = inverse_temperature
        if isinstance(factor, Tensor):  # one per chain, over a layer (B, n) or one unit's (B,) logits
            factor = factor.view(-1, *(1,) * (logits.ndim - 1))
        return torch.sigmoid(factor * logits)

    def draw(logits: Tensor) -> Tensor:
        return F.sample_bernoulli(conditional(logits), generator)

    probabilities: dict[int, Tensor] = {}
    for c, layers in enumerate(classes):
        last = keep_probabilities and c == len(classes) - 1
        new = {}
        for layer in layers:
            if layer in clamped:
                continue
            if last and layer not in unitwise:
                probabilities[layer] = conditional(F.layer_logits(states, layer, biases, weights, edges))
                new[layer] = F.sample_bernoulli(probabilities[layer], generator)
            else:
                new[layer] = F.update_layer(
                    states, layer, biases, weights, edges, draw, unitwise=layer in unitwise
                )
        for layer, x in new.items():
            states[layer] = x
    return probabilities


class PersistentSampler(nn.Module):
    """Persistent Markov chains (fantasy particles) under the model, advanced by block Gibbs sweeps.

    One sweep visits the colour classes of ``model.schedule`` in turn; the layers of a class
    are mutually uncoupled and are drawn at once from the current states of the others. A layer
    with a lateral coupling is drawn one unit at a time. Each step leaves the model's Boltzmann
    distribution invariant, so the chains sample it exactly in the long run. Between calls the
    chains persist, as in persistent contrastive divergence ("Training Restricted Boltzmann
    Machines using Approximations to the Likelihood Gradient", ICML 2008).

    Args:
        model: the :class:`EnergyModel` to sample; registered as a submodule, so ``.to()`` and
            ``state_dict()`` cover it together with the particles.
        num_particles: number of chains ``P``.
        sweeps: sweeps per call of ``sampler()`` / ``statistics()``.
        generator: the ``torch.Generator`` of every draw (``None``: a private one seeded from
            the global RNG). Its state is saved in ``state_dict()`` and restored on load.
        init: ``"uniform"`` (every unit 1 with probability 1/2), or a ``(P, n_0)`` tensor of
            visible probabilities in [0, 1] (binary data starts the chains exactly there; the
            other layers start uniform).
        probabilities: ``statistics()`` uses, for the last class of the last sweep, the
            conditional probabilities instead of the binary states (Rao-Blackwellised: the same
            expectation, lower variance). Layers with lateral couplings keep binary states.

    Shape:
        - ``sampler()``, ``particles``: a list with one ``(P, n_i)`` tensor per layer, detached.
          These are the buffers themselves: a sweep replaces them and never writes into them, so
          a returned list keeps its values, but writing into it changes the chains.
        - ``sample(num_samples)``: one ``(num_samples, n_i)`` tensor per layer.

    Attributes:
        particles_<i>: buffer ``(P, n_i)`` of layer ``i``'s current states (binary).
        generator_state: ``uint8`` buffer, the generator's state when ``state_dict()`` was taken.

    Examples::

        >>> import ebm_layers as el
        >>> g = torch.Generator().manual_seed(0)
        >>> sampler = el.PersistentSampler(el.rbm(6, 3, generator=g), num_particles=10, generator=g)
        >>> [x.shape for x in sampler()]
        [torch.Size([10, 6]), torch.Size([10, 3])]
    """

    generator_state: Tensor

    def __init__(
        self,
        model: EnergyModel,
        num_particles: int = 100,
        sweeps: int = 1,
        generator: torch.Generator | None = None,
        init: str | Tensor = "uniform",
        probabilities: bool = False,
    ) -> None:
        super().__init__()
        check_model(model)
        self.num_particles = check_size("num_particles", num_particles)
        self.sweeps = check_size("sweeps", sweeps)
        if isinstance(init, str):
            if init != "uniform":
                raise ValueError(f"init must be 'uniform' or a (num_particles, n_0) tensor, got {init!r}")
        else:
            init = check_batch("init", init, model.sizes[0], batch=self.num_particles).detach().clone()
        if not isinstance(probabilities, bool):
            raise TypeError(f"probabilities must be a bool, got {probabilities!r}")
        self.model = model
        self.generator = resolve_generator(generator)
        self.init = init
        self.probabilities = probabilities
        track_generator_state(self)
        for i, n in enumerate(model.sizes):
            self.register_buffer(f"particles_{i}", torch.empty(self.num_particles, n, dtype=model.dtype))
        self.reset()

    @property
    def particles(self) -> list[Tensor]:
        """The current states, one ``(P, n_i)`` tensor per layer (not advanced)."""
        return [getattr(self, f"particles_{i}") for i in range(len(self.model.layers))]

    def _set_particles(self, states: Sequence[Tensor]) -> None:
        for i, x in enumerate(states):
            setattr(self, f"particles_{i}", x)

    @torch.no_grad()
    def reset(self) -> None:
        """Draw fresh particles from ``init`` with the sampler's generator."""
        dtype = self.model.dtype
        probabilities = [torch.full_like(x, 0.5, dtype=dtype) for x in self.particles]
        if isinstance(self.init, Tensor):
            probabilities[0] = self.init.to(dtype)
        self._set_particles([torch.bernoulli(p, generator=self.generator) for p in probabilities])

    @torch.no_grad()
    def _advance(self, sweeps: int, keep_probabilities: bool = False) -> dict[int, Tensor]:
        # The model may have been converted on its own (e.g. model.double()): follow its dtype.
        states = [x.to(self.model.dtype) for x in self.particles]
        probabilities: dict[int, Tensor] = {}
        replaced = self._sweep_parameters()
        for s in range(sweeps):
            last = keep_probabilities and s == sweeps - 1
            probabilities = gibbs_sweep(
                self.model, states, self.generator, keep_probabilities=last, **replaced
            )
        self._set_particles(states)
        return probabilities

    def _sweep_parameters(self) -> dict[str, list[Tensor]]:
        """Biases or weights the chains use in place of the model's (none here; see
        :class:`~ebm_layers.fast_weights.FastWeightsSampler`)."""
        return {}

    def forward(self) -> list[Tensor]:
        """Advance every chain by ``sweeps`` sweeps; return the states, one ``(P, n_i)`` per layer."""
        self._advance(self.sweeps)
        return self.particles

    @torch.no_grad()
    def statistics(self) -> Statistics:
        """Advance by ``sweeps`` sweeps and return the particles' :class:`Statistics` (detached)."""
        probabilities = self._advance(self.sweeps, self.probabilities)
        states = [probabilities.get(i, x) for i, x in enumerate(self.particles)]
        return Statistics.from_states(states, self.model.edges)

    @torch.no_grad()
    def sample(
        self, num_samples: int, *, burn_in: int = 1000, thin: int = 10, progress: bool = True
    ) -> list[Tensor]:
        """Draw ``num_samples`` joint states from the model with the persistent chains.

        Runs ``burn_in`` sweeps (default 1,000: enough for the small models measured here, not a
        guarantee; check with :func:`~ebm_layers.diagnostics.sampler_traces` and
        :func:`~ebm_layers.diagnostics.potential_scale_reduction`), then records all ``P``
        particles every ``thin`` sweeps (default 10) until ``num_samples`` states are collected
        (the chains are advanced and stay advanced). Samples from one chain are correlated;
        raise ``thin`` to make them less so. ``progress`` shows a tqdm bar, as everywhere.

        Returns:
            one ``(num_samples, n_i)`` tensor per layer, binary, detached.
        """
        num_samples = check_size("num_samples", num_samples)
        burn_in = check_count("burn_in", burn_in)
        thin = check_size("thin", thin)
        rounds = math.ceil(num_samples / self.num_particles)
        recorded: list[list[Tensor]] = []
        with tqdm(total=burn_in + rounds * thin, desc="sampling", unit="sweep", disable=not progress) as bar:
            self._advance(burn_in)
            bar.update(burn_in)
            for _ in range(rounds):
                self._advance(thin)
                bar.update(thin)
                recorded.append(self.particles)
        return [torch.cat(layer)[:num_samples] for layer in zip(*recorded)]

    def extra_repr(self) -> str:
        init = "uniform" if isinstance(self.init, str) else f"tensor{tuple(self.init.shape)}"
        return (
            f"num_particles={self.num_particles}, sweeps={self.sweeps}, init={init}, "
            f"probabilities={self.probabilities}"
        )


class DataParticles(nn.Module):
    """Data-specific persistent particles: one hidden configuration per training example.

    Each call clamps the visible layer to a batch of examples, advances those examples' own
    hidden states by ``sweeps`` block Gibbs sweeps and stores them back: a positive phase that
    samples the posterior of deep models instead of approximating it by mean field, with chains
    that persist from one visit of an example to the next (useful for full-batch learning on
    small data, where every example is visited at every step).

    Args:
        model: the :class:`EnergyModel`; registered as a submodule.
        num_examples: number of training examples ``N``; they are addressed by index ``0..N-1``.
        sweeps: sweeps per visit of an example.
        generator: the ``torch.Generator`` of every draw (``None``: a private one seeded from
            the global RNG). Its state is saved in ``state_dict()`` and restored on load.

    Shape:
        - ``statistics(v, index)``: ``v`` ``(B, n_0)``, ``index`` ``(B,)`` integer; returns the
          :class:`Statistics` of the clamped batch with its updated hidden states (detached).
          An index repeated within a batch is stored once (the last copy).

    Attributes:
        states_<i>: ``uint8`` buffer ``(N, n_i)`` of the hidden states of layer ``i >= 1``, drawn
            uniformly at construction.
        generator_state: ``uint8`` buffer, the generator's state when ``state_dict()`` was taken.

    Examples::

        >>> import ebm_layers as el
        >>> g = torch.Generator().manual_seed(0)
        >>> particles = el.DataParticles(el.rbm(6, 3, generator=g), num_examples=50, generator=g)
        >>> v = torch.bernoulli(torch.full((4, 6), 0.5), generator=g)
        >>> particles.statistics(v, torch.tensor([0, 7, 8, 49])).pairs[0].shape
        torch.Size([6, 3])
    """

    generator_state: Tensor

    def __init__(
        self, model: EnergyModel, num_examples: int, sweeps: int = 1, generator: torch.Generator | None = None
    ) -> None:
        super().__init__()
        check_model(model)
        self.num_examples = check_size("num_examples", num_examples)
        self.sweeps = check_size("sweeps", sweeps)
        self.model = model
        self.generator = resolve_generator(generator)
        track_generator_state(self)
        for i, n in enumerate(model.sizes[1:], start=1):
            uniform = torch.full((self.num_examples, n), 0.5)
            self.register_buffer(
                f"states_{i}", torch.bernoulli(uniform, generator=self.generator).to(torch.uint8)
            )

    @torch.no_grad()
    def statistics(self, v: Tensor, index: Tensor) -> Statistics:
        """Clamp ``v`` ``(B, n_0)``, advance examples ``index`` ``(B,)``, return their Statistics."""
        model = self.model
        v = check_batch("v", v, model.sizes[0], dtype=model.dtype)
        index = check_example_index("index", index, self.num_examples, v.shape[0])
        stored = [getattr(self, f"states_{i}") for i in range(1, len(model.sizes))]
        states = [v, *(x[index].to(model.dtype) for x in stored)]
        for _ in range(self.sweeps):
            gibbs_sweep(model, states, self.generator, clamped={0})
        for buffer, x in zip(stored, states[1:]):
            buffer[index] = x.to(torch.uint8)
        return Statistics.from_states(states, model.edges)

    def forward(self, v: Tensor, index: Tensor) -> Statistics:
        return self.statistics(v, index)

    def extra_repr(self) -> str:
        return f"num_examples={self.num_examples}, sweeps={self.sweeps}"
