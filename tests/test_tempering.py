"""Replica exchange for persistent chains, against exact enumeration.

Sources of the checks:

- every replica samples its intermediate distribution p_beta ~ exp(-(1 - beta) E_A - beta E): the
  Metropolis swap keeps the product of the replicas' distributions invariant ("Tempered Markov
  Chain Monte Carlo for training of Restricted Boltzmann Machines", AISTATS 2010); the exact
  statistics of p_beta come from enumerating a model with biases beta b + (1 - beta) a and weights
  beta W (mathematics) by ``ExactStatistics``;
- z-scores of the sampled means and pair averages against the exact ones (common practice, no
  source), with a negative control that swaps without the Metropolis test;
- state_dict round trips continue the chains identically (common practice, no source).
"""

from __future__ import annotations

import copy
import math

import pytest
import torch

import ebm_layers as el
from ebm_layers.model.statistics import Statistics
from ebm_layers.phases.replica_exchange import ReplicaExchangeSampler
from tests.reference import build, randomize

F64 = torch.float64
PARTICLES, REPLICAS = 20_000, 4


def tempered(model: el.EnergyModel, beta: float, base: torch.Tensor) -> el.EnergyModel:
    """The model of p_beta: biases beta b + (1 - beta) a, weights beta W (a only on layer 0)."""
    flattened = copy.deepcopy(model)
    with torch.no_grad():
        for i, (mine, theirs) in enumerate(zip(flattened.biases(), model.biases())):
            mine.copy_(beta * theirs + (1 - beta) * (base if i == 0 else 0.0))
        for free in flattened.couplings.parameters():  # a lateral weight's free tensor scales it too
            free.mul_(beta)
    return flattened


def max_z(states: list[torch.Tensor], exact: Statistics, model: el.EnergyModel) -> float:
    """Largest |sampled - exact| / standard error over all means and pair averages (a lateral
    coupling's: the strict upper triangle, its statistic)."""
    sampled = model.statistics(states)
    assert sorted(sampled) == sorted(exact)
    count = states[0].shape[0]
    worst = 0.0
    for name, e in exact.items():
        s = sampled[name]
        error = (e * (1 - e)).clamp_min(1e-4).sqrt() / math.sqrt(count)  # binary products: Bernoulli
        worst = max(worst, float(((s - e).abs() / error).max()))
    return worst


def run(shape: str, sizes: tuple[int, ...]) -> tuple[ReplicaExchangeSampler, el.EnergyModel]:
    model = randomize(build(shape, sizes), seed=4, scale=2.0)
    data = torch.bernoulli(
        torch.full((30, sizes[0]), 0.3, dtype=F64), generator=torch.Generator().manual_seed(1)
    )
    sampler = ReplicaExchangeSampler(
        model,
        num_particles=PARTICLES,
        num_replicas=REPLICAS,
        generator=torch.Generator().manual_seed(2),
        data=data,
    )
    for _ in range(30):
        sampler()
    return sampler, model


@pytest.mark.parametrize(
    ("shape", "sizes"),
    [
        ("rbm", (5, 3)),
        ("chain3", (3, 3, 2)),
        ("semi_restricted", (4, 3)),
        ("hidden_lateral_chain", (3, 3, 2)),
    ],
)
def test_every_replica_samples_its_intermediate_distribution(shape, sizes):
    sampler, model = run(shape, sizes)
    exact = el.ExactStatistics(model).statistics()
    assert max_z(sampler.particles, exact, model) < 4.5  # measured: at most 3.6 over all replicas
    betas = sampler.inverse_temperatures.tolist()
    for k, beta in enumerate(betas[:-1]):
        hot = [getattr(sampler, f"hot_{i}")[k * PARTICLES : (k + 1) * PARTICLES] for i in range(len(sizes))]
        exact_k = el.ExactStatistics(tempered(model, beta, sampler.base_bias)).statistics()
        assert max_z(hot, exact_k, model) < 4.5, beta
    rates = sampler.acceptance_rates
    assert rates.shape == (REPLICAS - 1,) and bool(((rates > 0.2) & (rates < 1)).all())


def test_swaps_without_the_metropolis_test_are_caught(monkeypatch):
    """Negative control: always swapping moves hot states into the beta = 1 replica."""
    monkeypatch.setattr(
        ReplicaExchangeSampler, "_accept", staticmethod(lambda log_ratio, u: torch.ones_like(u) > 0)
    )
    sampler, model = run("rbm", (5, 3))
    assert max_z(sampler.particles, el.ExactStatistics(model).statistics(), model) > 10


def test_state_dict_round_trip_continues_identically():
    model = randomize(build("rbm", (5, 3)), seed=4, scale=2.0)
    first = ReplicaExchangeSampler(
        model, num_particles=7, num_replicas=3, generator=torch.Generator().manual_seed(3)
    )
    for _ in range(3):
        first()
    state = {k: v.clone() for k, v in first.state_dict().items()}
    for _ in range(2):
        first()
    second = ReplicaExchangeSampler(
        model, num_particles=7, num_replicas=3, generator=torch.Generator().manual_seed(99)
    )
    second.load_state_dict(state)
    for _ in range(2):
        second()
    for key, value in first.state_dict().items():
        assert torch.equal(value, second.state_dict()[key]), key
    assert {"hot_0", "hot_1", "swap_attempts", "swap_accepts", "inverse_temperatures"} <= set(state)


def test_trains_as_the_negative_phase_of_an_objective():
    g = torch.Generator().manual_seed(5)
    data = torch.bernoulli(torch.full((40, 6), 0.3), generator=g)
    model = el.rbm(6, 3, generator=g)
    sampler = ReplicaExchangeSampler(model, num_particles=10, num_replicas=3, generator=g, data=data)
    objective = el.TwoPhaseObjective(model, el.MeanField(model), sampler)
    result = el.fit(model, data, epochs=2, objective=objective, progress=False, generator=g)
    assert len(result.history) == 2 and result.objective.last.particles.shape == (10, 6)


@pytest.mark.parametrize(
    ("options", "fragment"),
    [
        ({"num_replicas": 0}, "num_replicas must be positive"),
        ({"num_replicas": 2, "inverse_temperatures": [0.5, 0.9]}, "ending at 1"),
        ({"num_replicas": 2, "inverse_temperatures": [0.0, 1.0]}, "in \\(0, 1\\]"),
        ({"num_replicas": 3, "inverse_temperatures": [0.6, 0.5, 1.0]}, "increasing"),
    ],
)
def test_bad_replica_arguments(options, fragment):
    with pytest.raises(ValueError, match=fragment):
        ReplicaExchangeSampler(el.rbm(4, 2), num_particles=3, **options)
