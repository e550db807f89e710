"""CategoricalLayer (softmax units): the layer's formulas against scipy and torch, its draws against
the softmax, its list of states and its data checks; then models with a categorical layer against
exact enumeration: Gibbs stationarity, AIS, exact gradients, and mean field with a categorical
hidden layer.

Models are float64 with parameters from N(0, 1) (``reference.randomize``); ground truth comes from
every joint state written out in ``tests/reference.py`` (``every_joint_state``) and the energy of
the mathematics (``reference.direct_energy``: every term is ``-b.x`` or ``-x_a W x_b``).
"""

import numpy as np
import pytest
import scipy.special
import scipy.stats
import torch
from torch import Tensor
from torch.nn.functional import one_hot

import ebm_layers as el
from tests.helpers import (
    F64,
    assert_unchanged,
    expected_total_variation,
    seeded,
    snapshot,
    state_frequencies,
    total_variation,
)
from tests.reference import direct_energy, every_joint_state, randomize


def layer_with_bias(groups: int, categories: int, seed: int) -> el.CategoricalLayer:
    layer = el.CategoricalLayer(groups, categories, dtype=F64)
    with torch.no_grad():
        layer.bias.copy_(torch.randn(layer.size, generator=seeded(seed), dtype=F64))
    return layer


class BiasBlindCategorical(el.CategoricalLayer):
    """Negative control: draws from the softmax of the input alone, forgetting the bias."""

    def sample(self, input: Tensor, generator: torch.Generator) -> Tensor:
        grouped = input.detach().reshape(-1, self.categories).softmax(-1)
        index = torch.multinomial(grouped, 1, generator=generator).view(-1, self.groups)
        return one_hot(index, self.categories).to(input.dtype).flatten(1)


def visible_categorical(layer_type: type = el.CategoricalLayer, seed: int = 0) -> el.EnergyModel:
    """Categorical visible layer (2 groups of 3) and 3 binary hidden units: 9 x 8 joint states."""
    model = el.EnergyModel(
        [layer_type(2, 3, dtype=F64), el.BinaryLayer(3, dtype=F64)],
        [el.DenseCoupling(0, 1, 6, 3, dtype=F64)],
    )
    return randomize(model, seed, scale=1.0)


def hidden_categorical(layer_type: type = el.CategoricalLayer, seed: int = 0) -> el.EnergyModel:
    """3 binary visible units and a categorical hidden layer (2 groups of 3): 8 x 9 joint states."""
    model = el.EnergyModel(
        [el.BinaryLayer(3, dtype=F64), layer_type(2, 3, dtype=F64)],
        [el.DenseCoupling(0, 1, 3, 6, dtype=F64)],
    )
    return randomize(model, seed, scale=1.0)


def exact_joint(model: el.EnergyModel) -> tuple[list[Tensor], Tensor]:
    """Exact enumeration (mathematics): every joint state and its probability."""
    states = every_joint_state(model)
    with torch.no_grad():
        return states, torch.softmax(-direct_energy(model, torch.cat(states, 1)), 0)


# -- the layer alone ----------------------------------------------------------------------------


def test_mean_log_partition_and_entropy_are_per_group_softmax_logsumexp_and_entropy():
    layer = layer_with_bias(3, 4, seed=0)
    input = 2.0 * torch.randn(5, 12, generator=seeded(1), dtype=F64)
    grouped = (input + layer.bias).detach().reshape(5, 3, 4)
    with torch.no_grad():
        mean = layer.mean(input)
        # torch.softmax on the input reshaped to (batch, groups, categories).
        torch.testing.assert_close(mean, torch.softmax(grouped, -1).reshape(5, 12), rtol=1e-12, atol=1e-15)
        # scipy.special.logsumexp per group, summed over the groups.
        log_z = scipy.special.logsumexp(grouped.numpy(), axis=-1).sum(-1)
        np.testing.assert_allclose(layer.log_partition(input).numpy(), log_z, rtol=1e-12)
        # scipy.stats.entropy of each group's probabilities, summed over the groups.
        entropy = scipy.stats.entropy(mean.reshape(5, 3, 4).numpy(), axis=-1).sum(-1)
        np.testing.assert_allclose(layer.entropy(mean).numpy(), entropy, rtol=1e-12)
        # A one-hot state has no entropy (0 log 0 = 0) and energy -b.x (mathematics).
        state = layer.states(5, 6)
        assert float(layer.entropy(state)) == 0.0
        torch.testing.assert_close(layer.energy(state), -(state @ layer.bias), rtol=0, atol=0)


def test_draws_are_one_hot_per_group_with_the_softmax_frequencies():
    layer = layer_with_bias(2, 4, seed=2)
    count = 60_000
    fields = 2.0 * torch.randn(2, 8, generator=seeded(3), dtype=F64)
    input = fields.repeat(count, 1)  # rows alternate between two inputs
    draws = layer.sample(input, seeded(4))
    grouped = draws.view(count, 2, 2, 4)  # (draw, which input, group, category)
    assert set(draws.unique().tolist()) == {0.0, 1.0}
    assert torch.equal(grouped.sum(-1), torch.ones(count, 2, 2, dtype=F64))
    with torch.no_grad():
        p = layer.mean(fields).view(2, 2, 4)
    for row in range(2):
        # The 16 joint categories of the two groups: their shares and the groups' independence.
        cells = (grouped[:, row, 0, :, None] * grouped[:, row, 1, None, :]).sum(0).flatten()
        expected = (p[row, 0, :, None] * p[row, 1, None, :]).flatten() * count
        # Pearson's chi-square goodness of fit (scipy.stats.chisquare); fixed seed, so deterministic.
        assert scipy.stats.chisquare(cells.numpy(), expected.numpy()).pvalue > 1e-3
        # Negative control: the softmax of the input alone (the bias forgotten) is rejected.
        blind = torch.softmax(fields[row].view(2, 4), -1)
        wrong = (blind[0, :, None] * blind[1, None, :]).flatten() * count
        assert scipy.stats.chisquare(cells.numpy(), wrong.numpy()).pvalue < 1e-12


def test_states_list_every_one_hot_row_in_counting_order():
    layer = el.CategoricalLayer(2, 3, dtype=F64)
    assert layer.num_states == 3**2
    states = layer.states(0, 9)
    # Counting order base 3, group 0 the lowest digit (the documented order; written out here).
    expected = torch.zeros(9, 6, dtype=F64)
    for row in range(9):
        expected[row, row % 3] = 1.0
        expected[row, 3 + row // 3] = 1.0
    assert torch.equal(states, expected)
    assert torch.equal(layer.states(2, 7), states[2:7])
    larger = el.CategoricalLayer(3, 4)
    rows = larger.states(0, larger.num_states)
    assert larger.num_states == 64 and len({tuple(r) for r in rows.tolist()}) == 64
    assert torch.equal(rows.view(64, 3, 4).sum(-1), torch.ones(64, 3))


def test_as_states_turns_category_indices_one_hot_and_refuses_out_of_range_labels():
    labels = el.CategoricalLayer(1, 4, dtype=F64)
    y = torch.tensor([3, 0, 2, 2])
    assert torch.equal(labels.as_states(y), one_hot(y, 4).to(F64))
    assert torch.equal(labels.as_states(y[:, None]), one_hot(y, 4).to(F64))
    pair = el.CategoricalLayer(2, 3, dtype=F64)
    codes = torch.tensor([[0, 2], [1, 1], [2, 0]])
    expected = torch.cat([one_hot(codes[:, 0], 3), one_hot(codes[:, 1], 3)], 1).to(F64)
    assert torch.equal(pair.as_states(codes), expected)
    assert pair.as_states(expected) is expected  # states already: returned as they are
    for bad in (torch.tensor([[0, 3]]), torch.tensor([[-1, 0]])):
        with pytest.raises(ValueError, match=r"category indices must lie in 0\.\.2"):
            pair.as_states(bad)
    with pytest.raises(ValueError, match=r"0\.\.3, got values from 0 to 4"):
        labels.as_states(torch.tensor([0, 4]))
    # Through the model: indices are converted where data is checked, bad ones refused.
    model = visible_categorical()
    assert torch.equal(model.checked("v", codes), expected)
    with pytest.raises(ValueError, match=r"0\.\.2"):
        model.checked("v", torch.tensor([[0, 3]]))


def test_out_of_range_labels_are_refused_naming_the_argument():
    model = visible_categorical()
    with pytest.raises(ValueError, match=r"data"):
        el.fit(model, torch.tensor([[0, 3]]), epochs=1, progress=False)


@pytest.mark.parametrize(
    "row, where",
    [([1, 1, 0, 0, 0, 1], "row 1, group 0 sums to 2"), ([0, 1, 0, 0, 0, 0], "row 1, group 1 sums to 0")],
)
def test_rows_whose_groups_do_not_sum_to_one_are_refused_and_nothing_changes(row, where):
    model = visible_categorical()
    sampler = el.PersistentSampler(model, num_particles=4, generator=seeded(0))
    objective = el.TwoPhaseObjective(model, el.MeanField(model), sampler)
    bad = torch.tensor([[1, 0, 0, 0, 1, 0], row], dtype=F64)
    before = snapshot(objective)
    with pytest.raises(ValueError, match=rf"v must hold one-hot groups of 3 units.*{where}"):
        model.checked("v", bad)
    with pytest.raises(ValueError, match=rf"v must hold one-hot groups.*{where}"):
        objective(bad)
    with pytest.raises(ValueError, match=rf"data must hold one-hot groups.*{where}"):
        el.fit(model, bad, objective=objective, epochs=1, progress=False)
    assert_unchanged(objective, before)  # parameters, particles and generator state
    # Probabilities summing to one per group are means, and accepted.
    model.checked("v", torch.full((2, 6), 1.0 / 3.0, dtype=F64))


@pytest.mark.parametrize(
    "groups, categories, error, message",
    [
        (1, 1, ValueError, "categories must be at least 2, got 1"),
        (0, 3, ValueError, "groups must be positive, got 0"),
        (2, 0, ValueError, "categories must be positive, got 0"),
        (-1, 3, ValueError, "groups must be positive, got -1"),
        (1.0, 3, TypeError, "groups must be an int"),
    ],
)
def test_constructor_refuses_bad_sizes(groups, categories, error, message):
    with pytest.raises(error, match=message):
        el.CategoricalLayer(groups, categories)


# -- models with a categorical layer against exact enumeration -----------------------------------


def gibbs_total_variation(model: el.EnergyModel, count: int, seed: int) -> dict[str, tuple[float, float]]:
    """Start ``count`` persistent chains at exact draws of the joint and run three calls of one
    sweep; for the visible states and for the joint states, the total variation from the exact
    distribution and the Monte Carlo noise (its expected value for as many exact draws)."""
    states, p = exact_joint(model)
    g = seeded(seed)
    index = torch.multinomial(p, count, replacement=True, generator=g)
    sampler = el.PersistentSampler(model, num_particles=count, generator=g)
    for i, table in enumerate(states):
        setattr(sampler, f"particles_{i}", table[index].clone())
    for _ in range(3):
        after = sampler()
    visible, inverse = torch.unique(states[0], dim=0, return_inverse=True)
    visible_p = torch.zeros(len(visible), dtype=F64).index_add_(0, inverse, p)
    joint_freq = state_frequencies(torch.cat(after, 1), torch.cat(states, 1))
    return {
        "visible": (
            total_variation(state_frequencies(after[0], visible), visible_p),
            expected_total_variation(visible_p, count),
        ),
        "joint": (total_variation(joint_freq, p), expected_total_variation(p, count)),
    }


@pytest.mark.parametrize("build", [visible_categorical, hidden_categorical], ids=["visible", "hidden"])
def test_gibbs_sweeps_leave_the_exact_distribution_invariant(build):
    # Exact enumeration (mathematics) against 20,000 chains; the noise is the expected total
    # variation of as many exact draws (normal approximation, from memory).
    count = 20_000
    for what, (distance, noise) in gibbs_total_variation(build(), count, seed=5).items():
        assert distance < 1.5 * noise, (what, distance, noise)  # measured: 1.03-1.26 x noise
    # Negative control: the categorical layer drawing without its bias moves the distribution
    # (measured: 26-98 x noise).
    for what, (distance, noise) in gibbs_total_variation(build(BiasBlindCategorical), count, seed=5).items():
        assert distance > 5 * noise, (what, distance, noise)


def test_ais_brackets_the_exact_log_partition_of_a_categorical_visible_model():
    model = visible_categorical(seed=1)
    exact = float(el.exact_log_partition(model).detach())
    # Exact enumeration (mathematics): log Z from every joint state.
    states, _ = exact_joint(model)
    with torch.no_grad():
        assert exact == pytest.approx(float(torch.logsumexp(-direct_energy(model, torch.cat(states, 1)), 0)))
    uniform = el.ais_log_partition(model, num_chains=100, num_betas=200, generator=seeded(6), progress=False)
    # Data as category indices (B, groups), for the base model's category frequencies.
    data = torch.randint(0, 3, (50, 2), generator=seeded(7))
    fitted = el.ais_log_partition(
        model, num_chains=100, num_betas=200, data=data, base="data", generator=seeded(8), progress=False
    )
    for estimate in (uniform, fitted):
        # "Annealed Importance Sampling" (Neal, Statistics and Computing, 2001): the bracket of
        # three standard errors holds the exact value.
        assert estimate.lower <= exact <= estimate.upper, (estimate, exact)
        assert estimate.upper - estimate.lower < 0.3
    assert fitted.log_z_base != uniform.log_z_base  # the data did change the base model


def brute_log_likelihood(model: el.EnergyModel, v: Tensor) -> Tensor:
    """Exact enumeration (mathematics): log p(v) per row of one-hot ``v``, every joint state's
    ``-E`` summed over the hidden states; differentiable in the parameters."""
    states = every_joint_state(model)
    neg_energy = -direct_energy(model, torch.cat(states, 1))
    log_p = neg_energy - neg_energy.logsumexp(0)
    return torch.stack([log_p[(states[0] == row).all(1)].logsumexp(0) for row in v])


def gradient_of(loss: Tensor, model: el.EnergyModel) -> dict[str, Tensor]:
    names = [name for name, _ in model.named_parameters()]
    return dict(zip(names, torch.autograd.grad(loss, list(model.parameters()))))


@pytest.mark.parametrize("form", ["one-hot", "indices"])
def test_objective_gradient_with_exact_phases_is_the_exact_likelihood_gradient(form):
    model = visible_categorical(seed=2)
    codes = torch.randint(0, 3, (12, 2), generator=seeded(9))
    one_hot_v = model.checked("v", codes)
    v = codes if form == "indices" else one_hot_v
    # Exact enumeration (mathematics): log p(v) and the gradient of the mean negative log-likelihood.
    expected = brute_log_likelihood(model, one_hot_v)
    reference = gradient_of(-expected.mean(), model)
    library = el.exact_log_likelihood(model, codes)  # the indices as data
    torch.testing.assert_close(library.detach(), expected.detach(), rtol=1e-10, atol=0)
    for name, value in gradient_of(-library.mean(), model).items():
        torch.testing.assert_close(value, reference[name], rtol=1e-9, atol=1e-11, msg=name)
    objective = el.TwoPhaseObjective(model, el.MeanField(model, tol=1e-10), el.ExactStatistics(model))
    for name, value in gradient_of(objective(v), model).items():
        torch.testing.assert_close(value, reference[name], rtol=1e-9, atol=1e-11, msg=name)


def deep_with_categorical_hidden(seed: int = 3) -> el.EnergyModel:
    """4 binary visible units, a categorical hidden layer (2 groups of 3), 3 binary units on top."""
    model = el.EnergyModel(
        [el.BinaryLayer(4, dtype=F64), el.CategoricalLayer(2, 3, dtype=F64), el.BinaryLayer(3, dtype=F64)],
        [el.DenseCoupling(0, 1, 4, 6, dtype=F64), el.DenseCoupling(1, 2, 6, 3, dtype=F64)],
    )
    return randomize(model, seed, scale=1.0)


def test_mean_field_with_a_categorical_hidden_layer_converges_to_its_fixed_point():
    model = deep_with_categorical_hidden()
    v = torch.bernoulli(torch.full((6, 4), 0.5, dtype=F64), generator=seeded(10))
    mf = el.MeanField(model, tol=1e-12, max_iter=500)
    with torch.no_grad():
        _, middle, top = mf(v)
    assert mf.converged and mf.iterations > 1
    # The fixed-point equations written out (mathematics): a softmax per group, a sigmoid.
    (_, categorical, binary), (low, high) = model.layers, model.couplings
    with torch.no_grad():
        field = categorical.bias + v @ low.weight + top @ high.weight.T
        expected_middle = torch.softmax(field.view(6, 2, 3), -1).view(6, 6)
        expected_top = torch.sigmoid(binary.bias + middle @ high.weight)
    torch.testing.assert_close(middle, expected_middle, rtol=0, atol=1e-10)
    torch.testing.assert_close(top, expected_top, rtol=0, atol=1e-10)
    torch.testing.assert_close(middle.view(6, 2, 3).sum(-1), torch.ones(6, 2, dtype=F64), rtol=0, atol=1e-12)


def test_implicit_backward_through_a_categorical_hidden_layer_matches_unrolling():
    model = deep_with_categorical_hidden()
    v = torch.bernoulli(torch.full((6, 4), 0.5, dtype=F64), generator=seeded(11))
    g = seeded(12)
    weights = [torch.randn(6, n, generator=g, dtype=F64) for n in model.sizes[1:]]

    def gradients(backward: str) -> dict[str, Tensor]:
        model.zero_grad(set_to_none=True)
        data = v.clone().requires_grad_()
        marginals = el.MeanField(model, tol=1e-12, max_iter=500, backward=backward)(data)
        sum((mu * w).sum() for mu, w in zip(marginals[1:], weights)).backward()
        # The visible bias does not enter the marginals of the hidden layers: no gradient.
        return {
            "v": data.grad,
            **{name: p.grad for name, p in model.named_parameters() if name != "layers.0.bias"},
        }

    # The reference: autograd through every iteration (backward="unroll"); the implicit backward
    # differentiates the fixed point ("Deep Equilibrium Models", NeurIPS 2019).
    implicit, unrolled = gradients("implicit"), gradients("unroll")
    assert model.layers[0].bias.grad is None
    for name, value in unrolled.items():
        assert value.abs().max() > 1e-3, name  # every gradient is there to compare
        torch.testing.assert_close(implicit[name], value, rtol=1e-7, atol=1e-9, msg=name)
