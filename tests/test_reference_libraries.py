"""Cross-checks against general-purpose reference libraries."""

import numpy as np
import torch
from sklearn.neural_network import BernoulliRBM

import ebm_layers as el


def test_rbm_free_energy_matches_scikit_learn(generator):
    model = el.rbm(7, 5, generator=generator, dtype=torch.float64)
    with torch.no_grad():
        for parameter in model.parameters():
            parameter.normal_(0.0, 1.0, generator=generator)
    v = torch.bernoulli(torch.full((20, 7), 0.4, dtype=torch.float64), generator=generator)
    # Reference library: sklearn.neural_network.BernoulliRBM._free_energy, its fitted attributes
    # set directly (components_ is (n_hidden, n_visible)).
    reference = BernoulliRBM(n_components=5)
    reference.components_ = model.couplings[0].weight.detach().numpy().T.copy()
    reference.intercept_hidden_ = model.layers[1].bias.detach().numpy().copy()
    reference.intercept_visible_ = model.layers[0].bias.detach().numpy().copy()
    expected = reference._free_energy(v.numpy())
    np.testing.assert_allclose(model.free_energy(v).detach().numpy(), expected, rtol=1e-12, atol=1e-12)
    # Negative control: swapping the roles of the two biases must break the agreement.
    reference.intercept_hidden_, reference.intercept_visible_ = (
        reference.intercept_hidden_[::-1].copy(),
        reference.intercept_visible_,
    )
    assert not np.allclose(model.free_energy(v).detach().numpy(), reference._free_energy(v.numpy()))
