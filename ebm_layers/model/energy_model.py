"""EnergyModel: binary layers joined by couplings into any layered graph; builders rbm() and dbm()."""

from __future__ import annotations

from collections.abc import Collection, Mapping, Sequence

import torch
from torch import Tensor, nn

from .._checks import check_batch, check_index, check_positive_real, check_size, check_states
from .._random import resolve_generator
from . import functional as F
from .couplings import DenseCoupling, LateralCoupling
from .graph import UpdateSchedule, check_schedule, colour_classes, first_coupled_pair
from .units import BinaryLayer

__all__ = ["EnergyModel", "dbm", "rbm"]


class EnergyModel(nn.Module):
    r"""A Boltzmann machine over binary layers.

    Energy :math:`E(x) = -\sum_l b_l \cdot x_l - \sum_{(a,b)} x_a W_{ab} x_b^\top` over the
    couplings (a lateral coupling contributes :math:`-\tfrac12 x_a W x_a^\top`).

    Layer 0 is the visible layer. Any graph is allowed: chains, skip-layer couplings, lateral
    couplings within a layer, or a single visible layer with lateral couplings (a pairwise
    model of binary data).

    Args:
        layers: the ``BinaryLayer`` modules, layer 0 first.
        couplings: ``DenseCoupling`` / ``LateralCoupling`` modules, at most one per pair of layers.

    Shape:
        - ``states``: a list with one ``(B, n_i)`` tensor per layer, values in [0, 1].
        - ``energy(states)``, ``free_energy(v)``: ``(B,)``; ``model(v)`` is ``free_energy(v)`` and
          ``model(states)`` is ``energy(states)``.
        - ``conditional_logits(states, i)``: ``(B, n_i)``.

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

    def __init__(self, layers: Sequence[BinaryLayer], couplings: Sequence[nn.Module] = ()) -> None:
        super().__init__()
        layers, couplings = _check_modules(layers, couplings)
        self.layers = nn.ModuleList(layers)
        self.couplings = nn.ModuleList(couplings)
        self.edges: tuple[tuple[int, int], ...] = tuple((c.a, c.b) for c in couplings)
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
        return self.layers[0].bias.dtype

    def biases(self) -> list[Tensor]:
        """The ``(n_i,)`` bias of every layer."""
        return [layer.bias for layer in self.layers]

    def weights(self) -> list[Tensor]:
        """The weight of every coupling as it enters the energy (lateral: symmetric, zero diagonal)."""
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
        """Sum and sum of squares of every weight, taken in float32 so that a dtype round trip
        (``.double()``, ``.float()``) keeps it; any training step changes it."""
        values = [w.detach().float().double() for w in self.weights()]
        return tuple((float(w.sum()), float(w.square().sum())) for w in values)

    def forward(self, x: Tensor | Sequence[Tensor]) -> Tensor:
        """``model(v)``: the free energy ``F(v)`` ``(B,)`` of visible data ``(B, n_0)``, the usual
        output of an energy-based model (lower for data the model finds more probable; ``-F(v)``
        is ``log p(v)`` up to ``log Z``), differentiable; as :meth:`free_energy`, only where it has
        a closed form. ``model([x_0, ..., x_L])``: the energy of joint states, as :meth:`energy`."""
        if isinstance(x, Tensor):
            return self.free_energy(x)
        return self.energy(x)

    def energy(self, states: Sequence[Tensor]) -> Tensor:
        """Energy ``(B,)`` of joint states (one ``(B, n_i)`` tensor per layer)."""
        states = check_states("states", states, self.sizes, self.dtype)
        return F.energy(states, self.biases(), self.weights(), self.edges)

    def conditional_logits(self, states: Sequence[Tensor], layer: int) -> Tensor:
        """Logits ``(B, n_layer)`` of ``p(x_layer,j = 1 | every other unit)``.

        Without lateral couplings the units of the layer are independent given the other
        layers and the layer's own state is not used; with them each unit's logit depends on
        the other units of its layer.
        """
        layer = check_index("layer", layer, len(self.layers))
        states = check_states("states", states, self.sizes, self.dtype)
        return F.layer_logits(states, layer, self.biases(), self.weights(), self.edges)

    @property
    def has_free_energy(self) -> bool:
        """Whether :meth:`free_energy` exists in closed form (no two non-visible units coupled)."""
        return first_coupled_pair(self.edges, {0}) is None

    def free_energy(self, v: Tensor, *, dtype: torch.dtype | None = None) -> Tensor:
        r"""Free energy ``(B,)`` of visible data, :math:`F(v) = -\log \sum_h e^{-E(v, h)}`.

        Defined in closed form only when no two non-visible units are coupled (RBM-like
        models, with or without visible lateral couplings); otherwise a ``ValueError``.
        ``dtype`` computes in another precision (parameters and ``v`` cast, still differentiable).
        """
        return self._checked_free_energy({0: v}, {0: "v"}, dtype)

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
            checked[i] = check_batch(names[i], x, self.sizes[i], dtype=self.dtype, batch=batch)
            batch = x.shape[0]
        states = checked
        biases, weights = self.biases(), self.weights()
        if dtype is not None:
            biases, weights = [b.to(dtype) for b in biases], [w.to(dtype) for w in weights]
            states = {i: x.to(dtype) for i, x in states.items()}
        return F.marginal_free_energy(states, biases, weights, self.edges)

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
    def init_visible_bias_from(self, data: Tensor, pseudocount: float = 1.0) -> None:
        """Set the visible biases to the log-odds of the smoothed base rates of ``data`` ``(B, n_0)``.

        Rate ``p_i = (sum_b v_bi + pseudocount) / (B + 2 pseudocount)``, bias ``log(p_i / (1 - p_i))``:
        common practice, "A Practical Guide to Training Restricted Boltzmann Machines" (Hinton,
        UTML TR 2010-003, 2010), section 8; the pseudocount keeps constant units finite.
        """
        data = check_batch("data", data, self.sizes[0])
        pseudocount = check_positive_real("pseudocount", pseudocount)
        self.layers[0].bias.copy_(F.base_rate_logits(data, pseudocount))

    def extra_repr(self) -> str:
        return f"sizes={list(self.sizes)}, edges={list(self.edges)}"


def _check_modules(layers, couplings):
    """Validate the layer and coupling modules of a model; return them as lists."""
    if isinstance(layers, nn.Module) or not isinstance(layers, Sequence) or not layers:
        raise ValueError(f"layers must be a non-empty list of BinaryLayer, got {layers!r}")
    if isinstance(couplings, nn.Module) or not isinstance(couplings, Sequence):
        raise TypeError(f"couplings must be a list of couplings, got {type(couplings).__name__}")
    seen: dict[int, str] = {}
    for i, layer in enumerate(layers):
        if not isinstance(layer, BinaryLayer):
            raise TypeError(f"layers[{i}] must be a BinaryLayer, got {type(layer).__name__}")
        if id(layer) in seen:
            raise ValueError(f"layers[{i}] is the same module as {seen[id(layer)]}")
        seen[id(layer)] = f"layers[{i}]"
    dtypes = {layer.bias.dtype for layer in layers}
    joined: dict[frozenset[int], int] = {}
    for k, coupling in enumerate(couplings):
        if not isinstance(coupling, DenseCoupling | LateralCoupling):
            raise TypeError(
                f"couplings[{k}] must be a DenseCoupling or LateralCoupling, got {type(coupling).__name__}"
            )
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
        expected = (layers[a].size, layers[b].size)
        if tuple(coupling.weight.shape) != expected:
            raise ValueError(
                f"couplings[{k}].weight has shape {tuple(coupling.weight.shape)} but layers "
                f"{a} and {b} have sizes {expected}"
            )
        pair = frozenset((a, b))
        if pair in joined:
            raise ValueError(
                f"couplings[{k}] joins layers ({a}, {b}), which couplings[{joined[pair]}] "
                "already joins; use one coupling per pair of layers"
            )
        joined[pair] = k
        dtypes.add(coupling.weight.dtype)
    if len(dtypes) > 1:
        raise TypeError(f"layers and couplings must share one dtype, got {sorted(map(str, dtypes))}")
    return list(layers), list(couplings)


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
