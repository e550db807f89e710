"""Centering in TwoPhaseObjective: the centered gradient, mapped back onto the ordinary parameters.

Source of the checks: the gradient of the exact average negative log-likelihood written in the
centered parametrisation of "How to Center Deep Boltzmann Machines" (JMLR 2016),
``E = -sum_l b'_l . (x_l - c_l) - sum (x_a - c_a) W (x_b - c_b)^T`` (1/2 for a lateral term),
taken by autograd through brute-force enumeration of every state (mathematics), then mapped back:
a step ``dW``, ``db'`` in those coordinates moves the ordinary bias ``b = b' - W c`` by
``db' - dW c``, so the ordinary bias gradient is ``g_b' - g_W c`` (``g_W`` the weight change a unit
descent step makes: the weight gradient itself, or for a lateral coupling the parametrization
applied to its free matrix's gradient).
"""

from __future__ import annotations

import itertools
import warnings

import pytest
import torch
from torch import Tensor

import ebm_layers as el
from tests.helpers import assert_unchanged, binary, closed_form_models, objective_gradient, snapshot

F64 = torch.float64


def all_states(n: int) -> Tensor:
    return torch.tensor(list(itertools.product((0.0, 1.0), repeat=n)), dtype=F64)


def centered_likelihood_gradient(model: el.EnergyModel, v: Tensor, offsets: list[Tensor]) -> list[Tensor]:
    """Brute-force gradient of the centered negative log-likelihood, mapped back, in the order of
    ``model.parameters()`` (biases, then each coupling's free parameter)."""
    weights = [w.detach() for w in model.weights()]
    centered_biases = []
    for i, bias in enumerate(model.biases()):
        shift = torch.zeros_like(bias.detach())
        for (a, b), w in zip(model.edges, weights):
            if a == b == i:
                shift = shift + w @ offsets[i]
            elif a == i:
                shift = shift + w @ offsets[b]
            elif b == i:
                shift = shift + w.mT @ offsets[a]
        centered_biases.append((bias.detach() + shift).requires_grad_())  # b' = b + W c
    couplings = list(model.couplings)
    free = [
        c.parametrizations.weight.original.detach().clone().requires_grad_()
        if (c.a == c.b)
        else c.weight.detach().clone().requires_grad_()
        for c in couplings
    ]

    def weight(k: int) -> Tensor:
        c = couplings[k]
        return c.parametrizations.weight[0](free[k]) if c.a == c.b else free[k]

    def energy(states: list[Tensor]) -> Tensor:  # the centered energy, written out
        centered = [x - c for x, c in zip(states, offsets)]
        value = -sum(x @ b for x, b in zip(centered, centered_biases))
        for k, (a, b) in enumerate(model.edges):
            term = ((centered[a] @ weight(k)) * centered[b]).sum(1)
            value = value - (0.5 if a == b else 1.0) * term
        return value

    sizes = model.sizes
    hidden = all_states(sum(sizes[1:]))
    every = all_states(sum(sizes))

    def split(x: Tensor) -> list[Tensor]:
        return list(x.split(list(sizes), dim=1))

    log_z = torch.logsumexp(-energy(split(every)), 0)
    log_p = []
    for row in v:
        joint = torch.cat([row.expand(len(hidden), -1), hidden], dim=1)
        log_p.append(torch.logsumexp(-energy(split(joint)), 0) - log_z)
    (-torch.stack(log_p).mean()).backward()

    bias_gradients = [b.grad.clone() for b in centered_biases]
    steps = [  # weight change per unit descent step (sign aside)
        couplings[k].parametrizations.weight[0](f.grad) if couplings[k].a == couplings[k].b else f.grad
        for k, f in enumerate(free)
    ]
    for (a, b), step in zip(model.edges, steps):
        if a == b:
            bias_gradients[a] = bias_gradients[a] - step @ offsets[a]
        else:
            bias_gradients[a] = bias_gradients[a] - step @ offsets[b]
            bias_gradients[b] = bias_gradients[b] - step.mT @ offsets[a]
    return bias_gradients + [f.grad for f in free]


def centered_objective(model: el.EnergyModel, offsets: list[Tensor]) -> el.TwoPhaseObjective:
    objective = el.TwoPhaseObjective(
        model, el.MeanField(model, tol=1e-13), el.ExactStatistics(model), centering=True, offset_decay=1.0
    )
    for buffer, value in zip(objective.offsets, offsets):
        buffer.copy_(value)
    return objective


def random_offsets(model: el.EnergyModel, seed: int) -> list[Tensor]:
    g = torch.Generator().manual_seed(seed)
    return [torch.rand(n, generator=g, dtype=F64) for n in model.sizes]


@pytest.mark.parametrize("name", ["rbm", "visible_lateral"])
def test_zero_offsets_give_the_plain_gradient(name):
    model = closed_form_models()[name]
    v = binary((7, 5), seed=2)
    plain = el.TwoPhaseObjective(model, el.MeanField(model, tol=1e-13), el.ExactStatistics(model))
    centered = centered_objective(model, [torch.zeros(n, dtype=F64) for n in model.sizes])
    for got, expected in zip(objective_gradient(centered, v), objective_gradient(plain, v)):
        torch.testing.assert_close(got, expected, rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize("name", ["rbm", "visible_lateral"])
def test_centered_gradient_is_the_centered_likelihood_gradient_mapped_back(name):
    # Mean field is exact for these models (the hidden units are independent given v), and the
    # model phase is exact: the step must equal the brute-force centered gradient, mapped back.
    model = closed_form_models()[name]
    v = binary((7, 5), seed=2)
    offsets = random_offsets(model, seed=3)
    got = objective_gradient(centered_objective(model, offsets), v)
    expected = centered_likelihood_gradient(model, v, offsets)
    for g, e in zip(got, expected):
        torch.testing.assert_close(g, e, rtol=1e-10, atol=1e-12)
    # Negative control: the plain rule (no centering) is a different step for these offsets.
    plain = el.TwoPhaseObjective(model, el.MeanField(model, tol=1e-13), el.ExactStatistics(model))
    difference = max(float((p - e).abs().max()) for p, e in zip(objective_gradient(plain, v), expected))
    assert difference > 1e-2


def test_centering_changes_the_step_not_the_fixed_point():
    """Where data and model statistics agree, the centered step is zero too (same optimum)."""
    model = closed_form_models()["rbm"]
    offsets = random_offsets(model, seed=4)
    objective = centered_objective(model, offsets)
    # Data drawn exactly from the model: weight every visible state by its probability.
    states = all_states(5)
    weights = torch.softmax(-model.free_energy(states).detach(), 0)
    data = Tensor.repeat_interleave(states, (weights * 1e5).round().long(), dim=0)
    gradients = objective_gradient(objective, data)
    assert max(float(g.abs().max()) for g in gradients) < 1e-4  # rounding the weights to 1e-5


def test_offsets_are_running_means_of_data_and_model_means():
    model = closed_form_models()["rbm"]
    v = binary((7, 5), seed=2)
    objective = el.TwoPhaseObjective(
        model, el.MeanField(model), el.ExactStatistics(model), centering=True, offset_decay=0.9
    )
    assert all(bool((c == 0.5).all()) for c in objective.offsets)
    data, fantasy = objective.positive.statistics(v), objective.negative.statistics()
    objective(v)
    assert len(objective.offsets) == len(model.layers)
    for i, c in enumerate(objective.offsets):
        d, m = data[f"layers.{i}.bias"], fantasy[f"layers.{i}.bias"]
        torch.testing.assert_close(c, 0.9 * 0.5 + 0.1 * (d + m) / 2)
    names = set(objective.state_dict())
    assert {"offset_0", "offset_1"} <= names
    copy = el.TwoPhaseObjective(
        model, el.MeanField(model), el.ExactStatistics(model), centering=True, offset_decay=0.9
    )
    copy.load_state_dict(objective.state_dict())
    for a, b in zip(copy.offsets, objective.offsets):
        assert torch.equal(a, b)
    assert "centering=True" in repr(objective)


def test_a_refused_step_leaves_the_offsets_alone():
    model = closed_form_models()["rbm"]
    objective = el.TwoPhaseObjective(model, el.MeanField(model), el.ExactStatistics(model), centering=True)
    v = binary((7, 5), seed=2)
    v[0, 0] = float("nan")
    before = snapshot(objective)
    with pytest.raises((ValueError, FloatingPointError)):
        objective(v)
    assert_unchanged(objective, before)
    with torch.no_grad():
        model.layers[1].bias[0] = float("inf")
    before = snapshot(objective)
    with pytest.raises(FloatingPointError):
        objective(binary((7, 5), seed=2))
    assert_unchanged(objective, before)


@pytest.mark.parametrize(
    "options, error, message",
    [
        ({"centering": "yes"}, TypeError, "centering"),
        ({"centering": True, "offset_decay": 1.5}, ValueError, "offset_decay"),
        ({"centering": True, "offset_decay": -0.1}, ValueError, "offset_decay"),
        ({"centering": True, "sparsity_target": 0.1}, ValueError, "sparsity_target=0.1 with centering"),
        ({"data": torch.ones(2, 6)}, ValueError, "needs centering=True"),
        ({"centering": True, "data": torch.ones(2, 5)}, ValueError, "6 columns"),
    ],
)
def test_bad_centering_arguments(options, error, message):
    model = el.rbm(6, 3)
    before = snapshot(model)
    with pytest.raises(error, match=message):
        el.TwoPhaseObjective(model, **options)
    assert_unchanged(model, before)


def test_fit_warns_when_centering_meets_an_adaptive_optimizer():
    g = torch.Generator().manual_seed(0)
    model = el.rbm(6, 3, generator=g)
    data = binary((20, 6), seed=1, dtype=torch.float32)

    def run(optimizer):
        objective = el.TwoPhaseObjective(model, centering=True)
        el.fit(model, data, objective=objective, optimizer=optimizer, epochs=1, progress=False)

    with pytest.warns(UserWarning, match="centering maps gradients"):
        run(None)  # fit's default, Adam
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        run(torch.optim.SGD(model.parameters(), lr=0.01, momentum=0.9))


def test_visible_offsets_start_at_the_data_mean_when_data_is_known():
    # "How to Center Deep Boltzmann Machines" (JMLR 2016): visible offsets from the data's mean,
    # hidden ones at 0.5.
    data = binary((20, 6), seed=3, dtype=torch.float32)
    model = el.rbm(6, 3, generator=torch.Generator().manual_seed(0))
    given = el.TwoPhaseObjective(model, centering=True, data=data)
    torch.testing.assert_close(given.offset_0, data.mean(0))
    assert bool((given.offset_1 == 0.5).all())
    # fit starts an objective built without data from its own data, before the first step ...
    objective = el.TwoPhaseObjective(model, centering=True, offset_decay=1.0)
    assert bool((objective.offset_0 == 0.5).all())
    optimizer = torch.optim.SGD(model.parameters(), lr=0.01)
    el.fit(model, data, objective=objective, optimizer=optimizer, epochs=1, progress=False)
    torch.testing.assert_close(objective.offset_0, data.mean(0))  # offset_decay=1.0 kept them there
    # ... but never restarts offsets that have been trained (negative control).
    with torch.no_grad():
        objective.offset_0.fill_(0.25)
    el.fit(model, data, objective=objective, optimizer=optimizer, epochs=1, progress=False)
    assert bool((objective.offset_0 == 0.25).all())


def test_fit_refuses_weight_decay_on_the_weights_with_centering():
    data = binary((20, 6), seed=3, dtype=torch.float32)
    model = el.rbm(6, 3, generator=torch.Generator().manual_seed(0))
    objective = el.TwoPhaseObjective(model, centering=True)
    before = snapshot(objective)
    decayed = torch.optim.SGD(el.weight_decay_groups(model, 1e-4), lr=0.01)
    with pytest.raises(ValueError, match="weight_decay=0.0001 with a centering objective"):
        el.fit(model, data, objective=objective, optimizer=decayed, epochs=1, progress=False)
    assert_unchanged(objective, before)
    # Negative control: the same optimizer without decay trains.
    el.fit(model, data, objective=objective, optimizer=torch.optim.SGD(model.parameters(), lr=0.01), epochs=1,
           progress=False)  # fmt: skip
