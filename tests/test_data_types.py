"""Binary data in the dtypes people keep it in (bool, uint8) enters everywhere; the conveniences
also take numpy arrays and floats of another precision. Each result equals the one from float data
of the model's dtype (an invariant, fixed seeds); module calls keep torch's dtype convention.
"""

from __future__ import annotations

import pytest
import torch

import ebm_layers as el

DATA = torch.bernoulli(torch.full((24, 6), 0.4), generator=torch.Generator().manual_seed(0))
KEPT_AS = {
    "bool": DATA.bool(),
    "uint8": DATA.to(torch.uint8),
    "int64": DATA.long(),
}
# The conveniences (fit, pretrain, evaluate) also take these.
CONVENIENT = {
    **KEPT_AS,
    "numpy float64": DATA.double().numpy(),
    "numpy bool": DATA.bool().numpy(),
    "float64 tensor": DATA.double(),
}


def model(seed: int = 1, *sizes: int) -> el.EnergyModel:
    return el.dbm(*(sizes or (6, 4, 3)), generator=torch.Generator().manual_seed(seed))


def fitted(data) -> el.EnergyModel:
    m = el.rbm(6, 4, generator=torch.Generator().manual_seed(1))
    el.fit(
        m,
        data,
        epochs=2,
        batch_size=8,
        validation=data,
        progress=False,
        generator=torch.Generator().manual_seed(2),
    )
    return m


def same_parameters(a: el.EnergyModel, b: el.EnergyModel) -> bool:
    return all(torch.equal(x, y) for x, y in zip(a.state_dict().values(), b.state_dict().values()))


@pytest.mark.parametrize("kind", CONVENIENT)
def test_fit_takes_binary_data_as_kept_and_learns_the_same(kind):
    assert same_parameters(fitted(CONVENIENT[kind]), fitted(DATA))


@pytest.mark.parametrize("kind", CONVENIENT)
def test_pretrain_takes_binary_data_as_kept(kind):
    a, b = model(), model()
    el.pretrain(a, CONVENIENT[kind], epochs=1, progress=False, generator=torch.Generator().manual_seed(3))
    el.pretrain(b, DATA, epochs=1, progress=False, generator=torch.Generator().manual_seed(3))
    assert same_parameters(a, b)


@pytest.mark.parametrize("kind", CONVENIENT)
def test_evaluate_takes_binary_data_as_kept(kind):
    m = model()
    report = el.evaluate(m, CONVENIENT[kind], test=CONVENIENT[kind], reverse=False, progress=False)
    reference = el.evaluate(m, DATA, test=DATA, reverse=False, progress=False)
    assert report.test.log_likelihood == reference.test.log_likelihood


@pytest.mark.parametrize("kind", KEPT_AS)
def test_module_calls_take_binary_data_as_kept(kind):
    data, m = KEPT_AS[kind], model()
    mean_field = el.MeanField(m)
    assert all(torch.equal(x, y) for x, y in zip(mean_field(data), mean_field(DATA)))
    assert torch.equal(el.FeatureExtractor(m)(data), el.FeatureExtractor(m)(DATA))
    assert torch.equal(m.energy([data, data[:, :4], data[:, :3]]), m.energy([DATA, DATA[:, :4], DATA[:, :3]]))
    sampler = el.PersistentSampler(m, num_particles=24, init=data, generator=torch.Generator().manual_seed(4))
    assert torch.equal(sampler.particles[0], DATA)
    losses = []
    for v in (data, DATA):
        objective = el.TwoPhaseObjective(
            m,
            el.MeanField(m),
            el.PersistentSampler(m, num_particles=5, generator=torch.Generator().manual_seed(5)),
        )
        losses.append(objective(v))
        assert objective.last.data.dtype == m.dtype
    assert torch.equal(*losses)
    rbm = el.rbm(6, 4, generator=torch.Generator().manual_seed(1))
    assert torch.equal(rbm.free_energy(data), rbm.free_energy(DATA))
    particles = el.DataParticles(rbm, num_examples=24, generator=torch.Generator().manual_seed(6))
    assert particles.statistics(data, torch.arange(24))["layers.0.bias"].dtype == torch.float32


def test_module_calls_keep_torchs_dtype_convention_for_floats():
    # A float64 batch on a float32 model is refused by name, as a torch module would refuse it;
    # only the conveniences cast it.
    with pytest.raises(TypeError, match="v has dtype torch.float64"):
        el.MeanField(model())(DATA.double())
    with pytest.raises(TypeError, match="must be a torch.Tensor"):
        el.MeanField(model())(DATA.numpy())
