"""FeatureExtractor and feedforward_network against independent formulas.

References: the mean-field marginals of ``MeanField`` (tested on their own in
tests/test_inference.py), bottom-up formulas written here with plain torch ops, exact
enumeration of an RBM's hidden states (mathematics), and finite differences
(``torch.autograd.gradcheck``).
"""

from __future__ import annotations

import itertools

import pytest
import torch
from torch import nn
from torch.func import functional_call

import ebm_layers as el
from ebm_layers.features import ConcatenatedLayers, FeatureExtractor, feedforward_network
from tests.helpers import assert_unchanged, snapshot
from tests.reference import randomize

DTYPE = torch.float64


def chain(*sizes: int, seed: int = 0, scale: float = 1.5) -> el.EnergyModel:
    """A float64 dbm()/rbm() with every bias and weight drawn from N(0, scale^2)."""
    model = el.dbm(*sizes, generator=torch.Generator().manual_seed(seed), dtype=DTYPE)
    return randomize(model, seed, scale)


def means(batch: int, width: int, seed: int = 1) -> torch.Tensor:
    """Bernoulli means in [0.1, 0.9], so finite differences stay inside [0, 1]."""
    generator = torch.Generator().manual_seed(seed)
    return 0.1 + 0.8 * torch.rand(batch, width, dtype=DTYPE, generator=generator)


def other_model(layers: list[el.BinaryLayer], edges: list[tuple[int, int]]) -> el.EnergyModel:
    """A float64 EnergyModel of the given layer sizes and couplings (a == b: lateral)."""
    sizes = [layer.size for layer in layers]
    couplings = [
        el.LateralCoupling(a, sizes[a], dtype=DTYPE)
        if a == b
        else el.DenseCoupling(a, b, sizes[a], sizes[b], dtype=DTYPE)
        for a, b in edges
    ]
    return randomize(el.EnergyModel(layers, couplings), seed=3)


def float64_layers(*sizes: int) -> list[el.BinaryLayer]:
    return [el.BinaryLayer(n, dtype=DTYPE) for n in sizes]


# -- FeatureExtractor: what it returns ------------------------------------------------------


def test_default_is_every_hidden_layer_in_index_order():
    model = chain(6, 5, 4)
    extractor = FeatureExtractor(model)
    assert extractor.layers == (1, 2) and extractor.num_features == 9
    assert extractor.model is model and extractor.mean_field.model is model
    assert extractor.mean_field.init == "bottom-up" and extractor.mean_field.backward == "implicit"
    assert "layers=[1, 2], num_features=9" in repr(extractor)
    v = means(3, 6)
    with torch.no_grad():
        features = extractor(v)
        assert features.shape == (3, 9) and features.dtype == DTYPE
        # Mathematics: the mean-field equations of a chain, written out here,
        # mu_1 = sigmoid(b_1 + v W_01 + mu_2 W_12^T) and mu_2 = sigmoid(b_2 + mu_1 W_12).
        mu1, mu2 = features.split([5, 4], dim=1)
        (b1, b2), (w01, w12) = [layer.bias for layer in model.layers[1:]], model.weights()
        residual = torch.cat(
            [torch.sigmoid(b1 + v @ w01 + mu2 @ w12.T) - mu1, torch.sigmoid(b2 + mu1 @ w12) - mu2], dim=1
        )
    assert float(residual.abs().max()) < extractor.mean_field.tol
    assert extractor.mean_field.iterations > 1  # control: not the trivial one-pass case


@pytest.mark.parametrize("layers", [[1], [2], [3], [3, 1], [2, 1, 3], (1, 2, 3)])
def test_features_are_the_mean_field_marginals_in_the_order_given(layers):
    model = chain(6, 5, 4, 3)
    v = means(4, 6)
    mean_field = el.MeanField(model, init="bottom-up")
    extractor = FeatureExtractor(model, layers=layers, mean_field=mean_field)
    with torch.no_grad():
        features = extractor(v)
        # Reference: MeanField called directly (its marginals are tested in tests/test_inference.py).
        marginals = el.MeanField(model, init="bottom-up")(v)
    expected = torch.cat([marginals[i] for i in layers], dim=1)
    assert features.shape == (4, sum(model.sizes[i] for i in layers))
    torch.testing.assert_close(features, expected, rtol=0, atol=0)
    if list(layers) != sorted(layers):  # control: the same layers in index order are another tensor
        in_order = torch.cat([marginals[i] for i in sorted(layers)], dim=1)
        assert not torch.equal(features, in_order)


def test_parameters_are_the_models_and_state_dict_round_trips():
    model = chain(6, 5, 4, seed=0)
    extractor = FeatureExtractor(model, layers=[2, 1])
    assert [id(p) for p in extractor.parameters()] == [id(p) for p in model.parameters()]
    keys = {f"mean_field.model.{key}" for key in model.state_dict()}
    assert set(extractor.state_dict()) == keys
    fresh = FeatureExtractor(chain(6, 5, 4, seed=5), layers=[2, 1])
    v = means(3, 6)
    with torch.no_grad():
        assert not torch.allclose(fresh(v), extractor(v))  # control: a different model differs
        fresh.load_state_dict(extractor.state_dict())
        torch.testing.assert_close(fresh(v), extractor(v), rtol=0, atol=0)


def two_class_problem(seed: int = 0) -> tuple[torch.Tensor, torch.Tensor]:
    """Invented data: class 0 turns on the first half of 8 units, class 1 the second, 10% flips."""
    generator = torch.Generator().manual_seed(seed)
    labels = torch.arange(32) % 2
    prototypes = torch.tensor([[1.0] * 4 + [0.0] * 4, [0.0] * 4 + [1.0] * 4])
    flips = torch.bernoulli(torch.full((32, 8), 0.1), generator=generator)
    return (prototypes[labels] - flips).abs(), labels


def test_fine_tunes_inside_sequential_with_a_linear_head():
    generator = torch.Generator().manual_seed(0)
    model = el.dbm(8, 6, 4, generator=generator)
    with torch.no_grad():
        for coupling in model.couplings:
            coupling.weight.normal_(0.0, 0.3, generator=generator)
    head = nn.Linear(10, 2)
    nn.init.zeros_(head.weight), nn.init.zeros_(head.bias)
    classifier = nn.Sequential(FeatureExtractor(model), head)
    optimizer = torch.optim.SGD(classifier.parameters(), lr=1.0)
    v, labels = two_class_problem()
    before = [w.detach().clone() for w in model.weights()]
    losses = []
    for _ in range(30):
        optimizer.zero_grad()
        loss = nn.functional.cross_entropy(classifier(v), labels)
        loss.backward()
        optimizer.step()
        losses.append(float(loss.detach()))
    assert losses[-1] < 0.5 * losses[0]  # measured: 0.693 -> 0.056
    changes = [float((w.detach() - b).abs().max()) for w, b in zip(model.weights(), before)]
    assert min(changes) > 1e-3  # measured: the couplings moved by up to 0.72 and 0.17


# -- FeatureExtractor: gradients through the mean-field fixed point -------------------------


def gradient_setup():
    """A dbm(5, 4, 3) with strong couplings (mean field takes several sweeps), data and a head."""
    model = chain(5, 4, 3, seed=2, scale=1.5)
    v = means(6, 5, seed=3)
    head = nn.Linear(7, 3, dtype=DTYPE)
    with torch.no_grad():
        head.weight.copy_(torch.randn(3, 7, dtype=DTYPE, generator=torch.Generator().manual_seed(4)))
    labels = torch.tensor([0, 1, 2, 0, 1, 2])
    return model, v, head, labels


def fine_tuning_gradients(extractor: FeatureExtractor, v: torch.Tensor, head: nn.Module, labels):
    """Gradients of a cross-entropy loss w.r.t. v and every parameter of the model (the visible
    bias does not enter the features: zero)."""
    v = v.clone().requires_grad_()
    loss = nn.functional.cross_entropy(head(extractor(v)), labels)
    return torch.autograd.grad(
        loss, [v, *extractor.model.parameters()], allow_unused=True, materialize_grads=True
    )


def naive_features(model: el.EnergyModel, v: torch.Tensor) -> torch.Tensor:
    """Wrong on purpose (the negative control): the fixed point treated as a constant, gradients
    only through one more colour sweep from it (layer 2 from mu_1, then layer 1 from v and mu_2).
    Its value is the fixed point's, so only the derivative differs."""
    with torch.no_grad():
        star = el.MeanField(model, tol=1e-13, max_iter=1000)(v)
    (b1, b2), (w0, w1) = [layer.bias for layer in model.layers[1:]], model.weights()
    mu2 = torch.sigmoid(b2 + star[1] @ w1)
    mu1 = torch.sigmoid(b1 + v @ w0 + mu2 @ w1.T)
    return torch.cat([mu1, mu2], dim=1)


def test_fine_tuning_gradients_match_unrolled_backward():
    model, v, head, labels = gradient_setup()
    tight = {"init": "bottom-up", "tol": 1e-12, "max_iter": 1000}
    implicit_mf = el.MeanField(model, **tight)
    implicit = fine_tuning_gradients(FeatureExtractor(model, mean_field=implicit_mf), v, head, labels)
    assert implicit_mf.iterations >= 10  # the coupling between hidden layers matters
    unroll_mf = el.MeanField(model, backward="unroll", **tight)
    unrolled = fine_tuning_gradients(FeatureExtractor(model, mean_field=unroll_mf), v, head, labels)
    difference = max(float((a - b).abs().max()) for a, b in zip(implicit, unrolled))
    scale = max(float(b.abs().max()) for b in unrolled)
    assert difference < 1e-9 * scale  # measured: 5.7e-12 against a largest gradient of 0.135
    # The default extractor (tol 1e-5) is as close as its tolerance allows.
    default = fine_tuning_gradients(FeatureExtractor(model), v, head, labels)
    # measured: 2.1e-6
    assert max(float((a - b).abs().max()) for a, b in zip(default, unrolled)) < 1e-4 * scale
    # Negative control: one recorded update from a detached fixed point is measurably wrong.
    with torch.no_grad():
        naive_extractor = FeatureExtractor(model, mean_field=el.MeanField(model, tol=1e-13, max_iter=1000))
        torch.testing.assert_close(naive_extractor(v), naive_features(model, v), rtol=0, atol=1e-12)
    v_naive = v.clone().requires_grad_()
    loss = nn.functional.cross_entropy(head(naive_features(model, v_naive)), labels)
    naive = torch.autograd.grad(
        loss, [v_naive, *model.parameters()], allow_unused=True, materialize_grads=True
    )
    naive_difference = max(float((a - b).abs().max()) for a, b in zip(naive, unrolled))
    assert naive_difference > 1e-2 * scale  # measured: 0.157, more than the largest gradient


def test_gradcheck_through_the_extractor_in_v_and_a_weight():
    model, v, _, _ = gradient_setup()
    extractor = FeatureExtractor(model, mean_field=el.MeanField(model, init="bottom-up", tol=1e-13))
    name = "mean_field.model.couplings.1.weight"
    weight = dict(extractor.named_parameters())[name].detach().clone().requires_grad_()

    def features(v, weight):
        return functional_call(extractor, {name: weight}, (v,))

    # torch.autograd.gradcheck: analytical against finite-difference Jacobians.
    assert torch.autograd.gradcheck(features, (v[:2].clone().requires_grad_(), weight), atol=1e-6, rtol=1e-4)
    # Negative control: the same check rejects the backward through a single update.
    naive = torch.autograd.gradcheck(
        lambda v: naive_features(model, v), (v[:2].clone().requires_grad_(),), raise_exception=False
    )
    assert not naive


# -- feedforward_network ---------------------------------------------------------------------


def bottom_up(model: el.EnergyModel, v: torch.Tensor) -> list[torch.Tensor]:
    """The recognition pass written out: h_l = sigmoid(s_l h_{l-1} W + b_l), s_l = 2 below the top,
    1 at the top ("Deep Boltzmann Machines", AISTATS 2009, from memory)."""
    top, hidden = len(model.layers) - 1, [v]
    for layer in range(1, top + 1):
        scale = 2.0 if layer < top else 1.0
        weight = model.couplings[layer - 1].weight
        hidden.append(torch.sigmoid(scale * hidden[-1] @ weight + model.layers[layer].bias))
    return hidden


@pytest.mark.parametrize("sizes", [(6, 5, 4), (6, 5, 4, 3)])
def test_network_computes_the_doubled_bottom_up_pass(sizes):
    model = chain(*sizes)
    v = means(4, 6)
    network = feedforward_network(model)
    top = len(sizes) - 1
    assert isinstance(network, nn.Sequential) and len(network) == top
    assert all(isinstance(block[0], nn.Linear) and isinstance(block[1], nn.Sigmoid) for block in network)
    assert network[0][0].weight.dtype == DTYPE
    with torch.no_grad():
        hidden = bottom_up(model, v)
        torch.testing.assert_close(network(v), hidden[top], rtol=1e-12, atol=1e-14)
        below = feedforward_network(model, layers=[top - 1])
        assert len(below) == top - 1
        torch.testing.assert_close(below(v), hidden[top - 1], rtol=1e-12, atol=1e-14)
        several = feedforward_network(model, layers=[top, 1])
        assert isinstance(several, ConcatenatedLayers) and several.layers == (top, 1)
        expected = torch.cat([hidden[top], hidden[1]], dim=1)
        torch.testing.assert_close(several(v), expected, rtol=1e-12, atol=1e-14)
        # Negative control: without the doubling below the top the output differs measurably.
        plain = torch.sigmoid(v @ model.couplings[0].weight + model.layers[1].bias)
        assert float((plain - hidden[1]).abs().max()) > 0.1


def test_rbm_network_is_the_exact_posterior_and_the_features():
    model = chain(4, 3, seed=6)
    v = torch.tensor([[0, 1, 1, 0], [1, 1, 0, 1], [0, 0, 0, 0]], dtype=DTYPE)
    network = feedforward_network(model)
    assert len(network) == 1
    b, c, weight = model.layers[0].bias, model.layers[1].bias, model.couplings[0].weight
    # Exact enumeration (mathematics): E[h | v] from exp(-E(v, h)) over all 2^3 hidden states,
    # E(v, h) = -b.v - c.h - v W h^T.
    hidden = torch.tensor(list(itertools.product([0.0, 1.0], repeat=3)), dtype=DTYPE)
    with torch.no_grad():
        energy = -(v @ b)[:, None] - (hidden @ c)[None, :] - (v @ weight) @ hidden.T
        posterior = torch.softmax(-energy, dim=1) @ hidden
        torch.testing.assert_close(network(v), posterior, rtol=1e-12, atol=1e-14)
        torch.testing.assert_close(FeatureExtractor(model)(v), posterior, rtol=1e-12, atol=1e-14)


def test_network_holds_copies():
    model = chain(6, 5, 4)
    before = snapshot(model)
    network = feedforward_network(model, layers=[1, 2])
    for parameter in network.parameters():
        assert all(parameter.data_ptr() != p.data_ptr() for p in model.parameters())
    with torch.no_grad():
        for parameter in network.parameters():
            parameter.add_(1.0)
    assert_unchanged(model, before)
    network = feedforward_network(model)
    copied = network[1][0].weight.detach().clone()
    with torch.no_grad():
        model.couplings[1].weight.add_(1.0)
    assert torch.equal(network[1][0].weight, copied)


def test_any_orientation_and_order_of_a_chains_couplings_is_a_chain():
    model = chain(6, 5, 4)
    w0, w1 = (w.detach() for w in model.weights())
    reordered = el.EnergyModel(
        float64_layers(6, 5, 4),
        [el.DenseCoupling(1, 2, 5, 4, dtype=DTYPE), el.DenseCoupling(1, 0, 5, 6, dtype=DTYPE)],
    )
    with torch.no_grad():
        for mine, theirs in zip(reordered.layers, model.layers):
            mine.bias.copy_(theirs.bias)
        reordered.couplings[0].weight.copy_(w1)
        reordered.couplings[1].weight.copy_(w0.T)
        v = means(3, 6)
        torch.testing.assert_close(feedforward_network(reordered)(v), feedforward_network(model)(v))


@pytest.mark.parametrize(
    "edges, reason",
    [
        ([(0, 1), (1, 2), (0, 2)], "couplings\\[2\\] joins layers 0 and 2, which are not consecutive"),
        ([(0, 1), (1, 2), (1, 1)], "couplings\\[2\\] is a lateral coupling within layer 1"),
        ([(0, 1), (0, 0), (1, 2)], "couplings\\[1\\] is a lateral coupling within layer 0"),
        ([(0, 1)], "no coupling joins layers 1 and 2"),
    ],
)
def test_network_refuses_what_is_not_a_chain(edges, reason):
    model = other_model(float64_layers(5, 4, 3), edges)
    with pytest.raises(ValueError, match=f"needs a chain.*{reason}"):
        feedforward_network(model)
    assert FeatureExtractor(model)(means(2, 5)).shape == (2, 7)  # features of any graph


# -- bad input -------------------------------------------------------------------------------

BUILDERS = {
    "FeatureExtractor": lambda model, layers: FeatureExtractor(model, layers),
    "feedforward_network": lambda model, layers: feedforward_network(model, layers),
}


@pytest.mark.parametrize("builder", list(BUILDERS))
@pytest.mark.parametrize(
    "layers, error, message",
    [
        ([0], ValueError, r"layers must hold hidden layer indices in 1..2, got 0 at layers\[0\]; layer 0"),
        ([1, 3], ValueError, r"layers must hold hidden layer indices in 1..2, got 3 at layers\[1\]"),
        ([-1], ValueError, r"layers\[0\] must be a layer index >= 0, got -1"),
        ([2, 2], ValueError, r"layers must be distinct, got \[2, 2\]"),
        ([], ValueError, r"layers must name at least one hidden layer, got \[\]"),
        ([1.0], TypeError, r"layers\[0\] must be an int, got 1.0"),
        ([True], TypeError, r"layers\[0\] must be an int, got True"),
        (1, TypeError, r"layers must be a sequence of hidden layer indices such as \[1, 2\], got 1"),
        ("12", TypeError, r"layers must be a sequence .* got '12'"),
        (torch.tensor([1]), TypeError, r"layers must be a sequence"),
    ],
)
def test_bad_layers_are_refused(builder, layers, error, message):
    with pytest.raises(error, match=message):
        BUILDERS[builder](chain(6, 5, 4), layers)


@pytest.mark.parametrize("builder", list(BUILDERS))
def test_bad_models_are_refused(builder):
    with pytest.raises(TypeError, match="model must be an EnergyModel, got Linear"):
        BUILDERS[builder](nn.Linear(3, 2), None)
    visible_only = el.EnergyModel(float64_layers(4), [el.LateralCoupling(0, 4, dtype=DTYPE)])
    with pytest.raises(ValueError, match="no hidden layer"):
        BUILDERS[builder](visible_only, None)


def test_mean_field_must_be_one_of_the_same_model():
    model = chain(6, 5, 4)
    with pytest.raises(ValueError, match=r"mean_field must be a MeanField of this model.*sizes=\[6, 5, 4\]"):
        FeatureExtractor(model, mean_field=el.MeanField(chain(6, 5, 4)))
    with pytest.raises(TypeError, match="mean_field must be a MeanField, got str"):
        FeatureExtractor(model, mean_field="bottom-up")


@pytest.mark.parametrize(
    "v, error, message",
    [
        (torch.zeros(3, 5, dtype=DTYPE), ValueError, r"v must have 6 columns, got shape \(3, 5\)"),
        (torch.zeros(6, dtype=DTYPE), ValueError, r"v must be 2-D"),
        (torch.zeros(3, 6), TypeError, r"v has dtype torch.float32"),
        (torch.full((3, 6), 2.0, dtype=DTYPE), ValueError, r"v must lie in \[0, 1\]"),
    ],
)
def test_bad_data_is_refused_and_changes_nothing(v, error, message):
    model = chain(6, 5, 4)
    extractor = FeatureExtractor(model)
    before = snapshot(extractor)
    with pytest.raises(error, match=message):
        extractor(v)
    assert_unchanged(extractor, before)
