"""The fast Gibbs draw of binary layers with a lateral coupling (ebm_layers/phases/lateral.py).

Sources of the checks:

- a sequential reference written here from the definition of a Gibbs sweep (mathematics): the
  unit classes in order, each unit on when its uniform is below ``sigmoid(b + input)`` with the
  input from the newest states. Given the same uniforms (float64, where ties have probability
  zero), the library must give the very same states, for one unit at a time, gathered products
  over a sparse mask's neighbours, dense products, a constant and a per-chain inverse temperature.
- the grid-cell correction of ``functional.sample_bernoulli`` (its docstring): a uniform in the
  grid cell of its probability turns the unit on with probability ``(p - u) / grid``; checked by
  frequencies with binomial z-scores (common practice, no source), against a negative control
  that skips the redraw.
- stationarity against exact enumeration of a 3 x 3 lattice (mathematics) with the gathered path
  forced, by the total-variation check of tests/test_masks.py (tests/helpers.py; common practice,
  no source).
"""

from __future__ import annotations

import pytest
import torch
from torch import Tensor

import ebm_layers as el
from ebm_layers.model import functional as F
from ebm_layers.phases import lateral as fast
from ebm_layers.phases.gibbs import gibbs_sweep
from tests.helpers import lattice_mask, total_variation_after_one_sweep

F64 = torch.float64


def pairwise_model(n: int, mask: Tensor | None, hidden: int = 0, dtype=F64, seed: int = 0) -> el.EnergyModel:
    """A binary layer of ``n`` units with a lateral coupling (masked or dense), optionally with a
    hidden layer attached, and weights large enough that every unit's input matters."""
    layers = [el.BinaryLayer(n, dtype=dtype)]
    couplings = [el.LateralCoupling(0, n, mask=mask, dtype=dtype)]
    if hidden:
        layers.append(el.BinaryLayer(hidden, dtype=dtype))
        couplings.append(el.DenseCoupling(0, 1, n, hidden, dtype=dtype))
    model = el.EnergyModel(layers, couplings)
    g = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for parameter in model.parameters():
            parameter.copy_(torch.randn(parameter.shape, dtype=dtype, generator=g))
    return model


class FixedUniforms(F.Uniforms):
    """A block of given uniforms ``(n, B)``, handed out whole (what a sweep takes for the layer)."""

    def __init__(self, values: Tensor, generator: torch.Generator) -> None:
        super().__init__(generator, values.dtype, values.numel())
        self.values = values

    def take(self, shape):
        return self.values.reshape(shape).clone()


def reference_draw(model: el.EnergyModel, states: list[Tensor], uniform: Tensor, scale=None) -> Tensor:
    """Layer 0 drawn class by class from the definition: unit j of chain c on iff
    ``uniform[j, c] < sigmoid(b_j + s_c * (input from the other layers + lateral input)_j)``."""
    x = states[0].clone()
    weight = model.couplings[0].weight.detach()
    bias = model.layers[0].bias.detach()
    s = torch.ones(x.shape[0], dtype=x.dtype) if scale is None else torch.as_tensor(scale, dtype=x.dtype)
    s = s.expand(x.shape[0])
    outside = torch.zeros_like(x)
    for coupling in model.couplings[1:]:
        outside = outside + states[1] @ coupling.weight.detach().T
    for units in model.couplings[0].unit_classes():
        logits = bias[units] + s[:, None] * (outside[:, units] + x @ weight[:, units])
        x[:, units] = (uniform[units].T < torch.sigmoid(logits)).to(x.dtype)
    return x


CASES = {
    # name: (units, mask, hidden units, GATHER_RATIO) — the ratio decides gathered or dense classes.
    "dense, one unit at a time": (7, None, 0, fast.GATHER_RATIO),
    "dense with a hidden layer": (7, None, 3, fast.GATHER_RATIO),
    "lattice, gathered products": (25, lattice_mask(5, 5), 0, 1),
    "lattice, dense products": (25, lattice_mask(5, 5), 0, 10**9),
    "lattice with a hidden layer, gathered": (25, lattice_mask(5, 5), 4, 1),
}


@pytest.mark.parametrize("scale", [None, 0.7, "per chain"])
@pytest.mark.parametrize("case", list(CASES))
def test_draws_equal_the_sequential_definition_given_the_same_uniforms(case, scale, monkeypatch):
    n, mask, hidden, ratio = CASES[case]
    monkeypatch.setattr(fast, "GATHER_RATIO", ratio)
    model = pairwise_model(n, mask, hidden)
    plan = fast._plan(model.couplings[0])
    if mask is not None:  # the case takes the path its name says
        assert all((c.neighbours is not None) == (ratio == 1) for c in plan)
    g = torch.Generator().manual_seed(1)
    batch = 64
    states = [torch.bernoulli(torch.full((batch, size), 0.5, dtype=F64), generator=g) for size in model.sizes]
    uniform = torch.rand(n, batch, dtype=F64, generator=g)
    if scale == "per chain":
        scale = torch.rand(batch, dtype=F64, generator=g) * 2
    before = [x.clone() for x in states]
    drawn = fast.sample_lateral_layer(model, states, 0, FixedUniforms(uniform, g), scale)
    expected = reference_draw(model, before, uniform, scale)
    assert torch.equal(drawn, expected)
    assert all(torch.equal(x, y) for x, y in zip(states, before))  # the input states are left alone
    if scale is None:  # negative control: every unit drawn at once from the old lateral input
        stale = torch.sigmoid(model.layers[0].bias.detach() + model.layer_input(before, 0).detach())
        assert not torch.equal(drawn, (uniform.T < stale).to(F64))


def test_no_extra_draws_when_no_uniform_falls_in_a_grid_cell():
    model = pairwise_model(16, None, dtype=torch.float32)
    g = torch.Generator().manual_seed(2)
    states = [torch.zeros(50, 16)]
    uniform = torch.rand(16, 50, generator=g)
    before = g.get_state()
    fast.sample_lateral_layer(model, states, 0, FixedUniforms(uniform, g))
    assert torch.equal(g.get_state(), before)  # the float64 redraw was not needed


def cell_setup(mask: Tensor | None):
    """A float32 layer with zero lateral weights and biases whose probabilities lie off the uniform
    grid, and uniforms just below each probability: every draw falls in its grid cell."""
    n = 8 if mask is None else 9
    model = el.EnergyModel([el.BinaryLayer(n)], [el.LateralCoupling(0, n, mask=mask)])
    grid = 2.0**-24
    # Biases whose p lies in [1/64, 1/32) (float32 steps of 2^-29) and well inside its grid cell.
    candidates = -3.9 + 0.001 * torch.arange(2000)
    p = torch.sigmoid(candidates).double()
    fraction = (p - torch.floor(p / grid) * grid) / grid  # the probability of "on" given u just below
    chosen = torch.nonzero((fraction > 0.3) & (fraction < 0.7)).flatten()[:n]
    with torch.no_grad():
        model.couplings[0].weight = torch.zeros(n, n)
        model.layers[0].bias.copy_(candidates[chosen])
    p, fraction = p[chosen], fraction[chosen]
    return model, (torch.floor(p / grid) * grid).float(), fraction


@pytest.mark.parametrize("mask", [None, lattice_mask(3, 3)], ids=["one unit at a time", "lattice"])
@pytest.mark.parametrize("redraw", [True, False], ids=["library", "negative control without redraw"])
def test_uniforms_in_their_grid_cell_turn_units_on_with_the_exact_probability(mask, redraw, monkeypatch):
    model, below, fraction = cell_setup(mask)
    monkeypatch.setattr(fast, "GATHER_RATIO", 1)  # the lattice takes gathered products
    if not redraw:
        draw = fast._draw_classes
        monkeypatch.setattr(fast, "_draw_classes", lambda *a, generator: draw(*a, generator=None))
    g = torch.Generator().manual_seed(3)
    chains = 4000
    states = [torch.zeros(chains, below.numel())]
    uniform = below[:, None].expand(-1, chains)
    drawn = fast.sample_lateral_layer(model, states, 0, FixedUniforms(uniform, g))
    # Binomial z-scores of each unit's frequency (common practice, no source); |z| < 5 passes.
    z = (drawn.double().mean(0) - fraction) / torch.sqrt(fraction * (1 - fraction) / chains)
    assert bool((z.abs() < 5).all()) == redraw, z


@pytest.mark.parametrize("broken", [False, True], ids=["gathered", "negative control: wrong neighbours"])
def test_gathered_sweeps_leave_the_lattice_distribution_invariant(broken, monkeypatch):
    monkeypatch.setattr(fast, "GATHER_RATIO", 1)
    model = pairwise_model(9, lattice_mask(3, 3), seed=4)
    with torch.no_grad():
        model.couplings[0].weight = model.couplings[0].weight * 0.8
    plan = fast._plan(model.couplings[0])
    assert all(c.neighbours is not None for c in plan)
    if broken:  # each unit reads its neighbours' neighbours: the sweep samples something else
        model.couplings[0]._sampling_plan = (
            model.couplings[0]._sampling_plan[0],
            [fast._Class(c.units, c.unit, c.neighbours.roll(1, 0)) for c in plan],
        )
    distance, noise = total_variation_after_one_sweep(model, 60_000, seed=5)
    print(f"\nTV {distance:.4f}, noise {noise:.4f}, ratio {distance / noise:.2f}")
    assert (distance < 1.5 * noise) != broken


def test_layers_without_logits_take_the_generic_update():
    class Spins(el.BinaryLayer):  # hides ``logits``: the fast path must not be taken
        logits = None

        def mean(self, input):
            return torch.sigmoid(input + self.bias)

    model = el.EnergyModel([Spins(4)], [el.LateralCoupling(0, 4)])
    assert not fast.can_sample_fast(model, 0)
    assert fast.can_sample_fast(pairwise_model(4, None), 0)
    assert not fast.can_sample_fast(pairwise_model(4, None).to(torch.bfloat16), 0)
    g = torch.Generator().manual_seed(6)
    states = [torch.zeros(5, 4)]
    gibbs_sweep(model, states, g)  # the sweep takes the generic update for this layer
    drawn = states[0]
    assert drawn.shape == (5, 4) and bool(((drawn == 0) | (drawn == 1)).all())


def test_entries_read_the_weight_without_building_it():
    for mask in (None, lattice_mask(3, 3)):
        coupling = pairwise_model(9, mask).couplings[0]
        rows = torch.randint(0, 9, (20, 5), generator=torch.Generator().manual_seed(7))
        columns = torch.randint(0, 9, (20, 5), generator=torch.Generator().manual_seed(8))
        weight = coupling.weight.detach()
        assert torch.equal(coupling.entries(rows, columns).detach(), weight[rows, columns])
