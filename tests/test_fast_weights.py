"""Fast weights for persistent chains.

Sources of the checks:

- the update rule of "Using Fast Weights to Improve Persistent Contrastive Divergence" (ICML 2009):
  fast and slow weights take the same steps, the fast ones decaying; recomputed here from the
  steps SGD and Adam applied;
- with zero fast weights the chains are the plain sampler's, draw for draw (an invariant, fixed
  seeds); state_dict round trips continue identically (common practice, no source).
"""

from __future__ import annotations

import pytest
import torch

import ebm_layers as el
from ebm_layers.model.statistics import Statistics


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


LATERAL = "couplings.1.parametrizations.weight.original"  # the free matrix of setup()'s lateral coupling


def parameters(model) -> dict[str, torch.Tensor]:
    return {name: p.detach().clone() for name, p in model.named_parameters()}


def fast_index(model, name: str) -> int:
    """``j`` of the buffer ``fast_<j>`` that holds the fast weight of parameter ``name``."""
    return [n for n, _ in model.named_parameters()].index(name)


def fast_of(sampler) -> dict[str, torch.Tensor]:
    """The fast weight of every model parameter, keyed by the parameter's name."""
    return {
        name: getattr(sampler, f"fast_{j}") for j, (name, _) in enumerate(sampler.model.named_parameters())
    }


@pytest.mark.parametrize(
    "optimizer",
    [lambda p: torch.optim.SGD(p, lr=0.1), lambda p: torch.optim.Adam(p, lr=0.01)],
    ids=["SGD", "Adam"],
)
def test_fast_weights_take_the_steps_the_optimizer_applied_and_decay(optimizer):
    # The paper's rule: fast and slow weights take the same steps, the fast ones decaying (ICML 2009).
    # The old rule (fast_learning_rate times the raw statistics difference) fails this under Adam,
    # whose steps are about the learning rate per coordinate whatever the gradient's size.
    model, sampler, data = setup(fast_decay=0.5)
    objective = el.TwoPhaseObjective(model, el.MeanField(model, tol=1e-12, max_iter=500), sampler)
    optimizer = optimizer(model.parameters())
    expected = {name: torch.zeros_like(p) for name, p in parameters(model).items()}
    # The lateral coupling's symmetric weight as the chains see it, followed on its own.
    expected_lateral = torch.zeros_like(model.couplings[1].weight.detach())
    for _ in range(4):
        before = parameters(model)
        before_lateral = model.couplings[1].weight.detach().clone()
        objective(data).backward()
        fast = fast_of(sampler)
        assert fast.keys() == expected.keys()
        for name, e in expected.items():  # the fast weights seen by this step's sweep
            torch.testing.assert_close(fast[name], e)
        # The fast change of the symmetric lateral weight: the free matrix's strict upper triangle,
        # mirrored; it follows the steps of the symmetric weight.
        upper = fast[LATERAL].triu(1)
        lateral = upper + upper.mT
        torch.testing.assert_close(lateral, expected_lateral)
        optimizer.step()
        optimizer.zero_grad()
        applied = {name: after - before[name] for name, after in parameters(model).items()}
        expected = {name: 0.5 * e + applied[name] for name, e in expected.items()}
        expected_lateral = 0.5 * expected_lateral + (model.couplings[1].weight.detach() - before_lateral)
    assert float(expected["couplings.0.weight"].abs().max()) > 0  # the check is not vacuous
    assert float(lateral.abs().max()) > 0
    torch.testing.assert_close(lateral, lateral.mT)  # a lateral fast weight stays symmetric ...
    assert float(lateral.diagonal().abs().max()) == 0.0  # ... with a zero diagonal


def test_fast_steps_under_adam_are_the_size_of_the_slow_steps():
    # The measurement behind the fix: on a 64-32 RBM under Adam the old fast weights were smaller
    # than one slow step. Now, with no decay, they are the last slow step itself.
    g = torch.Generator().manual_seed(0)
    model = el.rbm(64, 32, generator=g)
    data = torch.bernoulli(torch.full((50, 64), 0.3), generator=g)
    sampler = el.FastWeightsSampler(model, num_particles=20, generator=g, fast_decay=0.0)
    objective = el.TwoPhaseObjective(model, el.MeanField(model), sampler)
    optimizer = torch.optim.Adam(model.parameters(), lr=0.01)
    for _ in range(3):
        before = model.couplings[0].weight.detach().clone()
        objective(data).backward()
        optimizer.step()
        optimizer.zero_grad()
    objective(data)
    slow_step = model.couplings[0].weight.detach() - before
    fast = fast_of(sampler)["couplings.0.weight"]
    torch.testing.assert_close(fast, slow_step)
    assert 0.5 < float(fast.square().mean().sqrt()) / 0.01 < 1.5


def test_a_reset_or_a_first_call_takes_no_fast_step():
    model, sampler, data = setup()
    with torch.no_grad():  # edited before the first call: not a training step
        model.couplings[0].weight.add_(1.0)
    sampler.statistics()
    assert len(fast_of(sampler)) == 4
    assert all(float(f.abs().sum()) == 0 for f in fast_of(sampler).values())
    with torch.no_grad():
        model.couplings[0].weight.add_(1.0)
    sampler.reset_fast_weights()
    sampler.statistics()
    assert float(fast_of(sampler)["couplings.0.weight"].abs().sum()) == 0
    with torch.no_grad():  # negative control: a change between two calls is a step
        model.couplings[0].weight.add_(1.0)
    sampler.statistics()
    fast = fast_of(sampler)["couplings.0.weight"]
    torch.testing.assert_close(fast, torch.ones_like(fast))


def test_with_zero_fast_weights_the_chains_are_the_plain_chains():
    model, sampler, _ = setup()
    plain = el.PersistentSampler(model, num_particles=8, generator=torch.Generator().manual_seed(1))
    for _ in range(5):
        for ours, theirs in zip(sampler(), plain()):
            assert torch.equal(ours, theirs)
    # Negative control: non-zero fast weights change the draws.
    with torch.no_grad():
        getattr(sampler, f"fast_{fast_index(model, 'couplings.0.weight')}").fill_(3.0)
    assert not all(torch.equal(a, b) for a, b in zip(sampler(), plain()))


def test_fast_weights_survive_a_state_dict_round_trip():
    model, sampler, data = setup()
    objective = el.TwoPhaseObjective(model, el.MeanField(model), sampler)
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    for _ in range(2):
        objective(data).backward()
        optimizer.step()
    sampler.statistics()
    state = {k: v.clone() for k, v in sampler.state_dict().items()}
    key = f"fast_{fast_index(model, 'couplings.0.weight')}"
    assert key in state and float(state[key].abs().sum()) > 0
    after = [x.clone() for x in sampler()]
    _, fresh, _ = setup()
    fresh.load_state_dict(state)
    assert all(torch.equal(a, b) for a, b in zip(after, fresh()))


def test_a_refused_step_moves_nothing_and_the_fast_weights_only_decay(monkeypatch):
    model, sampler, data = setup(fast_decay=0.5)
    objective = el.TwoPhaseObjective(model, el.MeanField(model), sampler)
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    for _ in range(2):
        objective(data).backward()
        optimizer.step()
        optimizer.zero_grad()
    honest = el.PersistentSampler.statistics
    monkeypatch.setattr(
        el.PersistentSampler,
        "statistics",
        # The layers' statistics (the means) turned NaN.
        lambda self, v=None, **kwargs: Statistics(
            {
                name: s * float("nan") if name.startswith("layers.") else s
                for name, s in honest(self, v, **kwargs).items()
            }
        ),
    )
    with pytest.raises(FloatingPointError):
        objective(data)
    monkeypatch.undo()
    before = {name: f.clone() for name, f in fast_of(sampler).items()}
    assert float(before["couplings.0.weight"].abs().sum()) > 0
    objective(data)  # the refused step applied nothing: no new fast step, only the decay
    after = fast_of(sampler)
    assert after.keys() == before.keys()
    for name, b in before.items():
        torch.testing.assert_close(after[name], 0.5 * b)


@pytest.mark.parametrize(
    ("options", "fragment"),
    [
        ({"fast_decay": 1.0}, "fast_decay must lie in"),
        ({"fast_scale": -1.0}, "fast_scale must lie in"),
    ],
)
def test_bad_fast_weight_arguments(options, fragment):
    with pytest.raises(ValueError, match=fragment):
        el.FastWeightsSampler(el.rbm(4, 2), **options)


def test_checkpoints_with_the_old_buffer_names_load():
    # Before the buffers were keyed by parameter, they were fast_bias_<i> / fast_weight_<k> (and
    # last_...), a lateral coupling's holding its full symmetric weight. Such a state dict, built
    # here from a sampler's own, loads into the same values (common practice, no source).
    g = torch.Generator().manual_seed(0)
    model = el.EnergyModel(
        [el.BinaryLayer(5), el.BinaryLayer(3)], [el.DenseCoupling(0, 1, 5, 3), el.LateralCoupling(0, 5)]
    )
    model.reset_parameters(g)
    sampler = el.FastWeightsSampler(model, num_particles=4, generator=g)
    names = [name for name, _ in model.named_parameters()]
    expected = {}
    old = dict(sampler.state_dict())
    for j, name in enumerate(names):
        part, index, *_ = name.split(".")
        for kind in ("fast", "last"):
            value = torch.randn(old.pop(f"{kind}_{j}").shape, generator=g)
            lateral = "parametrizations" in name  # only its strict upper triangle is used
            expected[f"{kind}_{j}"] = value.triu(1) if lateral else value
            old_value = value.triu(1) + value.triu(1).T if lateral else value
            old[f"{kind}_{'bias' if part == 'layers' else 'weight'}_{index}"] = old_value
    assert "fast_0" not in old and "fast_bias_0" in old and "last_weight_1" in old  # only old names
    fresh = el.FastWeightsSampler(model, num_particles=4, generator=torch.Generator().manual_seed(9))
    fresh.load_state_dict(old)
    for key, value in expected.items():
        torch.testing.assert_close(fresh.state_dict()[key], value)
