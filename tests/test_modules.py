"""Construction, torch idioms and bookkeeping of layers, couplings and models."""

import copy
import io

import numpy as np
import pytest
import torch
from scipy.special import logit

import ebm_layers as el
from ebm_layers.model.graph import colour_classes, smallest_cover
from tests.helpers import make_lateral_model


def test_builders_shapes_and_initialisation(generator):
    model = el.dbm(6, 5, 4, generator=generator)
    assert model.sizes == (6, 5, 4)
    assert model.edges == ((0, 1), (1, 2))
    assert [c.weight.shape for c in model.couplings] == [(6, 5), (5, 4)]
    assert all(not layer.bias.detach().any() for layer in model.layers)
    # Small random weights, N(0, 0.01^2): common practice, "A Practical Guide to Training
    # Restricted Boltzmann Machines" (UTML TR 2010-003, 2010).
    weights = torch.cat(
        [c.weight.detach().flatten() for c in el.dbm(200, 300, generator=generator).couplings]
    )
    assert abs(float(weights.std()) - 0.01) < 5e-4
    assert model.dtype == torch.float32
    assert el.rbm(3, 2, dtype=torch.float64).dtype == torch.float64


def test_same_seed_same_model():
    first = el.rbm(7, 3, generator=torch.Generator().manual_seed(5))
    second = el.rbm(7, 3, generator=torch.Generator().manual_seed(5))
    third = el.rbm(7, 3, generator=torch.Generator().manual_seed(6))
    assert torch.equal(first.couplings[0].weight, second.couplings[0].weight)
    assert not torch.equal(first.couplings[0].weight, third.couplings[0].weight)
    # generator=None draws a private generator from the global RNG: torch.manual_seed repeats it.
    torch.manual_seed(0)
    fourth = el.rbm(7, 3)
    torch.manual_seed(0)
    assert torch.equal(fourth.couplings[0].weight, el.rbm(7, 3).couplings[0].weight)


def test_only_biases_and_weights_are_parameters(lateral_model):
    names = {name for name, _ in lateral_model.named_parameters()}
    assert names == {
        "layers.0.bias",
        "layers.1.bias",
        "layers.2.bias",
        "couplings.0.weight",
        "couplings.1.parametrizations.weight.original",
        "couplings.2.weight",
    }


def test_extra_repr_tells_the_structure(lateral_model):
    text = repr(lateral_model)
    assert "sizes=[5, 3, 2]" in text and "edges=[(0, 1), (0, 0), (2, 0)]" in text
    assert "BinaryLayer(5)" in text and "DenseCoupling(a=2, b=0, n_a=2, n_b=5)" in text
    assert "layer=0, n=5" in text


def test_state_dict_round_trip(lateral_model, generator):
    states = [torch.bernoulli(torch.full((4, n), 0.5), generator=generator) for n in lateral_model.sizes]
    buffer = io.BytesIO()
    torch.save(lateral_model.state_dict(), buffer)
    buffer.seek(0)
    other = make_lateral_model()
    assert not torch.equal(other.energy(states), lateral_model.energy(states))
    other.load_state_dict(torch.load(buffer))
    assert torch.equal(other.energy(states), lateral_model.energy(states))
    assert torch.equal(other.couplings[1].weight, lateral_model.couplings[1].weight)


def test_double_and_float_conversion(lateral_model, generator):
    log_z32 = el.exact_log_partition(lateral_model)
    model = lateral_model.double()
    assert model.dtype == torch.float64
    assert all(p.dtype == torch.float64 for p in model.parameters())
    assert model.couplings[1].weight.dtype == torch.float64
    states = [torch.bernoulli(torch.full((3, n), 0.5), generator=generator).double() for n in model.sizes]
    assert model.energy(states).dtype == torch.float64
    assert torch.allclose(el.exact_log_partition(model), log_z32, atol=1e-5)


def test_lateral_weight_stays_symmetric_with_zero_diagonal_after_optimizer_steps(lateral_model, generator):
    lateral = lateral_model.couplings[1]
    before = lateral.weight.detach().clone()
    optimizer = torch.optim.Adam(lateral_model.parameters(), lr=0.1)
    states = [torch.rand(8, n, generator=generator) for n in lateral_model.sizes]
    for _ in range(3):
        optimizer.zero_grad()
        # Any loss: a random projection of the energies, so the gradient is not symmetric itself.
        (lateral_model.energy(states) * torch.randn(8, generator=generator)).sum().backward()
        optimizer.step()
    weight = lateral.weight.detach()
    assert not torch.allclose(weight, before)  # the step did move the weights
    assert torch.equal(weight, weight.T)
    assert torch.equal(weight.diagonal(), torch.zeros(5))


def test_lateral_weight_assignment(generator):
    coupling = el.LateralCoupling(0, 4)
    symmetric = torch.randn(4, 4, generator=generator)
    symmetric = (symmetric + symmetric.T).fill_diagonal_(0.0)
    coupling.weight = symmetric
    assert torch.allclose(coupling.weight, symmetric)


def test_schedule_colours_the_layer_graph():
    assert el.rbm(4, 3).schedule.classes == ((0,), (1,))
    assert el.dbm(4, 3, 2, 2).schedule.classes == ((0, 2), (1, 3))
    # A skip-layer coupling 0-2 in a 3-layer chain makes a triangle: three classes.
    assert colour_classes(3, [(0, 1), (1, 2), (0, 2)]) == ((0,), (1,), (2,))
    # Lateral couplings do not join layers, they mark unit-by-unit updates.
    assert colour_classes(2, [(0, 1), (1, 1)]) == ((0,), (1,))
    single = el.EnergyModel([el.BinaryLayer(4)], [el.LateralCoupling(0, 4)])
    assert single.schedule == el.UpdateSchedule(classes=((0,),), unitwise=frozenset({0}))
    # A proper colouring: no coupling inside a class.
    edges = [(0, 1), (1, 2), (2, 3), (3, 0), (0, 2)]
    for colour_class in colour_classes(4, edges):
        assert not any(a in colour_class and b in colour_class for a, b in edges)


def test_smallest_cover_enumerates_fewest_units():
    assert smallest_cover((8, 3), [(0, 1)]) == (1,)
    assert smallest_cover((5, 2, 5), [(0, 1), (1, 2)]) == (1,)
    assert smallest_cover((2, 5, 2), [(0, 1), (1, 2)]) == (0, 2)
    assert smallest_cover((8, 3), [(0, 1), (0, 0)]) == (0,)  # a lateral layer is always enumerated
    assert smallest_cover((8, 3), []) == ()


def test_init_visible_bias_from_data(generator):
    data = torch.bernoulli(torch.rand(50, 6, generator=generator), generator=generator)
    data[:, 0] = 0.0  # a constant unit stays finite thanks to the pseudocount
    model = el.rbm(6, 3, generator=generator)
    model.init_visible_bias_from(data)
    rates = (data.double().sum(0) + 1.0) / (50 + 2.0)
    # scipy.special.logit as the reference for the log-odds.
    assert torch.allclose(model.layers[0].bias.double(), torch.from_numpy(logit(rates.numpy())), atol=1e-6)
    assert torch.isfinite(model.layers[0].bias).all()
    assert not model.layers[1].bias.detach().any()


def test_conditional_input_of_an_uncoupled_layer_is_zero_and_its_mean_follows_the_bias():
    model = el.EnergyModel([el.BinaryLayer(3), el.BinaryLayer(2)])
    with torch.no_grad():
        model.layers[1].bias.copy_(torch.tensor([0.5, -1.0]))
    states = [torch.zeros(4, 3), torch.zeros(4, 2)]
    input = model.conditional_input(states, 1)
    assert input.shape == (4, 2) and not input.any()
    expected = torch.sigmoid(torch.tensor([[0.5, -1.0]])).expand(4, 2)  # mathematics: sigmoid(bias)
    assert torch.equal(model.conditional_mean(states, 1), expected)


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_exact_statistics_in_model_dtype(dtype):
    stats = el.ExactStatistics(el.rbm(5, 3, dtype=dtype)).statistics()
    names = ["layers.0.bias", "layers.1.bias", "couplings.0.weight"]
    assert sorted(stats) == sorted(names)
    assert [stats[name].dtype for name in names] == [dtype] * 3
    assert [tuple(stats[name].shape) for name in names] == [(5,), (3,), (5, 3)]


def test_coupling_inputs_add_up_to_the_conditional_input(lateral_model, generator):
    states = [torch.bernoulli(torch.full((6, n), 0.5), generator=generator) for n in lateral_model.sizes]
    for target in range(3):
        total = torch.zeros(6, lateral_model.sizes[target])
        for coupling in lateral_model.couplings:
            if target in (coupling.a, coupling.b):
                other = coupling.b if target == coupling.a else coupling.a
                total = total + coupling.input_to(target, states[other])
        assert torch.allclose(lateral_model.conditional_input(states, target), total, atol=1e-6)
    dense = lateral_model.couplings[2]  # DenseCoupling(2, 0): weight (2, 5)
    assert torch.equal(dense.input_to(0, states[2]), states[2] @ dense.weight)
    assert torch.equal(dense.input_to(2, states[0]), states[0] @ dense.weight.T)
    with pytest.raises(ValueError, match="target must be one of the layers"):
        dense.input_to(1, states[1])


def test_binary_layer_mean_and_sample():
    layer = el.BinaryLayer(3)
    logits = torch.tensor([-2.0, 0.0, 1.5]).expand(20_000, 3)
    assert torch.allclose(layer.mean(logits), torch.sigmoid(logits))
    draws = layer.sample(logits, torch.Generator().manual_seed(0))
    assert draws.shape == logits.shape and draws.dtype == logits.dtype
    assert set(draws.unique().tolist()) <= {0.0, 1.0}
    # Frequencies within 5 binomial standard errors of sigmoid(logits) (common practice, no source).
    p = torch.sigmoid(logits[0])
    assert ((draws.mean(0) - p).abs() < 5 * (p * (1 - p) / 20_000).sqrt()).all()
    assert torch.equal(draws, layer.sample(logits, torch.Generator().manual_seed(0)))
    assert not torch.equal(draws, layer.sample(logits, torch.Generator().manual_seed(1)))


def test_statistics_from_states_are_batch_averages(generator):
    # Reference: numpy.einsum over the batch (reference library), plain and weighted.
    states = [
        torch.rand(7, 3, generator=generator, dtype=torch.float64),
        torch.rand(7, 2, dtype=torch.float64),
    ]
    model = el.EnergyModel(
        [el.BinaryLayer(3, dtype=torch.float64), el.BinaryLayer(2, dtype=torch.float64)],
        [el.DenseCoupling(0, 1, 3, 2, dtype=torch.float64), el.LateralCoupling(0, 3, dtype=torch.float64)],
    )
    dense, lateral = "couplings.0.weight", "couplings.1.parametrizations.weight.original"
    x0, x1 = (s.numpy() for s in states)
    stats = model.statistics(states)
    assert isinstance(stats, el.Statistics)
    assert sorted(stats) == sorted(name for name, _ in model.named_parameters())
    np.testing.assert_allclose(stats["layers.1.bias"].numpy(), x1.mean(0))
    np.testing.assert_allclose(stats[dense].numpy(), np.einsum("bi,bj->ij", x0, x1) / 7)
    # A lateral statistic is the strict upper triangle of the average x^T x (its free entries).
    np.testing.assert_allclose(stats[lateral].numpy(), np.triu(np.einsum("bi,bj->ij", x0, x0) / 7, 1))
    weights = torch.softmax(torch.randn(7, generator=generator, dtype=torch.float64), 0)
    weighted = model.statistics(states, weights)
    w = weights.numpy()
    np.testing.assert_allclose(weighted["layers.0.bias"].numpy(), w @ x0)
    np.testing.assert_allclose(weighted[dense].numpy(), np.einsum("b,bi,bj->ij", w, x0, x1))


def test_free_energy_in_another_dtype_stays_differentiable(lateral_model, generator):
    v = torch.bernoulli(torch.full((4, 5), 0.5), generator=generator)
    free_energy = lateral_model.free_energy(v, dtype=torch.float64)
    assert free_energy.dtype == torch.float64
    # The same parameters in float64 (mathematics: only the cast separates the two).
    expected = copy.deepcopy(lateral_model).double().free_energy(v.double())
    assert torch.allclose(free_energy, expected, atol=1e-12)
    free_energy.sum().backward()
    assert all(p.grad is not None and p.grad.dtype == torch.float32 for p in lateral_model.parameters())


def test_schedule_may_be_reordered_or_split_but_not_broken():
    model = el.dbm(3, 2, 2, 2)
    model.schedule = el.UpdateSchedule(classes=((1, 3), (0,), (2,)), unitwise=frozenset())  # valid
    assert model.schedule.classes == ((1, 3), (0,), (2,))
    lateral = make_lateral_model()
    wrong = [
        (
            model,
            el.UpdateSchedule(classes=((0, 1), (2, 3)), unitwise=frozenset()),
            "layers 0 and 1 are coupled",
        ),
        (model, el.UpdateSchedule(classes=((0, 2), (1,)), unitwise=frozenset()), "every layer 0..3"),
        (model, el.UpdateSchedule(classes=((0, 2), (1, 3), (2,)), unitwise=frozenset()), "exactly once"),
        (lateral, el.UpdateSchedule(classes=((0,), (1, 2)), unitwise=frozenset()), "schedule.unitwise"),
        (model, ((0, 2), (1, 3)), "UpdateSchedule"),
    ]
    for target, schedule, fragment in wrong:
        before = target.schedule
        with pytest.raises((TypeError, ValueError), match=fragment):
            target.schedule = schedule
        assert target.schedule is before
