"""EnergyModel: unit layers joined by couplings into any layered graph; builders rbm() and dbm()."""

from __future__ import annotations

from collections.abc import Callable, Collection, Iterable, Mapping, Sequence

import torch
from torch import Tensor, nn
from torch.nn.utils import parametrize

from .._checks import check_batch, check_data, check_index, check_positive_real, check_size, check_states
from .._random import resolve_generator
from . import functional as F
from .couplings import Coupling, DenseCoupling
from .graph import UpdateSchedule, check_schedule, colour_classes, first_coupled_pair, is_chain
from .parameters import substituted
from .statistics import Statistics
from .units import BinaryLayer, UnitLayer

__all__ = ["EnergyModel", "dbm", "rbm"]


class EnergyModel(nn.Module):
    r"""A Boltzmann machine over unit layers.

    Energy :math:`E(x) = \sum_l U_l(x_l) + \sum_c C_c(x_a, x_b)`: one term per unit layer (binary
    units: :math:`-b_l \cdot x_l`) and one per coupling (dense: :math:`-x_a W_{ab} x_b^\top`; lateral:
    :math:`-\tfrac12 x_a W x_a^\top`).

    The ``observed`` layers (default: layer 0, the visible layer) are the ones data gives; the
    others are hidden. Any graph is allowed: chains, skip-layer couplings, lateral couplings within
    a layer, a single visible layer with lateral couplings (a pairwise model), or several observed
    layers (an image layer and a label layer joined to one hidden layer).

    An *observation* (what ``fit``, the phases, free energies and likelihoods take as ``v``) is one
    ``(B, n_i)`` tensor per observed layer: a tuple in the order of ``observed``, a dict
    ``{layer: tensor}``, or their concatenation ``(B, sum n_i)`` along the units (the form the
    library works with inside, see :meth:`checked` and :meth:`clamped`); a single observed layer
    may be given as its tensor alone.

    Args:
        layers: the :class:`UnitLayer` modules, layer 0 first.
        couplings: :class:`Coupling` modules, at most one per pair of layers.
        observed: indices of the observed layers (default ``(0,)``).

    Shape:
        - ``states``: a list with one ``(B, n_i)`` tensor per layer, values in [0, 1].
        - ``energy(states)``, ``free_energy(v)``: ``(B,)``; ``model(v)`` is ``free_energy(v)`` and
          ``model(states)`` is ``energy(states)``.
        - ``conditional_input(states, i)``, ``conditional_mean(states, i)``: ``(B, n_i)``.

    Attributes:
        layers, couplings: ``nn.ModuleList`` of the modules above.
        edges: ``(a, b)`` of every coupling, in coupling order.
        schedule: the :class:`UpdateSchedule` (colour classes, unit-by-unit layers); another valid
            schedule (classes reordered or split) may be assigned.

    Examples::

        >>> model = EnergyModel([BinaryLayer(6), BinaryLayer(4)], [DenseCoupling(0, 1, 6, 4)])
        >>> model.energy([torch.ones(2, 6), torch.zeros(2, 4)]).shape
        torch.Size([2])
    """

    def __init__(
        self,
        layers: Sequence[UnitLayer],
        couplings: Sequence[nn.Module] = (),
        *,
        observed: Sequence[int] = (0,),
    ) -> None:
        super().__init__()
        layers, couplings = _check_modules(layers, couplings)
        self.observed: tuple[int, ...] = _check_observed(observed, len(layers))
        self.hidden: tuple[int, ...] = tuple(i for i in range(len(layers)) if i not in self.observed)
        # Where each observed layer sits in a joined observation (B, sum n_i).
        bounds = [0]
        for i in self.observed:
            bounds.append(bounds[-1] + layers[i].size)
        self._observed_columns = tuple(zip(self.observed, bounds[:-1], bounds[1:]))
        self.layers = nn.ModuleList(layers)
        self.couplings = nn.ModuleList(couplings)
        self.edges: tuple[tuple[int, int], ...] = tuple((c.a, c.b) for c in couplings)
        # The couplings touching each layer, with their ends.
        self._parts = (*layers, *couplings)  # a plain tuple (not registered twice): dtype's quick look
        # Where each module's statistics go in named_parameters() (statistics() runs on every step).
        self._layer_prefixes = tuple((f"layers.{i}.", layer) for i, layer in enumerate(layers))
        self._coupling_prefixes = tuple(
            (f"couplings.{k}.", c, e) for k, (c, e) in enumerate(zip(couplings, self.edges))
        )
        self._touching: list[list[tuple[Coupling, tuple[int, int]]]] = [
            [(c, e) for c, e in zip(couplings, self.edges) if i in e] for i in range(len(layers))
        ]
        self.schedule = UpdateSchedule(
            classes=colour_classes(len(layers), self.edges),
            unitwise=frozenset(a for a, b in self.edges if a == b),
        )
        self._built_weights = self._weights_fingerprint()

    @property
    def schedule(self) -> UpdateSchedule:
        """How sampling and mean field visit the layers; assigning another one checks it first."""
        return self._schedule

    @schedule.setter
    def schedule(self, schedule: UpdateSchedule) -> None:
        check_schedule(schedule, len(self.layers), self.edges)
        self._schedule = schedule

    @property
    def sizes(self) -> tuple[int, ...]:
        """Number of units of each layer."""
        return tuple(layer.size for layer in self.layers)

    @property
    def dtype(self) -> torch.dtype:
        """The dtype of every parameter (float32 unless converted, e.g. by ``.double()``)."""
        for module in self._parts:  # a direct look first: asked on every call
            for parameter in module._parameters.values():
                if parameter is not None:
                    return parameter.dtype
        parameter = next(self.parameters(), None)
        return torch.get_default_dtype() if parameter is None else parameter.dtype

    @property
    def observed_size(self) -> int:
        """Number of units of the observed layers together (the width of a joined observation)."""
        return self._observed_columns[-1][2]

    def checked(
        self,
        name: str,
        x: object,
        layer: int | None = None,
        *,
        batch: int | None = None,
        convert: bool = False,
    ) -> Tensor:
        """``x`` checked as a ``(B, n_layer)`` batch of the layer's states: the model's dtype, within
        the layer's ``support`` (and ``batch`` rows when given); bool or integer data is cast, data in
        the layer's own encoding converted (``UnitLayer.as_states``: class labels). With
        ``convert``, numpy arrays and floating data of another precision are cast too (the
        conveniences: ``fit``, ``pretrain``, ``evaluate``). Raises naming ``name``.

        Without ``layer``: ``x`` is an observation (see the class), returned joined ``(B, sum n_i)``
        over the observed layers (for one observed layer, that layer's tensor)."""
        if layer is not None:
            return self._checked_layer(name, x, layer, batch, convert)
        parts = self._observation_parts(name, x)
        checked = []
        for (part_name, part), i in zip(parts, self.observed):
            checked.append(self._checked_layer(part_name, part, i, batch, convert))
            batch = checked[-1].shape[0]
        return checked[0] if len(checked) == 1 else torch.cat(checked, dim=1)

    def _checked_layer(self, name: str, x: object, layer: int, batch: int | None, convert: bool) -> Tensor:
        unit = self.layers[layer]
        if convert and not isinstance(x, Tensor) and hasattr(x, "__array__"):
            x = torch.as_tensor(x)
        if isinstance(x, Tensor):
            x = unit.as_states(x, name)
        check = check_data if convert else check_batch
        x = check(name, x, unit.size, dtype=self.dtype, batch=batch, support=unit.support)
        unit.check_states(name, x)
        return x

    def _observation_parts(self, name: str, x: object) -> list[tuple[str, object]]:
        """An observation split into ``(name, data)`` per observed layer, not yet checked."""
        observed = self.observed
        if isinstance(x, Mapping):
            if set(x.keys()) != set(observed):
                raise ValueError(
                    f"{name} must map every observed layer {list(observed)} to its data, got keys {sorted(x)}"
                )
            return [(f"{name}[{i}]", x[i]) for i in observed]
        parts = isinstance(x, (tuple, list)) and all(
            isinstance(p, Tensor) or hasattr(p, "__array__") for p in x
        )
        if parts and (x or len(observed) > 1):
            if len(x) != len(observed):
                raise ValueError(
                    f"{name} must hold one tensor per observed layer {list(observed)}, got {len(x)}"
                )
            return [(f"{name}[{k}]", part) for k, part in enumerate(x)]
        if len(observed) == 1:
            return [(name, x)]
        if not isinstance(x, Tensor) and hasattr(x, "__array__"):
            x = torch.as_tensor(x)
        if not isinstance(x, Tensor):
            raise TypeError(
                f"{name} must be a tuple of tensors (one per observed layer {list(observed)}), a dict or "
                f"a joined tensor, got {type(x).__name__}"
            )
        if x.ndim != 2 or x.shape[1] != self.observed_size:
            raise ValueError(
                f"{name} joined over the observed layers {list(observed)} must have shape "
                f"(batch, {self.observed_size}), got {tuple(x.shape)}; or pass one tensor per layer"
            )
        return [(f"{name}[:, {start}:{stop}]", x[:, start:stop]) for _, start, stop in self._observed_columns]

    def clamped(self, v: Tensor) -> dict[int, Tensor]:
        """A joined observation ``(B, sum n_i)`` (as :meth:`checked` returns it) split into
        ``{observed layer: (B, n_i) view}``."""
        if len(self.observed) == 1:
            return {self.observed[0]: v}
        return {i: v[:, start:stop] for i, start, stop in self._observed_columns}

    @property
    def supports(self) -> tuple[tuple[float, float] | None, ...]:
        """The range of values each layer's states take (``UnitLayer.support``)."""
        return tuple(layer.support for layer in self.layers)

    def biases(self) -> list[Tensor]:
        """The ``(n_i,)`` bias of every layer (binary layers)."""
        return [layer.bias for layer in self.layers]

    def weights(self) -> list[Tensor]:
        """The weight of every coupling as it enters the energy (built-in couplings)."""
        return [coupling.weight for coupling in self.couplings]

    def reset_parameters(self, generator: torch.Generator | None = None) -> None:
        """Zero biases and small random weights, drawn with ``generator``."""
        generator = resolve_generator(generator)
        for layer in self.layers:
            layer.reset_parameters()
        for coupling in self.couplings:
            coupling.reset_parameters(generator)
        self._built_weights = self._weights_fingerprint()

    def untrained(self) -> bool:
        """Whether every weight still holds the value it got when the model was built (or last
        ``reset_parameters``): a trained, loaded or pretrained model is not untrained. ``fit``
        pretrains and sets visible biases only for untrained models."""
        return self._weights_fingerprint() == self._built_weights

    @torch.no_grad()
    def _weights_fingerprint(self) -> tuple[tuple[float, float], ...]:
        """Sum and sum of squares of every coupling parameter, taken in float32 so that a dtype round
        trip (``.double()``, ``.float()``) keeps it; any training step changes it."""
        values = [w.detach().float().double() for c in self.couplings for w in c.parameters()]
        return tuple((float(w.sum()), float(w.square().sum())) for w in values)

    def forward(self, x: Tensor | Sequence[Tensor] | Mapping[int, Tensor]) -> Tensor:
        """``model(v)``: the free energy ``F(v)`` ``(B,)`` of an observation (visible data ``(B, n_0)``
        for one observed layer), the usual output of an energy-based model (lower for data the model
        finds more probable; ``-F(v)`` is ``log p(v)`` up to ``log Z``), differentiable; as
        :meth:`free_energy`, only where it has a closed form. ``model([x_0, ..., x_L])`` (one tensor
        per layer): the energy of joint states, as :meth:`energy`."""
        if isinstance(x, (Tensor, Mapping)) or len(x) != len(self.layers):
            return self.free_energy(x)
        return self.energy(x)

    def energy(self, states: Sequence[Tensor]) -> Tensor:
        """Energy ``(B,)`` of joint states (one ``(B, n_i)`` tensor per layer)."""
        states = check_states("states", states, self.sizes, self.dtype, self.supports)
        return self.joint_energy(states)

    def joint_energy(self, states: Sequence[Tensor] | Mapping[int, Tensor]) -> Tensor:
        """:meth:`energy` without checks, of the layers in ``states`` and the couplings among them
        (all of them for full joint states)."""
        present = range(len(self.layers)) if not isinstance(states, Mapping) else states.keys()
        total = None
        for i in present:
            term = self.layers[i].energy(states[i])
            total = term if total is None else total + term
        for coupling, (a, b) in zip(self.couplings, self.edges):
            if a in present and b in present:
                total = total + coupling.energy(states[a], states[b])
        return total

    def statistics(
        self,
        states: Sequence[Tensor],
        weights: Tensor | None = None,
        means: Collection[int] | Mapping[int, Tensor | None] = (),
    ) -> Statistics:
        """:class:`Statistics` of joint states (one ``(B, n_i)`` tensor per layer, or marginals):
        every module's average ``-dE/dtheta``, keyed like ``named_parameters()``; weighted by
        ``weights`` ``(B,)`` (summing to one) when given. The layers in ``means`` hold the means of
        factorised distributions (mean-field marginals, exact conditionals), averaged over by the
        layer's ``expected_statistics``; a mapping gives each such layer a ``known`` mask (units
        holding data) or ``None``. Not checked: the phases call it."""
        out = Statistics()
        for i, (prefix, layer) in enumerate(self._layer_prefixes):
            if i not in means:
                own = layer.statistics(states[i], weights)
            elif isinstance(means, Mapping) and means[i] is not None:
                own = layer.expected_statistics(states[i], weights, known=means[i])
            else:
                own = layer.expected_statistics(states[i], weights)
            for name, value in _pulled_back(layer, own):
                out[prefix + name] = value
        for prefix, coupling, (a, b) in self._coupling_prefixes:
            for name, value in _pulled_back(coupling, coupling.statistics(states[a], states[b], weights)):
                out[prefix + name] = value
        return out

    def layer_input(
        self,
        states: Sequence[Tensor] | Mapping[int, Tensor],
        target: int,
        *,
        lateral: bool = True,
        scale: float | Tensor | None = None,
        skip: Collection[int] = (),
    ) -> Tensor | None:
        """The input ``(B, n_target)`` every coupling sends to layer ``target`` (its own lateral one
        too unless ``lateral=False``; none from the layers in ``skip``), times ``scale`` (a number or
        ``(B,)``); ``None`` when none does. Only the layers coupled to ``target`` need to be in
        ``states``; not checked."""
        total = None
        for coupling, (a, b) in self._touching[target]:
            if (a == b and not lateral) or (b if target == a else a) in skip:
                continue
            source = states[b if target == a else a]
            total = (
                coupling.input_to(target, source)
                if total is None
                else coupling.add_input(target, source, total)
            )
        if total is not None and scale is not None:
            total = total * (scale.view(-1, 1) if isinstance(scale, Tensor) else scale)
        return total

    def input_or_zeros(
        self,
        states: Sequence[Tensor] | Mapping[int, Tensor],
        target: int,
        scale: float | Tensor | None = None,
        batch: int | None = None,
    ) -> Tensor:
        """:meth:`layer_input` as a ``(B, n_target)`` tensor, zeros where no coupling touches the layer
        (``B`` from the first state, or ``batch`` when given: states may then be empty)."""
        input = self.layer_input(states, target, scale=scale)
        if batch is None:
            present = states.values() if isinstance(states, Mapping) else states
            batch = next(x for x in present if x is not None).shape[0]
        if input is None:
            return torch.zeros(batch, self.sizes[target], dtype=self.dtype)
        return input.expand(batch, -1)

    def lateral_coupling(self, layer: int) -> Coupling | None:
        """The coupling within ``layer``, if any."""
        return next((c for c, (a, b) in self._touching[layer] if a == b), None)

    def update_layer(
        self,
        states: Sequence[Tensor] | Mapping[int, Tensor],
        target: int,
        conditional: Callable[[UnitLayer, Tensor], Tensor],
        *,
        extra: Tensor | None = None,
        observed: tuple[Tensor, Tensor] | None = None,
        scale: float | Tensor | None = None,
        by_class: bool = True,
        skip: Collection[int] = (),
    ) -> Tensor:
        """New state ``(B, n_target)`` of layer ``target``: ``conditional(layer, input)`` (its mean
        for mean field, a draw for Gibbs sampling) of the input from the current ``states``.

        ``extra`` ``(B, n)`` is added to the input (what clamped layers in ``skip`` send, computed once
        by the caller). ``scale`` multiplies
        what the couplings send (an inverse temperature). Without a lateral coupling, or with
        ``by_class=False``, every unit is updated at once; otherwise the lateral coupling's unit
        classes are updated in turn, each from the newest values of the others, the lateral input
        kept up to date with the coupling's ``input_change``. Out of place: autograd can
        differentiate it. ``observed = (mask, values)``: units where ``mask`` is True keep ``values``.
        """
        layer = self.layers[target]
        lateral = self.lateral_coupling(target) if by_class else None

        def keep_observed(new: Tensor) -> Tensor:
            return new if observed is None else torch.where(observed[0], observed[1], new)

        base = self.layer_input(states, target, lateral=lateral is None, scale=scale, skip=skip)
        if extra is not None:
            base = extra if base is None else base + extra
        if base is None:  # no coupling touches the layer; batch of one when no state is given
            first = next(iter(states.values() if isinstance(states, Mapping) else states), None)
            base = torch.zeros(1 if first is None else first.shape[0], layer.size, dtype=self.dtype)
        if lateral is None:
            return keep_observed(conditional(layer, base))
        current = states[target]
        factor = 1.0 if scale is None else (scale.view(-1, 1) if isinstance(scale, Tensor) else scale)
        lateral_input = lateral.input_to(target, current) * factor
        for units in lateral.unit_classes():
            drawn = keep_observed(conditional(layer, base + lateral_input))
            chosen = torch.zeros(layer.size, dtype=torch.bool)
            chosen[units] = True
            new = torch.where(chosen, drawn, current)
            lateral_input = lateral_input + lateral.input_change(target, new - current, units) * factor
            current = new
        return current

    def conditional_input(self, states: Sequence[Tensor], layer: int) -> Tensor:
        """The input ``(B, n_layer)`` to ``layer`` from every other unit: ``-dC/dx_layer`` summed over
        its couplings, so that ``p(x_layer | rest) ∝ exp(-U(x_layer) + x_layer . input)`` unit by unit
        when the layer has no lateral coupling (binary units: the logits are ``bias + input``).
        With a lateral coupling each unit's input depends on the other units of its layer.
        """
        layer = check_index("layer", layer, len(self.layers))
        states = check_states("states", states, self.sizes, self.dtype, self.supports)
        return self.input_or_zeros(states, layer)

    def conditional_mean(self, states: Sequence[Tensor], layer: int) -> Tensor:
        """``E[x_layer | every other unit]`` ``(B, n_layer)`` unit by unit: the layer's ``mean`` of
        :meth:`conditional_input` (binary units: ``p(x_j = 1 | rest)``)."""
        input = self.conditional_input(states, layer)  # checks the index first
        return self.layers[layer].mean(input)

    @property
    def has_free_energy(self) -> bool:
        """Whether :meth:`free_energy` exists in closed form (no two hidden units coupled)."""
        return first_coupled_pair(self.edges, set(self.observed)) is None

    def free_energy(self, v: Tensor, *, dtype: torch.dtype | None = None) -> Tensor:
        r"""Free energy ``(B,)`` of an observation, :math:`F(v) = -\log \sum_h e^{-E(v, h)}`
        (``v``: visible data ``(B, n_0)``, or one tensor per observed layer, see the class).

        Defined in closed form only when no two hidden units are coupled (RBM-like models, with or
        without visible lateral couplings); otherwise a ``ValueError``. ``dtype`` computes in
        another precision (parameters and ``v`` cast, still differentiable).
        """
        self.check_summable(self.observed)
        return self._free_energy_in(self.clamped(self.checked("v", v)), dtype)

    def marginal_free_energy(self, states: Mapping[int, Tensor]) -> Tensor:
        """Free energy ``(B,)`` of some layers' states, every other layer summed out in closed form.

        ``states`` maps layer index to ``(B, n_i)``. The summed-out layers must be mutually
        uncoupled and free of lateral couplings, else a ``ValueError`` names the coupling.
        """
        if not isinstance(states, Mapping) or not states:
            raise TypeError(
                f"states must be a non-empty dict {{layer index: (B, n_i) tensor}}, got {states!r}"
            )
        return self._checked_free_energy(states, {i: f"states[{i}]" for i in states}, None)

    def _checked_free_energy(
        self, states: Mapping[int, Tensor], names: Mapping[int, str], dtype: torch.dtype | None
    ) -> Tensor:
        """Validate ``states`` (reported under ``names``), then compute their free energy in ``dtype``."""
        self.check_summable(states.keys())
        batch, checked = None, {}
        for i, x in states.items():
            checked[i] = self.checked(names[i], x, i, batch=batch)
            batch = x.shape[0]
        return self._free_energy_in(checked, dtype)

    def _free_energy_in(self, states: Mapping[int, Tensor], dtype: torch.dtype | None) -> Tensor:
        """:meth:`summed_free_energy` of checked ``states``, in ``dtype`` when given."""
        if dtype is None or dtype == self.dtype:
            return self.summed_free_energy(states)
        # Another precision: the modules and states cast (the cast is differentiable).
        cast = {name: p.to(dtype) for name, p in self.named_parameters()}
        with substituted(self, cast):
            return self.summed_free_energy({i: x.to(dtype) for i, x in states.items()})

    def summed_free_energy(
        self, given: Mapping[int, Tensor], inputs: Mapping[int, Tensor] | None = None
    ) -> Tensor:
        """Free energy ``(B,)`` of the ``given`` layers with every other layer summed out by its
        ``log_partition``, not checked: exact only when no coupling joins two summed-out layers
        (:meth:`check_summable`). ``inputs`` passes the summed layers' inputs when already computed."""
        total = self.joint_energy(given) if given else 0.0
        for k, layer in enumerate(self.layers):
            if k not in given:
                input = self.layer_input(given, k) if inputs is None else inputs[k]
                if input is None:
                    input = torch.zeros(1, layer.size, dtype=self.dtype)
                total = total - layer.log_partition(input)
        return total

    def check_summable(self, kept: Collection[int]) -> None:
        """Raise ``ValueError`` unless every layer outside ``kept`` can be summed out in closed form."""
        for i in kept:
            check_index("layer", i, len(self.layers))
        k = first_coupled_pair(self.edges, set(kept))
        if k is not None:
            a, b = self.edges[k]
            what = f"layer {a} has lateral couplings" if a == b else f"layers {a} and {b} are coupled"
            raise ValueError(
                f"no closed-form free energy of layers {sorted(kept)}: {what} "
                f"(couplings[{k}]), so the others cannot be summed out independently"
            )

    @torch.no_grad()
    def base_parameters(self, data: Mapping[int, Tensor] | None = None) -> dict[str, Tensor]:
        """The parameters of the base model of independent units that annealing and tempering start
        from, keyed like ``named_parameters()``: each layer's :meth:`UnitLayer.base_parameters`, fitted
        to ``data[i]`` for the layers ``data`` gives. A parametrized tensor (tied copies of a bias) is
        given through its free tensor (the parametrizations' ``right_inverse``)."""
        out = {}
        for i, layer in enumerate(self.layers):
            out.update(self.layer_values(i, layer.base_parameters(None if data is None else data.get(i))))
        return out

    def layer_values(self, i: int, values: Mapping[str, Tensor]) -> dict[str, Tensor]:
        """Values ``{name: tensor}`` of layer ``i``'s tensors keyed like ``named_parameters()``: a
        parametrized tensor (tied copies of a bias) is given through its free tensor (the
        parametrizations' ``right_inverse``), as :class:`substituted` expects."""
        layer, out = self.layers[i], {}
        for name, value in values.items():
            if name not in layer._parameters and parametrize.is_parametrized(layer, name):
                for parametrization in reversed(layer.parametrizations[name]):
                    value = parametrization.right_inverse(value)
                name = f"parametrizations.{name}.original"
            out[f"layers.{i}.{name}"] = value
        return out

    @torch.no_grad()
    def init_visible_bias_from(self, data: object, pseudocount: float = 1.0) -> None:
        """Set the observed layers' biases from an observation ``data`` (one ``(B, n_i)`` per observed
        layer, see the class): binary units at the log-odds of the smoothed base rates, other unit
        types as their :meth:`UnitLayer.base_parameters` give (Gaussian: the data's mean; categorical:
        the log of the smoothed frequencies).

        Binary rate ``p_i = (sum_b v_bi + pseudocount) / (B + 2 pseudocount)``, bias
        ``log(p_i / (1 - p_i))``: common practice, "A Practical Guide to Training Restricted
        Boltzmann Machines" (Hinton, UTML TR 2010-003, 2010), section 8; the pseudocount keeps
        constant units finite.
        """
        for i in self.observed:
            if not isinstance(getattr(self.layers[i], "bias", None), nn.Parameter):
                raise ValueError(
                    f"init_visible_bias_from sets observed layers' biases; layer {i} is a "
                    f"{type(self.layers[i]).__name__} without a bias parameter"
                )
        data = self.checked("data", data)
        pseudocount = check_positive_real("pseudocount", pseudocount)
        for i, x in self.clamped(data).items():
            self.layers[i].bias.copy_(bias_from_data(self.layers[i], x, pseudocount))

    def is_binary_chain(self, visible: tuple[type[UnitLayer], ...] = (BinaryLayer,)) -> bool:
        """Whether the model is what :func:`dbm` builds: binary layers (layer 0 of one of the
        ``visible`` types), layer 0 observed alone, and unmasked dense couplings ``(k, k + 1)`` in
        order (the feed-forward network and pretraining need it)."""
        return (
            self.observed == (0,)
            and is_chain(len(self.layers), self.edges)
            and isinstance(self.layers[0], visible)
            and all(isinstance(layer, BinaryLayer) for layer in self.layers[1:])
            and all(isinstance(c, DenseCoupling) and c.mask is None for c in self.couplings)
        )

    def extra_repr(self) -> str:
        observed = "" if self.observed == (0,) else f", observed={list(self.observed)}"
        return f"sizes={list(self.sizes)}, edges={list(self.edges)}{observed}"


def bias_from_data(layer: UnitLayer, x: Tensor, pseudocount: float = 1.0) -> Tensor:
    """A bias for ``layer`` that reproduces the data ``x`` ``(N, n)`` with no input: binary units at
    the log-odds of the smoothed base rates (``pseudocount``), other types as their
    ``base_parameters(x)`` give it (Gaussian: the mean; categorical: the log frequencies)."""
    if isinstance(layer, BinaryLayer):
        return F.base_rate_logits(x, pseudocount).to(layer.bias.dtype)
    return layer.base_parameters(x)["bias"]


def _pulled_back(module: nn.Module, statistics: Mapping[str, Tensor]) -> Iterable[tuple[str, Tensor]]:
    """A module's statistics keyed by its parameters: a statistic of a tensor that another module
    computes from a free tensor (``torch.nn.utils.parametrize``, such as tied copies of a bias) is
    pulled back to that free tensor by the chain rule: by autograd, or by the parametrizations'
    own ``pull_back(statistic)`` (the adjoint of a linear one) when each of them has one."""
    if "parametrizations" not in module._modules:  # parametrize.is_parametrized(module), looked up directly
        return statistics.items()
    out = []
    for name, value in statistics.items():
        if name in module._parameters or not parametrize.is_parametrized(module, name):
            out.append((name, value))
            continue
        chain = module.parametrizations[name]  # the parametrizations applied in turn to .original
        if all(hasattr(parametrization, "pull_back") for parametrization in chain):
            pulled = value
            for parametrization in reversed(chain):  # the adjoint of a composition, last map first
                pulled = parametrization.pull_back(pulled)
        else:
            free = chain.original.detach().requires_grad_()
            with torch.enable_grad():
                tensor = free
                for parametrization in chain:
                    tensor = parametrization(tensor)
                (pulled,) = torch.autograd.grad(tensor, free, value)
        out.append((f"parametrizations.{name}.original", pulled))
    return out


def _check_observed(observed: object, count: int) -> tuple[int, ...]:
    """Validate the observed layer indices: distinct, in range, at least one; returned sorted."""
    if isinstance(observed, (str, bytes)) or not isinstance(observed, Iterable):
        raise TypeError(f"observed must be a sequence of layer indices, got {observed!r}")
    indices = [check_index("observed layer", i, count) for i in observed]
    if not indices or len(set(indices)) != len(indices):
        raise ValueError(f"observed must list one or more distinct layer indices, got {list(observed)}")
    return tuple(sorted(indices))


def _check_modules(layers, couplings):
    """Validate the layer and coupling modules of a model; return them as lists."""
    if isinstance(layers, nn.Module) or not isinstance(layers, Sequence) or not layers:
        raise ValueError(f"layers must be a non-empty list of UnitLayer modules, got {layers!r}")
    if isinstance(couplings, nn.Module) or not isinstance(couplings, Sequence):
        raise TypeError(f"couplings must be a list of couplings, got {type(couplings).__name__}")
    seen: dict[int, str] = {}
    for i, layer in enumerate(layers):
        if not isinstance(layer, UnitLayer):
            raise TypeError(f"layers[{i}] must be a UnitLayer, got {type(layer).__name__}")
        if id(layer) in seen:
            raise ValueError(f"layers[{i}] is the same module as {seen[id(layer)]}")
        seen[id(layer)] = f"layers[{i}]"
        check_size(f"layers[{i}].size", getattr(layer, "size", None))
    joined: dict[frozenset[int], int] = {}
    for k, coupling in enumerate(couplings):
        if not isinstance(coupling, Coupling):
            raise TypeError(f"couplings[{k}] must be a Coupling, got {type(coupling).__name__}")
        if id(coupling) in seen:
            raise ValueError(f"couplings[{k}] is the same module as {seen[id(coupling)]}")
        seen[id(coupling)] = f"couplings[{k}]"
        a, b = coupling.a, coupling.b
        for end in (a, b):
            if end >= len(layers):
                raise ValueError(
                    f"couplings[{k}] joins layer {end}, but the model has {len(layers)} "
                    f"layers (0..{len(layers) - 1})"
                )
        _check_coupling_shapes(k, coupling, layers[a].size, layers[b].size)
        pair = frozenset((a, b))
        if pair in joined:
            raise ValueError(
                f"couplings[{k}] joins layers ({a}, {b}), which couplings[{joined[pair]}] "
                "already joins; use one coupling per pair of layers"
            )
        joined[pair] = k
    dtypes = {p.dtype for module in (*layers, *couplings) for p in module.parameters()}
    if len(dtypes) > 1:
        raise TypeError(f"layers and couplings must share one dtype, got {sorted(map(str, dtypes))}")
    return list(layers), list(couplings)


@torch.no_grad()
def _check_coupling_shapes(k: int, coupling: Coupling, n_a: int, n_b: int) -> None:
    """A coupling must send inputs of the right width both ways: probed with one zero state."""
    weight = getattr(coupling, "weight", None)
    if isinstance(weight, Tensor) and weight.ndim == 2 and tuple(weight.shape) != (n_a, n_b):
        raise ValueError(
            f"couplings[{k}].weight has shape {tuple(weight.shape)} but layers "
            f"{coupling.a} and {coupling.b} have sizes {(n_a, n_b)}"
        )
    dtype = next((p.dtype for p in coupling.parameters()), torch.get_default_dtype())
    for target, source, n_source, n_target in (
        (coupling.b, coupling.a, n_a, n_b),
        (coupling.a, coupling.b, n_b, n_a),
    ):
        try:
            shape = tuple(coupling.input_to(target, torch.zeros(1, n_source, dtype=dtype)).shape)
        except RuntimeError as error:
            raise ValueError(
                f"couplings[{k}] cannot take a state of layer {source} ({n_source} units): {error}"
            ) from None
        if shape != (1, n_target):
            raise ValueError(
                f"couplings[{k}] sends an input of shape {shape} to layer {target}, which has "
                f"{n_target} units: its weight does not match layers {coupling.a} and {coupling.b}"
            )


def rbm(
    n_visible: int,
    n_hidden: int,
    *,
    generator: torch.Generator | None = None,
    dtype: torch.dtype | None = None,
) -> EnergyModel:
    """A restricted Boltzmann machine: layers ``[n_visible, n_hidden]``, one ``DenseCoupling(0, 1)``.

    Zero biases, weights from N(0, 0.01^2) drawn with ``generator``.
    """
    n_visible, n_hidden = check_size("n_visible", n_visible), check_size("n_hidden", n_hidden)
    return dbm(n_visible, n_hidden, generator=generator, dtype=dtype)


def dbm(
    *sizes: int, generator: torch.Generator | None = None, dtype: torch.dtype | None = None
) -> EnergyModel:
    """A chain of layers ``sizes`` (at least two); ``couplings[k]`` joins layers ``k`` and ``k + 1``.

    Zero biases, weights from N(0, 0.01^2) drawn with ``generator``.
    """
    if len(sizes) < 2:
        raise ValueError(f"dbm needs at least two layer sizes, got {sizes}")
    sizes = tuple(check_size(f"sizes[{i}]", n) for i, n in enumerate(sizes))
    model = EnergyModel(
        [BinaryLayer(n, dtype=dtype) for n in sizes],
        [DenseCoupling(k, k + 1, sizes[k], sizes[k + 1], dtype=dtype) for k in range(len(sizes) - 1)],
    )
    model.reset_parameters(generator)
    return model
