"""Reusing a trained model downstream: mean-field features, and a plain feed-forward network for chains.

Two ways to hand a trained model to a classifier:

- :class:`FeatureExtractor`: the mean-field marginals of chosen hidden layers, for any layered
  graph. Differentiable (through the mean-field fixed point), so the model can be fine-tuned
  together with a head.
- :func:`feedforward_network`: for chains only, a stack of ``nn.Linear`` + ``nn.Sigmoid`` blocks
  initialised from the couplings: one bottom-up pass, no iteration, the cheapest to fine-tune.
"""

from __future__ import annotations

from collections.abc import Sequence

import torch
from torch import Tensor, nn

from ._checks import check_index, check_model
from .model.couplings import DenseCoupling, LateralCoupling
from .model.energy_model import EnergyModel
from .model.units import BinaryLayer
from .phases.mean_field import MeanField

__all__ = ["ConcatenatedLayers", "FeatureExtractor", "feedforward_network"]


def _check_layers(layers: object, num_layers: int, observed: Sequence[int] = (0,)) -> tuple[int, ...]:
    """Return ``layers`` as a tuple of distinct hidden layer indices (every hidden layer if None)."""
    hidden = tuple(i for i in range(num_layers) if i not in observed)
    if not hidden:
        raise ValueError(
            "the model has no hidden layer (only observed layers, the data), so it has no features"
        )
    if layers is None:
        return hidden
    if isinstance(layers, str | bytes) or not isinstance(layers, Sequence):
        raise TypeError(
            f"layers must be a sequence of hidden layer indices such as [1, 2], got {layers!r} "
            f"({type(layers).__name__})"
        )
    if not layers:
        raise ValueError(f"layers must name at least one hidden layer, got {layers!r}")
    checked: list[int] = []
    for k, index in enumerate(layers):
        index = check_index(f"layers[{k}]", index)
        if index not in hidden:
            data = f"; layer {index} is observed (the data), not a feature" if index in observed else ""
            contiguous = hidden == tuple(range(hidden[0], hidden[-1] + 1))
            where = f"in {hidden[0]}..{hidden[-1]}" if contiguous else f"({', '.join(map(str, hidden))})"
            raise ValueError(
                f"layers must hold hidden layer indices {where}, got {index} at layers[{k}]{data}"
            )
        if index in checked:
            raise ValueError(f"layers must be distinct, got {list(layers)} (layer {index} twice)")
        checked.append(index)
    return tuple(checked)


class FeatureExtractor(nn.Module):
    r"""Mean-field marginals of hidden layers of a model, concatenated: features for a downstream model.

    ``features(v) = cat([mu_l(v) for l in layers], dim=1)``, where ``mu`` solves the mean-field
    fixed point with the observed layers clamped to ``v`` (see :class:`~ebm_layers.MeanField`).

    Gradients reach ``v`` and the model's parameters through the fixed point itself (by default
    the mean field's implicit backward), so the extractor can be trained together with a head by
    any optimizer: fine-tuning changes the model's own parameters.

    Args:
        model: the :class:`~ebm_layers.EnergyModel`.
        layers: hidden layer indices (each >= 1, distinct) whose marginals are returned, in that
            order; ``None`` (default) means every hidden layer, in index order.
        mean_field: the :class:`~ebm_layers.MeanField` of ``model`` to use; ``None`` (default)
            builds ``MeanField(model, init="bottom-up")`` with its defaults (colour-ordered updates,
            implicit backward).

    Shape:
        - Input: ``v`` ``(B, n_0)`` within the visible layer's support (or an observation of several
          observed layers), the model's dtype.
        - Output: ``(B, num_features)``, ``num_features = sum(n_l for l in layers)``.

    Attributes:
        mean_field: the :class:`~ebm_layers.MeanField` (a submodule; the model is its submodule,
            so ``parameters()`` and ``state_dict()`` hold the model's biases and weights).
        model: the :class:`~ebm_layers.EnergyModel`, ``mean_field.model``.
        layers: the tuple of layer indices.
        num_features: the width of the output.

    Examples::

        >>> import ebm_layers as el
        >>> model = el.dbm(6, 4, 3, generator=torch.Generator().manual_seed(0))
        >>> classifier = nn.Sequential(FeatureExtractor(model), nn.Linear(7, 2))
        >>> classifier(torch.ones(5, 6)).shape
        torch.Size([5, 2])
        >>> FeatureExtractor(model, layers=[2])
        FeatureExtractor(
          layers=[2], num_features=3
          (mean_field): MeanField(
            update='colour', tol=1e-05, max_iter=100, backward='implicit', init='bottom-up'
            (model): EnergyModel(
              sizes=[6, 4, 3], edges=[(0, 1), (1, 2)]
              (layers): ModuleList(
                (0): BinaryLayer(6)
                (1): BinaryLayer(4)
                (2): BinaryLayer(3)
              )
              (couplings): ModuleList(
                (0): DenseCoupling(a=0, b=1, n_a=6, n_b=4)
                (1): DenseCoupling(a=1, b=2, n_a=4, n_b=3)
              )
            )
          )
        )
    """

    mean_field: MeanField
    layers: tuple[int, ...]
    num_features: int

    def __init__(
        self, model: EnergyModel, layers: Sequence[int] | None = None, mean_field: MeanField | None = None
    ) -> None:
        super().__init__()
        check_model(model)
        layers = _check_layers(layers, len(model.layers), model.observed)
        if mean_field is None:
            mean_field = MeanField(model, init="bottom-up")
        elif not isinstance(mean_field, MeanField):
            raise TypeError(f"mean_field must be a MeanField, got {type(mean_field).__name__}")
        elif mean_field.model is not model:
            raise ValueError(
                "mean_field must be a MeanField of this model (mean_field.model is model), "
                f"got one of another model: {mean_field.model.extra_repr()}"
            )
        # The model is reached through mean_field only, so it appears once in state_dict and repr.
        self.mean_field = mean_field
        self.layers = layers
        self.num_features = sum(model.sizes[i] for i in layers)

    @property
    def model(self) -> EnergyModel:
        """The model whose hidden marginals are the features (``mean_field.model``)."""
        return self.mean_field.model

    def forward(self, v: Tensor) -> Tensor:
        """Features ``(B, num_features)`` of data ``v`` ``(B, n_0)``; see the class docstring."""
        marginals = self.mean_field(v)
        return torch.cat([marginals[i] for i in self.layers], dim=1)

    def extra_repr(self) -> str:
        return f"layers={list(self.layers)}, num_features={self.num_features}"


class ConcatenatedLayers(nn.Module):
    r"""A stack of blocks run bottom-up, returning the outputs of several of them concatenated.

    What :func:`feedforward_network` returns when more than one layer is asked for:
    ``blocks[l - 1]`` computes hidden layer ``l`` from layer ``l - 1``, and the output is
    ``cat([h_l for l in layers], dim=1)``. Blocks above the highest layer asked for are not run.

    Args:
        blocks: ``nn.Sequential`` whose ``k``-th module computes hidden layer ``k + 1``.
        layers: distinct layer indices in ``1..len(blocks)`` whose outputs are returned, in that order.

    Shape:
        - Input: ``(B, n_0)``.
        - Output: ``(B, sum(n_l for l in layers))``.

    Attributes:
        blocks: the ``nn.Sequential`` of blocks.
        layers: the tuple of layer indices.

    Examples::

        >>> blocks = nn.Sequential(nn.Sequential(nn.Linear(6, 4), nn.Sigmoid()),
        ...                        nn.Sequential(nn.Linear(4, 3), nn.Sigmoid()))
        >>> ConcatenatedLayers(blocks, layers=[2, 1])(torch.ones(5, 6)).shape
        torch.Size([5, 7])
    """

    blocks: nn.Sequential
    layers: tuple[int, ...]

    def __init__(self, blocks: nn.Sequential, layers: Sequence[int]) -> None:
        super().__init__()
        if not isinstance(blocks, nn.Sequential):
            raise TypeError(f"blocks must be an nn.Sequential, got {type(blocks).__name__}")
        self.layers = _check_layers(layers, len(blocks) + 1)
        self.blocks = blocks

    def forward(self, x: Tensor) -> Tensor:
        outputs = []
        for block in self.blocks[: max(self.layers)]:
            x = block(x)
            outputs.append(x)
        return torch.cat([outputs[i - 1] for i in self.layers], dim=1)

    def extra_repr(self) -> str:
        return f"layers={list(self.layers)}"


def _chain_matrices(model: EnergyModel) -> list[Tensor]:
    """The ``(n_{l-1}, n_l)`` matrix of the input to layer ``l`` from layer ``l - 1``, for l = 1, 2, ...

    Raises ``ValueError`` unless the model is a chain: one dense coupling between each pair of
    consecutive layers (either orientation, any order in ``couplings``) and no other coupling.
    """
    why = (
        "feedforward_network needs a chain of binary layers (one dense coupling between each pair of "
        "consecutive layers and nothing else, as built by dbm() or rbm()), because a single bottom-up pass "
        "computes each layer from the one below only; {}. FeatureExtractor handles any graph"
    )
    if model.observed != (0,):
        raise ValueError(why.format(f"the model observes layers {list(model.observed)}, not layer 0 alone"))
    for i, layer in enumerate(model.layers[1:], start=1):  # the data layer may hold any units
        if not isinstance(layer, BinaryLayer):
            raise ValueError(why.format(f"layers[{i}] is a {type(layer).__name__}, not binary units"))
    matrices: dict[int, Tensor] = {}
    for k, ((a, b), coupling) in enumerate(zip(model.edges, model.couplings)):
        if not isinstance(coupling, DenseCoupling | LateralCoupling):
            raise ValueError(why.format(f"couplings[{k}] is a {type(coupling).__name__}, not a dense weight"))
        weight = coupling.weight
        if a == b:
            raise ValueError(why.format(f"couplings[{k}] is a lateral coupling within layer {a}"))
        if abs(a - b) != 1:
            raise ValueError(
                why.format(f"couplings[{k}] joins layers {a} and {b}, which are not consecutive")
            )
        matrices[min(a, b)] = weight if a < b else weight.mT
    unjoined = [f"{i} and {i + 1}" for i in range(len(model.layers) - 1) if i not in matrices]
    if unjoined:
        raise ValueError(why.format(f"no coupling joins layers {', '.join(unjoined)}"))
    return [matrices[i] for i in range(len(model.layers) - 1)]


@torch.no_grad()
def feedforward_network(model: EnergyModel, layers: Sequence[int] | None = None) -> nn.Module:
    r"""A feed-forward network of ``nn.Linear`` + ``nn.Sigmoid`` blocks initialised from a trained chain.

    Block ``l`` computes hidden layer ``l`` from layer ``l - 1`` in one bottom-up pass:
    ``h_l = sigmoid(h_{l-1} (s_l W_{l-1,l}) + b_l)``, with ``h_0 = v``, ``W_{l-1,l}`` the
    ``(n_{l-1}, n_l)`` weight of the coupling between them and ``s_l = 2`` for every layer with a
    layer above it in the chain, ``s_l = 1`` for the top layer. In the model a hidden layer also
    receives input from the layer above; doubling the bottom-up weight stands in for that
    missing top-down input, as in the recognition pass of "Deep Boltzmann Machines" (AISTATS
    2009), from memory. For an RBM (one hidden layer, the top) the network computes the exact
    posterior ``p(h = 1 | v) = sigmoid(v W + b)``.

    The weights and biases are copies: training the network leaves the model untouched. The
    network has the model's dtype and device and contains nothing specific to this library, so
    it can be fine-tuned, saved or exported like any ``torch.nn`` network.

    Only for chains (``model.couplings`` are dense couplings joining each pair of consecutive
    layers, nothing else, as built by ``dbm()`` / ``rbm()``); other graphs raise ``ValueError``,
    use :class:`FeatureExtractor` for them.

    Args:
        model: the trained chain.
        layers: hidden layer indices whose activations are returned; ``None`` (default) means the
            top layer. The network has blocks up to the highest layer asked for.

    Returns:
        One layer asked for (the default): an ``nn.Sequential`` whose ``l - 1``-th module is the
        block ``nn.Sequential(nn.Linear(n_{l-1}, n_l), nn.Sigmoid())`` of hidden layer ``l``, so
        ``net[0][0]`` is the first ``Linear``. Several layers: a :class:`ConcatenatedLayers`
        around those blocks, whose output concatenates the layers' activations in the order given.

    Shape:
        - Input: ``(B, n_0)``.
        - Output: ``(B, n_top)``, or ``(B, sum(n_l for l in layers))``.

    Examples::

        A classifier head on the top layer, trained with any optimizer:

        >>> import ebm_layers as el
        >>> model = el.dbm(6, 4, 3, generator=torch.Generator().manual_seed(0))
        >>> classifier = nn.Sequential(feedforward_network(model), nn.Linear(3, 2))
        >>> optimizer = torch.optim.SGD(classifier.parameters(), lr=0.1)
        >>> v, labels = torch.ones(5, 6), torch.tensor([0, 1, 0, 1, 1])
        >>> nn.functional.cross_entropy(classifier(v), labels).backward()
        >>> optimizer.step()
        >>> feedforward_network(model, layers=[1, 2])(v).shape
        torch.Size([5, 7])
    """
    check_model(model)
    top = len(model.layers) - 1
    chosen = _check_layers(layers, len(model.layers))
    chosen = (top,) if layers is None else chosen
    matrices = _chain_matrices(model)
    blocks = []
    for index in range(1, max(chosen) + 1):
        matrix = matrices[index - 1]
        linear = nn.Linear(*matrix.shape, dtype=matrix.dtype, device=matrix.device)
        linear.weight.copy_((2.0 if index < top else 1.0) * matrix.mT)
        linear.bias.copy_(model.layers[index].bias)
        blocks.append(nn.Sequential(linear, nn.Sigmoid()))
    network = nn.Sequential(*blocks)
    return network if len(chosen) == 1 else ConcatenatedLayers(network, chosen)
