"""Ground truth: the library against brute-force enumeration of every joint state.

The reference, ``tests/reference.py``, is written from the mathematics alone, without
``ebm_layers.model.functional``: all units are stacked into one vector x of N units and
E(x) = -b.x - 1/2 x J x^T, with J the symmetric interaction matrix assembled from the couplings
(a dense W between layers a and b fills block (a, b) with W and block (b, a) with W^T; a lateral
L fills block (a, a)). Then log Z, marginals, conditionals and moments are sums over all 2^N
states. Every check below names this source, "exact enumeration (mathematics)", or the
reference library it uses.
"""

from __future__ import annotations

import copy

import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.special import logsumexp
from torch import Tensor
from torch.nn.functional import softplus

import ebm_layers as el
from ebm_layers.phases import exact as enumeration
from tests.helpers import assert_all_close, assert_close, close
from tests.reference import (
    CLOSED_FORM,
    NOT_CLOSED_FORM,
    SHAPES,
    Reference,
    brute_force,
    build,
    direct_energy,
    interaction_matrix,
    randomize,
    visible_marginal,
)

EXAMPLES = settings(derandomize=True, deadline=None, max_examples=20)
MAX_UNITS = 12  # 4096 joint states: enumeration of everything stays cheap


def draw_model(data: st.DataObject, shape: str) -> el.EnergyModel:
    """A random model of ``shape``: layer sizes 1..4 (at most MAX_UNITS units), random parameters."""
    num_layers, _ = SHAPES[shape]
    sizes = data.draw(
        st.lists(st.integers(1, 4), min_size=num_layers, max_size=num_layers).filter(
            lambda s: sum(s) <= MAX_UNITS
        ),
        label="sizes",
    )
    seed = data.draw(st.integers(0, 2**32 - 1), label="seed")
    return randomize(build(shape, tuple(sizes)), seed)


def random_models(shapes):
    """Run a test ``(shape, data)`` for every shape in ``shapes``, hypothesis drawing the models."""

    def decorate(test):
        return pytest.mark.parametrize("shape", shapes)(EXAMPLES(given(data=st.data())(test)))

    return decorate


def bias_names(model: el.EnergyModel) -> list[str]:
    """The statistics keys of the layers' biases, layer 0 first."""
    return [f"layers.{i}.bias" for i in range(len(model.layers))]


def coupling_names(model: el.EnergyModel) -> list[str]:
    """The statistics key of every coupling's free tensor, in coupling order (a lateral coupling's
    is its parametrize original)."""
    return [
        f"couplings.{k}.parametrizations.weight.original" if c.a == c.b else f"couplings.{k}.weight"
        for k, c in enumerate(model.couplings)
    ]


def assert_exact_statistics(stats: el.Statistics, model: el.EnergyModel, ref: Reference) -> None:
    """Exact enumeration (mathematics): ``stats`` hold E[x_i] per layer and E[x_a^T x_b] per coupling.

    A lateral coupling's statistic is the strict upper triangle of its (n, n) average E[x^T x]
    (the entries i < j of its free matrix); the diagonal E[x_i] is the layer's own mean.
    """
    assert sorted(stats) == sorted(name for name, _ in model.named_parameters())
    assert_all_close([stats[name] for name in bias_names(model)], [ref.prob @ x for x in ref.states])
    pairs = [ref.states[c.a].T @ (ref.prob[:, None] * ref.states[c.b]) for c in model.couplings]
    pairs = [p.triu(1) if c.a == c.b else p for p, c in zip(pairs, model.couplings)]
    assert_all_close([stats[name] for name in coupling_names(model)], pairs)


def flip_conditionals(ref: Reference) -> Tensor:
    """Exact enumeration (mathematics): p(x_g = 1 | all other units) for every state and unit, (2^N, N).

    It is p(x with unit g = 1) / (p(x with unit g = 1) + p(x with unit g = 0)); unit g is bit
    N-1-g of the row index, so both states are found by setting or clearing that bit.
    """
    rows = torch.arange(len(ref.x))[:, None]
    bits = 1 << torch.arange(ref.x.shape[1] - 1, -1, -1)
    p_on, p_off = ref.prob[rows | bits], ref.prob[rows & ~bits]
    return p_on / (p_on + p_off)


def free_parameters(model: el.EnergyModel) -> list[Tensor]:
    """Biases, then each coupling's free tensor (a lateral coupling's parametrize original)."""
    weights = [c.parametrizations.weight.original if c.a == c.b else c.weight for c in model.couplings]
    return [layer.bias for layer in model.layers] + weights


@random_models(SHAPES)
def test_energy_matches_direct_formula(shape, data):
    model = draw_model(data, shape)
    ref = brute_force(model)
    # exact enumeration (mathematics): the direct formula at every joint state.
    assert_close(model.energy(ref.states), ref.energy)


@random_models(SHAPES)
def test_log_partition_matches_enumeration(shape, data):
    model = draw_model(data, shape)
    log_z = el.exact_log_partition(model)
    assert log_z.dtype == torch.float64 and log_z.shape == ()
    # exact enumeration (mathematics): log sum_x exp(-E(x)) over every joint state.
    assert_close(log_z, brute_force(model).log_z)


@random_models(CLOSED_FORM)
def test_log_likelihood_matches_marginal(shape, data):
    model = draw_model(data, shape)
    ref = brute_force(model)
    v, log_p = visible_marginal(ref, -ref.energy)
    # exact enumeration (mathematics): log p(v) = log sum_h exp(-E(v, h)) - log Z, for every v.
    assert_close(-model.free_energy(v) - ref.log_z, log_p)
    log_likelihood = el.exact_log_likelihood(model, v)
    assert_close(log_likelihood, log_p)
    # The training signal too: autograd of both sides agrees for every parameter.
    params = free_parameters(model)
    _, differentiable = visible_marginal(ref, -direct_energy(model, ref.x))
    got = torch.autograd.grad(log_likelihood.sum(), params)
    assert_all_close(list(got), list(torch.autograd.grad(differentiable.sum(), params)))


@pytest.mark.parametrize("shape", NOT_CLOSED_FORM)
def test_free_energy_refused_when_hidden_units_are_coupled(shape):
    num_layers, _ = SHAPES[shape]
    model = build(shape, (2,) * num_layers)
    v = torch.zeros(3, 2, dtype=torch.float64)
    with pytest.raises(ValueError, match="no closed-form free energy"):
        model.free_energy(v)
    # exact_log_likelihood enumerates the hidden states instead (exact enumeration, mathematics).
    randomize(model, seed=3)
    ref = brute_force(model)
    every_v, log_p = visible_marginal(ref, -ref.energy)
    assert_close(el.exact_log_likelihood(model, every_v), log_p)


@random_models(SHAPES)
def test_exact_statistics_match_enumeration(shape, data):
    model = draw_model(data, shape)
    # exact enumeration (mathematics): E[x_i] and E[x_a^T x_b] under p(x) = exp(-E(x)) / Z.
    assert_exact_statistics(el.ExactStatistics(model).statistics(), model, brute_force(model))


@random_models(SHAPES)
def test_conditionals_match_joint_probability_ratio(shape, data):
    model = draw_model(data, shape)
    ref = brute_force(model)
    # exact enumeration (mathematics): the joint-probability ratio at every state and unit.
    expected = flip_conditionals(ref).split(model.sizes, dim=1)
    for i in range(len(model.layers)):
        logits = model.layers[i].bias + model.conditional_input(ref.states, i)
        assert_close(torch.sigmoid(logits), expected[i])
        assert_close(model.conditional_mean(ref.states, i), expected[i])
        if (i, i) not in model.edges:
            # Without lateral couplings a layer's units are independent given the other layers.
            flipped = list(ref.states)
            flipped[i] = 1.0 - flipped[i]
            assert torch.equal(model.layers[i].bias + model.conditional_input(flipped, i), logits)


@random_models(SHAPES)
def test_log_partition_gradient_matches_autograd_of_enumeration(shape, data):
    model = draw_model(data, shape)
    params = free_parameters(model)
    assert {id(p) for p in params} == {id(p) for p in model.parameters()}
    got = torch.autograd.grad(el.exact_log_partition(model), params)
    # exact enumeration (mathematics): autograd through logsumexp(-E(x)) over every joint state.
    ref = brute_force(model)
    want = torch.autograd.grad(torch.logsumexp(-direct_energy(model, ref.x), 0), params)
    assert_all_close(list(got), list(want))
    # Mathematics: d log Z / d theta = E[-dE/d theta]: E[x] for a bias, E[x_a^T x_b] for a dense
    # weight, E[x_i x_j] for a free lateral entry i < j (it enters -E once, as L_ij x_i x_j).
    stats = el.ExactStatistics(model).statistics()
    names = bias_names(model) + coupling_names(model)
    assert names == [name for name, _ in model.named_parameters()]
    assert_all_close(list(got), [stats[name] for name in names])


@random_models(SHAPES)
def test_float32_model_enumerates_in_float64(shape, data):
    model = draw_model(data, shape)
    model32 = copy.deepcopy(model).to(torch.float32)
    log_z = el.exact_log_partition(model32)
    assert log_z.dtype == torch.float64
    # exact enumeration (mathematics) of the same float32 parameters, summed in float64.
    assert_close(log_z, brute_force(model32).log_z)
    # Only the parameters' rounding to float32 separates it from the float64 model.
    assert_close(log_z, brute_force(model).log_z, rtol=1e-5, atol=1e-5)
    grads = torch.autograd.grad(log_z, free_parameters(model32))
    want = torch.autograd.grad(el.exact_log_partition(model), free_parameters(model))
    assert all(g.dtype == torch.float32 for g in grads)
    for got, expected in zip(grads, want):
        assert_close(got.double(), expected, rtol=1e-5, atol=1e-5)


def exact_results(model: el.EnergyModel) -> list[Tensor]:
    """log Z, then the exact statistics (biases, then couplings), as one flat list."""
    stats = el.ExactStatistics(model).statistics()
    return [
        el.exact_log_partition(model),
        *(stats[name] for name in bias_names(model) + coupling_names(model)),
    ]


@random_models(SHAPES)
def test_chunked_enumeration_changes_nothing(shape, data):
    model = draw_model(data, shape)
    whole = exact_results(model)
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(enumeration, "_CHUNK_ELEMENTS", 8)  # at most 8 // N rows (>= 1) per chunk
        assert_all_close(exact_results(model), whole)


@pytest.mark.parametrize(("shape", "sizes"), [("skip", (4, 4, 4)), ("semi_restricted", (6, 6))])
def test_chunked_enumeration_with_large_weights(shape, sizes):
    # For these 12-unit models weights of scale 30 keep -E below ~410; 100 pushes it past float64's
    # exp range (~709), and with one enumerated state per chunk the chunks' weights span hundreds
    # of orders of magnitude, so the running rescaling between chunks is what gets tested.
    model = randomize(build(shape, sizes), seed=3, scale=100.0)
    ref = brute_force(model)
    # negative control: naive exp(-E) overflows float64, so only a stable log-sum-exp gets it right.
    assert not torch.isfinite(torch.exp(-ref.energy).sum())
    expected = torch.tensor(logsumexp(-ref.energy.numpy()), dtype=torch.float64)  # scipy.special.logsumexp
    assert_close(ref.log_z, expected)
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(enumeration, "_CHUNK_ELEMENTS", 8)
        chunks = []
        per_chunk = el.EnergyModel.summed_free_energy  # the enumeration calls it once per chunk

        def counted(*args, **kwargs):
            chunks.append(args)
            return per_chunk(*args, **kwargs)

        patch.setattr(el.EnergyModel, "summed_free_energy", counted)
        log_z = el.exact_log_partition(model)
        stats = el.ExactStatistics(model).statistics()
    # The patch took effect: two enumerations of at least 2^6 cover states, one state per chunk.
    assert len(chunks) >= 2 * 2**6
    assert_close(log_z, expected)
    assert_exact_statistics(stats, model, ref)  # exact enumeration (mathematics)


@pytest.mark.parametrize(
    ("shape", "sizes", "cover"),
    [
        ("rbm", (8, 3), (1,)),
        ("rbm", (3, 8), (0,)),
        ("chain3", (3, 5, 3), (1,)),
        ("chain3", (2, 5, 2), (0, 2)),
        ("hidden_lateral_chain", (2, 5, 2), (1,)),
        ("hidden_star", (4, 1, 1), (1, 2)),
        ("pairwise", (5,), (0,)),
        ("uncoupled_layer", (4, 2, 3), (1,)),
        ("no_couplings", (3, 2), ()),
    ],
)
def test_enumeration_cover_is_smallest(shape, sizes, cover):
    # Mathematics, worked out by hand: the layers with the fewest units that touch every coupling
    # (a lateral layer touches its own), ties to fewer layers, then lower indices.
    assert enumeration.enumeration_cover(build(shape, sizes)) == cover


def test_too_many_states_refused_with_the_count():
    model = el.rbm(30, 30)
    with pytest.raises(ValueError, match=r"2\^30"):
        el.exact_log_partition(model)
    with pytest.raises(ValueError, match=r"2\^30"):
        el.ExactStatistics(model)
    with pytest.raises(ValueError, match=r"2\^4"):
        el.exact_log_partition(el.rbm(5, 4), max_states=2**3)


@EXAMPLES
@given(data=st.data())
def test_uncoupled_units_give_softplus_log_partition(data):
    model = draw_model(data, "no_couplings")
    bias = torch.cat([layer.bias for layer in model.layers])
    # Mathematics: independent units, Z = prod_i (1 + exp(b_i)), p(x_i = 1) = sigmoid(b_i).
    assert_close(el.exact_log_partition(model), softplus(bias).sum())
    stats = el.ExactStatistics(model).statistics()
    assert_close(torch.cat([stats[name] for name in bias_names(model)]), torch.sigmoid(bias))


def test_negative_controls_have_power():
    """The comparisons above would notice the mistakes a library could plausibly make."""
    model = randomize(build("hidden_lateral_chain", (3, 3, 3)), seed=11)
    ref = brute_force(model)
    log_z = el.exact_log_partition(model)
    assert_close(log_z, ref.log_z)

    # negative control: a lateral term -x L x^T without the 1/2 (J block 2 L) is told apart.
    doubled = brute_force(model, lateral_factor=2.0)
    assert not close(model.energy(ref.states), doubled.energy)
    assert not close(log_z, doubled.log_z)

    # negative control: one weight moved by 1e-3 changes log Z beyond the tolerance.
    nudged = copy.deepcopy(model)
    with torch.no_grad():
        nudged.couplings[0].weight[0, 0] += 1e-3
    assert not close(log_z, brute_force(nudged).log_z)

    # negative control: a conditional of the lateral layer without its lateral input disagrees
    # with the joint-probability ratio, while the full input b + x J agrees.
    expected = flip_conditionals(ref).split(model.sizes, dim=1)[1]
    bias = torch.cat([layer.bias for layer in model.layers]).detach()
    for lateral_factor, agrees in ((1.0, True), (0.0, False)):
        logits = (bias + ref.x @ interaction_matrix(model, lateral_factor).detach()).split(model.sizes, 1)[1]
        assert close(torch.sigmoid(logits), expected) is agrees

    # negative control: the own-state independence checked for lateral-free layers fails here.
    flipped = list(ref.states)
    flipped[1] = 1.0 - flipped[1]
    assert not torch.equal(model.conditional_input(flipped, 1), model.conditional_input(ref.states, 1))
