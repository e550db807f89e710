"""Fast weights for persistent chains.

Sources of the checks:

- the update rule fast <- decay * fast + rate * (data - model statistics) of "Using Fast Weights to
  Improve Persistent Contrastive Divergence" (ICML 2009), recomputed here from the statistics;
- with zero fast weights the chains are the plain sampler's, draw for draw (an invariant, fixed
  seeds); state_dict round trips continue identically (common practice, no source).
"""

from __future__ import annotations

import pytest
import torch

import ebm_layers as el
from ebm_layers.statistics import Statistics


def setup(seed: int = 0, **options):
    g = torch.Generator().manual_seed(seed)
    model = el.EnergyModel(
        layers=[el.BinaryLayer(6, dtype=torch.float64), el.BinaryLayer(4, dtype=torch.float64)],
        couplings=[
            el.DenseCoupling(0, 1, 6, 4, dtype=torch.float64),
            el.LateralCoupling(0, 6, dtype=torch.float64),
        ],
    )
    model.reset_parameters(g)
    sampler = el.FastWeightsSampler(
        model, num_particles=8, generator=torch.Generator().manual_seed(1), **options
    )
    data = torch.bernoulli(torch.full((5, 6), 0.4, dtype=torch.float64), generator=g)
    return model, sampler, data


def test_fast_weights_follow_the_raw_statistics_gradient_and_decay():
    model, sampler, data = setup(fast_learning_rate=0.3, fast_decay=0.5)
    objective = el.TwoPhaseObjective(model, el.MeanField(model, tol=1e-12, max_iter=500), sampler)
    objective(data)
    first = objective.last.difference
    expected_biases = [0.3 * d for d in first.means]
    for fast, expected in zip(sampler.fast_biases, expected_biases):
        torch.testing.assert_close(fast, expected)
    torch.testing.assert_close(sampler.fast_weights[0], 0.3 * first.pairs[0])
    lateral = 0.3 * (first.pairs[1] - torch.diag(first.pairs[1].diagonal()))
    torch.testing.assert_close(sampler.fast_weights[1], lateral)  # symmetric, zero diagonal
    objective(data)
    second = objective.last.difference
    for fast, old, new in zip(sampler.fast_biases, first.means, second.means):
        torch.testing.assert_close(fast, 0.5 * 0.3 * old + 0.3 * new)
    # The ordinary parameters are untouched by the fast weights (no optimizer step was taken).
    assert all(p.grad is None for p in model.parameters())


def test_with_zero_fast_weights_the_chains_are_the_plain_chains():
    model, sampler, _ = setup()
    plain = el.PersistentSampler(model, num_particles=8, generator=torch.Generator().manual_seed(1))
    for _ in range(5):
        for ours, theirs in zip(sampler(), plain()):
            assert torch.equal(ours, theirs)
    # Negative control: non-zero fast weights change the draws.
    with torch.no_grad():
        sampler.fast_weight_0.fill_(3.0)
    assert not all(torch.equal(a, b) for a, b in zip(sampler(), plain()))


def test_fast_weights_survive_a_state_dict_round_trip():
    model, sampler, data = setup(fast_learning_rate=0.1)
    objective = el.TwoPhaseObjective(model, el.MeanField(model), sampler)
    objective(data)
    state = {k: v.clone() for k, v in sampler.state_dict().items()}
    assert "fast_weight_0" in state and float(state["fast_weight_0"].abs().sum()) > 0
    after = [x.clone() for x in sampler()]
    _, fresh, _ = setup(fast_learning_rate=0.1)
    fresh.load_state_dict(state)
    assert all(torch.equal(a, b) for a, b in zip(after, fresh()))


def test_a_refused_step_leaves_the_fast_weights_alone():
    model, sampler, data = setup(fast_learning_rate=0.1)
    objective = el.TwoPhaseObjective(model, el.MeanField(model), sampler)
    honest = sampler.statistics
    sampler.statistics = lambda: Statistics([m * float("nan") for m in honest().means], honest().pairs)
    with pytest.raises(FloatingPointError):
        objective(data)
    assert all(float(f.abs().sum()) == 0 for f in sampler.fast_biases + sampler.fast_weights)


@pytest.mark.parametrize(
    ("options", "fragment"),
    [
        ({"fast_decay": 1.0}, "fast_decay must lie in"),
        ({"fast_learning_rate": -1.0}, "fast_learning_rate must be"),
    ],
)
def test_bad_fast_weight_arguments(options, fragment):
    with pytest.raises(ValueError, match=fragment):
        el.FastWeightsSampler(el.rbm(4, 2), **options)
