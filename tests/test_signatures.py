"""One signature style: the samplers' arguments agree, progress bars default the same way, and the
conveniences work with the fewest arguments (common practice, no source)."""

from __future__ import annotations

import inspect

import torch

import ebm_layers as el


def test_the_samplers_take_the_same_arguments_after_the_model():
    shared = ["self", "model", "num_particles", "sweeps", "generator", "init", "probabilities"]
    for sampler in (el.PersistentSampler, el.FastWeightsSampler, el.ReplicaExchangeSampler):
        parameters = inspect.signature(sampler.__init__).parameters
        assert list(parameters)[: len(shared)] == shared, sampler.__name__
        defaults = [parameters[name].default for name in shared[2:]]
        assert defaults == [100, 1, None, "uniform", False], sampler.__name__


def test_every_progress_bar_is_on_by_default():
    callables = [getattr(el, name) for name in el.__all__]
    callables += [getattr(kind, name) for kind in callables if inspect.isclass(kind) for name in vars(kind)]
    with_progress = [c for c in callables if callable(c) and "progress" in _parameters(c)]
    assert len(with_progress) >= 8
    for function in with_progress:
        assert _parameters(function)["progress"].default is True, function.__qualname__


def _parameters(function) -> dict:
    try:
        return dict(inspect.signature(function).parameters)
    except (TypeError, ValueError):
        return {}


def test_replica_exchange_gives_probabilities_of_its_coolest_replica():
    g = torch.Generator().manual_seed(0)
    model = el.rbm(6, 4, generator=g)
    sampler = el.ReplicaExchangeSampler(
        model, num_particles=5, probabilities=True, num_replicas=3, generator=g
    )
    statistics = sampler.statistics()
    v, h = sampler.particles
    # Rao-Blackwell (mathematics): the last class (the hidden layer) enters as p(h = 1 | v).
    expected = torch.sigmoid(v @ model.couplings[0].weight + model.layers[1].bias).mean(0)
    torch.testing.assert_close(statistics["layers.1.bias"], expected)
    assert not torch.equal(statistics["layers.1.bias"], h.mean(0))  # negative control: not the states
