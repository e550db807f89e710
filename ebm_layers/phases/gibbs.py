"""Block Gibbs sampling: one sweep (``gibbs_sweep``), fantasy particles that persist in buffers
(``PersistentSampler``), and persistent hidden states per training example (``DataParticles``)."""

from __future__ import annotations

import math
from collections.abc import Collection, Mapping, Sequence

import torch
from torch import Tensor, nn
from tqdm.auto import tqdm

from .._buffers import buffer_family, register_buffer_family, set_buffer_family
from .._checks import check_count, check_example_index, check_index, check_model, check_size
from .._random import resolve_generator, track_generator_state
from ..model import functional as F
from ..model.energy_model import EnergyModel
from ..model.parameters import substituted
from ..model.statistics import Statistics
from ..model.units import UnitLayer
from .lateral import can_sample_fast, sample_lateral_layer

__all__ = ["DataParticles", "PersistentSampler", "gibbs_sweep", "sample_given"]


@torch.no_grad()
def gibbs_sweep(
    model: EnergyModel,
    states: list[Tensor],
    generator: torch.Generator | F.Uniforms,
    *,
    clamped: Collection[int] = (),
    keep_probabilities: bool = False,
    parameters: Mapping[str, Tensor] | None = None,
    inverse_temperature: float | Tensor = 1.0,
) -> dict[int, Tensor]:
    """Advance ``states`` (one ``(B, n_i)`` per layer, replaced in the list) by one block Gibbs sweep.

    The colour classes of ``model.schedule`` are visited in turn; every layer of a class is drawn
    by its ``sample`` from the states before the class update, a layer with a lateral coupling one
    unit class at a time. Layers in ``clamped`` keep their states. ``parameters`` (keyed like
    ``model.named_parameters()``) replace the model's for the sweep, and ``inverse_temperature``
    (a number, or a ``(B,)`` tensor: one per chain) multiplies what the couplings send: the sweep
    then samples ``exp(-sum_l U_l(x_l) - inverse_temperature * sum_c C_c(x))`` with the layers'
    terms as ``parameters`` give them (annealing and tempering pass the layers' parameters already
    interpolated). Returns the conditional means of the last class's layers without lateral
    couplings when ``keep_probabilities``, else an empty dict.

    Layers that can (``takes_uniform_blocks``) draw from one block of uniforms for the whole sweep
    (or from the caller's :class:`~ebm_layers.model.functional.Uniforms` when one is given).
    """
    classes, unitwise = model.schedule.classes, model.schedule.unitwise
    scale = (
        None
        if not isinstance(inverse_temperature, Tensor) and inverse_temperature == 1.0
        else inverse_temperature
    )
    drawn = [layer for layers in classes for layer in layers if layer not in clamped]
    blocks = all(getattr(model.layers[i], "takes_uniform_blocks", False) for i in drawn)
    source: torch.Generator | F.Uniforms = generator
    if isinstance(generator, F.Uniforms):  # a block shared with the caller's other draws
        source = generator if blocks else generator.generator
    elif blocks:
        batch = next(x.shape[0] for x in states if x is not None)
        source = F.Uniforms(generator, model.dtype, batch * sum(model.sizes[i] for i in drawn))

    def draw(layer: UnitLayer, input: Tensor) -> Tensor:
        return layer.sample(input, source)

    probabilities: dict[int, Tensor] = {}
    with substituted(model, parameters or {}):
        for c, layers in enumerate(classes):
            last = keep_probabilities and c == len(classes) - 1
            new = {}
            for i in layers:
                if i in clamped:
                    continue
                if last and i not in unitwise:
                    layer = model.layers[i]
                    input = model.input_or_zeros(states, i, scale)
                    probabilities[i] = layer.mean(input)
                    new[i] = layer.sample(input, source)
                elif i in unitwise and can_sample_fast(model, i):
                    new[i] = sample_lateral_layer(model, states, i, source, scale)
                else:
                    new[i] = model.update_layer(states, i, draw, scale=scale, by_class=i in unitwise)
            for i, x in new.items():
                states[i] = x
    return probabilities


@torch.no_grad()
def sample_given(
    model: EnergyModel,
    clamp: Mapping[int, Tensor],
    *,
    sweeps: int = 1000,
    generator: torch.Generator | None = None,
    progress: bool = True,
) -> list[Tensor]:
    """Joint states drawn with some layers held fixed: one chain per row of ``clamp``'s tensors, each
    started from the other layers' ``initial_states`` and advanced ``sweeps`` block Gibbs sweeps
    with the layers in ``clamp`` fixed (for example samples of each class with a label layer
    clamped). The chains sample the model's conditional given the clamped layers in the long run.

    Args:
        model: the :class:`EnergyModel`.
        clamp: ``{layer index: (B, n_i) states}`` (class labels for a categorical layer are accepted).
        sweeps: Gibbs sweeps (enough for the small models measured here, not a guarantee).
        generator: the ``torch.Generator`` of every draw.
        progress: show a tqdm bar.

    Returns:
        one ``(B, n_i)`` tensor per layer (the clamped ones as given), detached; for noise-free
        pictures of a layer, its conditional mean ``model.conditional_mean(states, i)``.
    """
    check_model(model)
    sweeps = check_size("sweeps", sweeps)
    if not isinstance(clamp, Mapping) or not clamp:
        raise TypeError(f"clamp must be a non-empty dict {{layer index: (B, n_i) tensor}}, got {clamp!r}")
    given, batch = {}, None
    for i, x in clamp.items():
        i = check_index("clamp layer", i, len(model.layers))
        given[i] = model.checked(f"clamp[{i}]", x, i, batch=batch, convert=True)
        batch = given[i].shape[0]
    generator = resolve_generator(generator)
    states = [
        given[i] if i in given else layer.initial_states(batch, generator)
        for i, layer in enumerate(model.layers)
    ]
    for _ in tqdm(range(sweeps), desc="sampling", unit="sweep", disable=not progress):
        gibbs_sweep(model, states, generator, clamped=given.keys())
    return states


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
        init: ``"uniform"`` (each layer drawn by its ``initial_states``: binary units 1 with
            probability 1/2), or an observation of ``P`` rows (``(P, n_0)`` visible probabilities in
            [0, 1] for one binary visible layer; binary data starts the chains exactly there; the
            hidden layers start as with ``"uniform"``).
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
                raise ValueError(
                    f"init must be 'uniform' or a (num_particles, n_0) observation, got {init!r}"
                )
        else:
            init = model.checked("init", init, batch=self.num_particles, convert=True).detach().clone()
        if not isinstance(probabilities, bool):
            raise TypeError(f"probabilities must be a bool, got {probabilities!r}")
        self.model = model
        self.generator = resolve_generator(generator)
        self.init = init
        self.probabilities = probabilities
        track_generator_state(self)
        empty = [torch.empty(self.num_particles, n, dtype=model.dtype) for n in model.sizes]
        register_buffer_family(self, "particles", empty)
        self.reset()

    @property
    def particles(self) -> list[Tensor]:
        """The current states, one ``(P, n_i)`` tensor per layer (not advanced)."""
        return buffer_family(self, "particles", len(self.model.layers))

    def _set_particles(self, states: Sequence[Tensor]) -> None:
        set_buffer_family(self, "particles", states)

    @torch.no_grad()
    def reset(self) -> None:
        """Draw fresh particles from ``init`` with the sampler's generator."""
        count, model = self.num_particles, self.model
        given = model.clamped(self.init.to(model.dtype)) if isinstance(self.init, Tensor) else {}
        self._set_particles(
            [
                layer.initial_states(count, self.generator, given.get(i))
                for i, layer in enumerate(model.layers)
            ]
        )

    @torch.no_grad()
    def _advance(self, sweeps: int, keep_probabilities: bool = False) -> dict[int, Tensor]:
        # The model may have been converted on its own (e.g. model.double()): follow its dtype.
        states = [x.to(self.model.dtype) for x in self.particles]
        probabilities: dict[int, Tensor] = {}
        parameters = self._sweep_parameters()
        for s in range(sweeps):
            last = keep_probabilities and s == sweeps - 1
            probabilities = gibbs_sweep(
                self.model, states, self.generator, keep_probabilities=last, parameters=parameters
            )
        self._set_particles(states)
        return probabilities

    def _sweep_parameters(self) -> dict[str, Tensor]:
        """Parameters the chains use in place of the model's, keyed like ``named_parameters()``
        (none here; see :class:`~ebm_layers.phases.fast_weights.FastWeightsSampler`)."""
        return {}

    def forward(self) -> list[Tensor]:
        """Advance every chain by ``sweeps`` sweeps; return the states, one ``(P, n_i)`` per layer."""
        self._advance(self.sweeps)
        return self.particles

    @torch.no_grad()
    def statistics(self, v: Tensor | None = None, **kwargs) -> Statistics:
        """Advance by ``sweeps`` sweeps and return the particles' :class:`Statistics` (detached).

        As a negative phase it is handed the batch ``v``; persistent chains do not use it."""
        probabilities = self._advance(self.sweeps, self.probabilities)
        states = [probabilities.get(i, x) for i, x in enumerate(self.particles)]
        return self.model.statistics(states, means=probabilities)

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

    Each call clamps the observed layers to a batch of examples, advances those examples' own
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
        - ``statistics(v, index)``: ``v`` ``(B, n_0)`` (an observation), ``index`` ``(B,)`` integer;
          returns the :class:`Statistics` of the clamped batch with its updated hidden states (detached).
          An index repeated within a batch is stored once (the last copy).

    Attributes:
        states_<i>: buffer ``(N, n_i)`` of the states of hidden layer ``i``, drawn by the
            layer's ``initial_states`` at construction; ``uint8`` for discrete units in {0, 1}.
        generator_state: ``uint8`` buffer, the generator's state when ``state_dict()`` was taken.

    Examples::

        >>> import ebm_layers as el
        >>> g = torch.Generator().manual_seed(0)
        >>> particles = el.DataParticles(el.rbm(6, 3, generator=g), num_examples=50, generator=g)
        >>> v = torch.bernoulli(torch.full((4, 6), 0.5), generator=g)
        >>> particles.statistics(v, torch.tensor([0, 7, 8, 49]))["couplings.0.weight"].shape
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
        for i in model.hidden:
            layer = model.layers[i]
            self.register_buffer(
                f"states_{i}", _stored(layer, layer.initial_states(self.num_examples, self.generator))
            )

    @torch.no_grad()
    def statistics(self, v: Tensor, index: Tensor | None = None) -> Statistics:
        """Clamp ``v`` ``(B, n_0)``, advance examples ``index`` ``(B,)``, return their Statistics."""
        if index is None:
            raise ValueError("index is required with DataParticles: pass objective(v, index=idx)")
        model = self.model
        v = model.checked("v", v)
        index = check_example_index("index", index, self.num_examples, v.shape[0])
        given = model.clamped(v)
        stored = {i: getattr(self, f"states_{i}") for i in model.hidden}
        states = [
            given[i] if i in given else stored[i][index].to(model.dtype) for i in range(len(model.layers))
        ]
        for _ in range(self.sweeps):
            gibbs_sweep(model, states, self.generator, clamped=given.keys())
        for i, buffer in stored.items():
            buffer[index] = states[i].to(buffer.dtype)
        return model.statistics(states)

    def forward(self, v: Tensor, index: Tensor) -> Statistics:
        return self.statistics(v, index)

    def extra_repr(self) -> str:
        return f"num_examples={self.num_examples}, sweeps={self.sweeps}"


def _stored(layer, states: Tensor) -> Tensor:
    """States as kept in a buffer: ``uint8`` for discrete units in {0, 1}, else as they are."""
    binary = layer.support == (0.0, 1.0) and hasattr(layer, "num_states")
    return states.to(torch.uint8) if binary else states
