"""Ground truth shared by the tests: brute-force enumeration of every joint state, and the small
models it is applied to.

Everything here is written from the mathematics alone, independent of the library's
implementation (no ``ebm_layers.model.functional``, no enumeration code of the library): all
units are stacked into one vector x of N units and E(x) = -b.x - 1/2 x J x^T, with J the
symmetric interaction matrix assembled from the couplings' weights (a dense W between layers a
and b fills block (a, b) with W and block (b, a) with W^T; a lateral L fills block (a, a)). Then
log Z, marginals, conditionals and moments are sums over all 2^N states. The library is used
only to hold the parameters (``el.EnergyModel`` and its layers and couplings). The checks that
lean on this module name it as their source: "exact enumeration (mathematics)".
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import torch
from torch import Tensor

import ebm_layers as el

# Model shapes: (number of layers, edges in coupling order); a == b marks a lateral coupling.
SHAPES = {
    "rbm": (2, ((0, 1),)),
    "chain3": (3, ((0, 1), (1, 2))),
    "chain4": (4, ((0, 1), (1, 2), (2, 3))),
    "skip": (3, ((0, 1), (1, 2), (0, 2))),
    "pairwise": (1, ((0, 0),)),
    "semi_restricted": (2, ((0, 0), (0, 1))),
    "hidden_lateral_chain": (3, ((0, 1), (1, 2), (1, 1))),
    "backwards": (2, ((1, 0),)),
    "hidden_star": (3, ((0, 1), (2, 0))),  # two hidden layers on the visible one, one declared backwards
    "uncoupled_layer": (3, ((0, 1),)),  # layer 2 has no coupling at all
    "no_couplings": (2, ()),
}
# Closed-form F(v) exactly when every coupling touches the visible layer (no two hidden units coupled).
CLOSED_FORM = [name for name, (_, edges) in SHAPES.items() if all(0 in edge for edge in edges)]
NOT_CLOSED_FORM = [name for name in SHAPES if name not in CLOSED_FORM]


def build(shape: str, sizes: tuple[int, ...]) -> el.EnergyModel:
    """A float64 model of ``shape``; plain chains come from the builders rbm() / dbm()."""
    _, edges = SHAPES[shape]
    generator = torch.Generator().manual_seed(0)
    if edges == tuple((k, k + 1) for k in range(len(sizes) - 1)):
        builder = el.rbm if len(sizes) == 2 else el.dbm
        return builder(*sizes, generator=generator, dtype=torch.float64)
    layers = [el.BinaryLayer(n, dtype=torch.float64) for n in sizes]
    couplings = [
        el.LateralCoupling(a, sizes[a], dtype=torch.float64)
        if a == b
        else el.DenseCoupling(a, b, sizes[a], sizes[b], dtype=torch.float64)
        for a, b in edges
    ]
    model = el.EnergyModel(layers, couplings)
    model.reset_parameters(generator)
    return model


@torch.no_grad()
def randomize(model: el.EnergyModel, seed: int, scale: float = 1.5) -> el.EnergyModel:
    """Set every bias and weight to N(0, scale^2) draws, so that no energy term is negligible."""
    generator = torch.Generator().manual_seed(seed)

    def draw(like: Tensor) -> Tensor:
        return scale * torch.randn(like.shape, generator=generator, dtype=like.dtype)

    for layer in model.layers:
        layer.bias.copy_(draw(layer.bias))
    for coupling in model.couplings:
        if coupling.a == coupling.b:
            upper = draw(coupling.weight).triu(1)
            coupling.weight = upper + upper.T  # parametrize right_inverse: symmetric, zero diagonal
        else:
            coupling.weight.copy_(draw(coupling.weight))
    return model


def interaction_matrix(model: el.EnergyModel, lateral_factor: float = 1.0) -> Tensor:
    """The symmetric (N, N) float64 J of E(x) = -b.x - 1/2 x J x^T over the stacked units.

    Differentiable in the weights (a lateral coupling enters through ``coupling.weight``).
    ``lateral_factor`` scales the lateral blocks; values other than 1 are for negative controls.
    """
    ends = list(itertools.accumulate(model.sizes, initial=0))
    block = [slice(start, stop) for start, stop in zip(ends, ends[1:])]
    interaction = torch.zeros(ends[-1], ends[-1], dtype=torch.float64)
    for coupling in model.couplings:
        a, b = coupling.a, coupling.b
        weight = coupling.weight.to(torch.float64)
        if a == b:
            interaction[block[a], block[a]] = lateral_factor * weight
        else:
            interaction[block[a], block[b]] = weight
            interaction[block[b], block[a]] = weight.T
    return interaction


def direct_energy(model: el.EnergyModel, x: Tensor, lateral_factor: float = 1.0) -> Tensor:
    """E(x) ``(B,)`` of stacked float64 states ``x`` ``(B, N)``, differentiable in the parameters."""
    bias = torch.cat([layer.bias.to(torch.float64) for layer in model.layers])
    interaction = interaction_matrix(model, lateral_factor)
    return -(x @ bias) - 0.5 * ((x @ interaction) * x).sum(1)


@dataclass
class Reference:
    """Every joint state of a model with its energy and probability, by exact enumeration."""

    x: Tensor  # (2^N, N); row r holds the binary digits of r, unit 0 the most significant
    states: list[Tensor]  # the columns of x split by layer, (2^N, n_i) each
    energy: Tensor  # (2^N,)
    log_z: Tensor  # 0-d
    prob: Tensor  # (2^N,)


def brute_force(model: el.EnergyModel, lateral_factor: float = 1.0) -> Reference:
    """Exact enumeration (mathematics): Z = sum_x exp(-E(x)) over all 2^N joint states, in float64."""
    x = torch.tensor(list(itertools.product((0.0, 1.0), repeat=sum(model.sizes))), dtype=torch.float64)
    with torch.no_grad():
        energy = direct_energy(model, x, lateral_factor)
    log_z = torch.logsumexp(-energy, 0)
    return Reference(x, list(x.split(model.sizes, dim=1)), energy, log_z, torch.exp(-energy - log_z))


def visible_marginal(ref: Reference, neg_energy: Tensor) -> tuple[Tensor, Tensor]:
    """Exact enumeration (mathematics): every visible state v ``(2^n0, n0)`` and its log p(v).

    ``neg_energy`` is -E at the rows of ``ref.x`` (differentiable when the caller needs it).
    The visible units are the most significant bits of the row index, so the states sharing
    one v are consecutive rows.
    """
    n_visible = ref.states[0].shape[1]
    groups = 2**n_visible
    v = ref.states[0].reshape(groups, -1, n_visible)[:, 0]
    return v, neg_energy.reshape(groups, -1).logsumexp(1) - neg_energy.logsumexp(0)


def exact_log_marginal(model: el.EnergyModel, v: Tensor) -> Tensor:
    """Exact enumeration (mathematics): log p(v) per row of ``v``, the brute-force joint summed over
    the hidden states."""
    ref = brute_force(model)
    return torch.stack(
        [torch.logsumexp(-ref.energy[(ref.states[0] == row).all(1)], 0) - ref.log_z for row in v]
    )


def layer_states(layer: el.UnitLayer) -> Tensor:
    """Exact enumeration (mathematics): every state ``(S, n)`` float64 of a binary layer (every 0/1
    vector) or a categorical one (one unit on in each group, groups independent), written out with
    ``itertools`` rather than the layer's own ``states``."""
    if isinstance(layer, el.CategoricalLayer):
        one_hot = torch.eye(layer.categories, dtype=torch.float64)
        rows = itertools.product(range(layer.categories), repeat=layer.groups)
        return torch.stack([torch.cat([one_hot[k] for k in row]) for row in rows])
    if isinstance(layer, el.BinaryLayer):
        return torch.tensor(list(itertools.product((0.0, 1.0), repeat=layer.size)), dtype=torch.float64)
    raise TypeError(f"no list of states for {type(layer).__name__}")


def every_joint_state(model: el.EnergyModel) -> list[Tensor]:
    """Exact enumeration (mathematics): every joint state of a model of binary and categorical
    layers, one ``(S, n_i)`` float64 tensor per layer (S the product of the layers' state counts;
    layer 0 varies slowest)."""
    tables = [layer_states(layer) for layer in model.layers]
    index = torch.tensor(list(itertools.product(*(range(len(t)) for t in tables))))
    return [table[index[:, i]] for i, table in enumerate(tables)]
