"""Convolutional couplings (``el.Conv2dCoupling``) and channel-shared biases.

Sources of the checks:

- the coupling against the same linear map built as a dense matrix from the filters with
  ``torch.nn.functional.unfold`` (patches of every basis image; a library function independent of
  conv2d and its transpose): energy, inputs both ways and statistics equal in float64;
- through the pipeline, the convolutional model against the dense model with that matrix, whose
  algorithms the rest of the suite checks against brute force (exact enumeration): log Z, exact
  gradients (== autograd of the exact negative log-likelihood), mean field, Gibbs stationarity
  (visible-state frequencies within Monte Carlo error of the exact marginal), AIS in its bracket.
"""

from __future__ import annotations

import pytest
import torch
from torch import Tensor
from torch.nn import functional as F

import ebm_layers as el
from tests.helpers import F64, expected_total_variation, seeded, state_frequencies, total_variation

# (in_shape, out_channels, kernel_size, stride, padding): square and oblong images, several
# channels, strides whose transposed size needs an output padding.
CASES = [
    ((1, 5, 5), 2, 3, 1, 0),
    ((2, 6, 5), 3, 2, 2, 1),
    ((1, 6, 6), 2, 3, 2, 0),
    ((3, 4, 4), 1, 4, 1, 2),
]


def unfold_matrix(coupling: el.Conv2dCoupling, weight: Tensor | None = None) -> Tensor:
    """The ``(n_a, n_b)`` matrix of the coupling's map, from ``unfold`` of every basis image:
    ``M[i, (o, l)] = sum_p W[o, p] * patches(e_i)[p, l]`` (differentiable in ``weight``)."""
    weight = coupling.weight if weight is None else weight
    channels, height, width = coupling.in_shape
    n_a = channels * height * width
    basis = torch.eye(n_a, dtype=weight.dtype).view(n_a, channels, height, width)
    patches = F.unfold(basis, coupling.kernel_size, padding=coupling.padding, stride=coupling.stride)
    matrix = torch.einsum("ipl,op->iol", patches, weight.reshape(weight.shape[0], -1))
    return matrix.reshape(n_a, -1)


@pytest.mark.parametrize("case", CASES)
def test_the_coupling_is_its_unfolded_matrix(case):
    in_shape, out_channels, kernel_size, stride, padding = case
    coupling = el.Conv2dCoupling(0, 1, in_shape, out_channels, kernel_size, stride, padding, dtype=F64)
    coupling.reset_parameters(seeded(0))
    with torch.no_grad():
        coupling.weight.mul_(50.0)
    matrix = unfold_matrix(coupling).detach()
    n_a, n_b = matrix.shape
    assert n_b == coupling.out_shape[0] * coupling.out_shape[1] * coupling.out_shape[2]
    g = seeded(1)
    x_a, x_b = torch.rand(7, n_a, dtype=F64, generator=g), torch.rand(7, n_b, dtype=F64, generator=g)
    torch.testing.assert_close(coupling.input_to(1, x_a), x_a @ matrix)
    torch.testing.assert_close(coupling.input_to(0, x_b), x_b @ matrix.T)
    torch.testing.assert_close(coupling.energy(x_a, x_b), -((x_a @ matrix) * x_b).sum(-1))
    # Statistics: the average -dC/dW, by autograd through the unfolded matrix (chain rule).
    weights = torch.softmax(torch.randn(7, dtype=F64, generator=g), 0)
    for w in (None, weights):
        free = coupling.weight.detach().clone().requires_grad_()
        energy = -((x_a @ unfold_matrix(coupling, free)) * x_b).sum(-1)
        average = energy.mean() if w is None else w @ energy
        (expected,) = torch.autograd.grad(-average, free)
        torch.testing.assert_close(coupling.statistics(x_a, x_b, w)["weight"], expected)


class ForwardConvolutionBothWays(el.Conv2dCoupling):
    """A plausible slip: the input to the images by the same convolution's shape-matching
    counterpart, flipped filters forgotten (conv_transpose2d replaced by a convolution)."""

    def input_to(self, target, x):
        if target == self.b:
            return super().input_to(target, x)
        maps = x.reshape(-1, *self.out_shape)
        flipped = self.weight.transpose(0, 1)
        pad = self.kernel_size - 1 - self.padding
        return F.conv2d(maps, flipped, padding=pad).flatten(1)


def test_negative_control_unflipped_filters_are_not_the_adjoint():
    coupling = ForwardConvolutionBothWays(0, 1, (1, 5, 5), 2, 3, dtype=F64)
    coupling.reset_parameters(seeded(2))
    matrix = unfold_matrix(coupling).detach()
    x_b = torch.rand(4, matrix.shape[1], dtype=F64, generator=seeded(3))
    assert not torch.allclose(coupling.input_to(0, x_b), x_b @ matrix.T)


def models(scale: float = 30.0, top: bool = True) -> tuple[el.EnergyModel, el.EnergyModel]:
    """A 1x3x3 image layer and 2 feature maps 2x2 by 2x2 filters (and, with ``top``, 3 units above
    them): convolutional, and the same energy with the unfolded matrix in a DenseCoupling."""
    sizes = (9, 8, 3) if top else (9, 8)
    layers = [el.BinaryLayer(n, dtype=F64) for n in sizes]
    above = [el.DenseCoupling(1, 2, 8, 3, dtype=F64)] if top else []
    conv = el.EnergyModel(layers, [el.Conv2dCoupling(0, 1, (1, 3, 3), 2, 2, dtype=F64), *above])
    conv.reset_parameters(seeded(4))
    g = seeded(5)
    with torch.no_grad():
        for coupling in conv.couplings:
            coupling.weight.mul_(scale)
        for layer in conv.layers:
            layer.bias.copy_(0.5 * torch.randn(layer.size, dtype=F64, generator=g))
    dense = el.EnergyModel(
        [el.BinaryLayer(n, dtype=F64) for n in sizes],
        [
            el.DenseCoupling(0, 1, 9, 8, dtype=F64),
            *([el.DenseCoupling(1, 2, 8, 3, dtype=F64)] if top else []),
        ],
    )
    with torch.no_grad():
        for mine, theirs in zip(dense.layers, conv.layers):
            mine.bias.copy_(theirs.bias)
        dense.couplings[0].weight.copy_(unfold_matrix(conv.couplings[0]))
        if top:
            dense.couplings[1].weight.copy_(conv.couplings[1].weight)
    return conv, dense


def exact_gradient_gap(model: el.EnergyModel, v: Tensor) -> float:
    """Largest difference between the objective's gradient with exact phases (mean field is exact
    for an RBM) and autograd of the exact mean negative log-likelihood."""
    objective = el.TwoPhaseObjective(model, el.MeanField(model, tol=1e-12), el.ExactStatistics(model))
    model.zero_grad()
    objective(v).backward()
    ours = [p.grad.clone() for p in model.parameters()]
    model.zero_grad()
    (-el.exact_log_likelihood(model, v).mean()).backward()
    return max(float((mine - p.grad).abs().max()) for mine, p in zip(ours, model.parameters()))


def test_log_partition_mean_field_and_exact_gradient_match_the_dense_model():
    conv, dense = models()
    torch.testing.assert_close(el.exact_log_partition(conv), el.exact_log_partition(dense))
    v = torch.bernoulli(torch.full((6, 9), 0.4, dtype=F64), generator=seeded(6))
    for mine, theirs in zip(el.MeanField(conv, tol=1e-12)(v), el.MeanField(dense, tol=1e-12)(v)):
        torch.testing.assert_close(mine, theirs)
    rbm, _ = models(top=False)
    assert exact_gradient_gap(rbm, v) < 1e-10


@pytest.mark.slow
def test_gibbs_chains_sample_the_exact_visible_marginal_and_ais_brackets_log_z():
    conv, dense = models(top=False)
    table = torch.tensor([[(k >> j) & 1 for j in range(9)] for k in range(512)], dtype=F64)
    exact = el.exact_log_likelihood(dense, table).detach().exp()
    count = 20_000
    sampler = el.PersistentSampler(conv, num_particles=count, generator=seeded(7))
    for _ in range(60):
        sampler()
    observed = state_frequencies(sampler.particles[0], table)
    noise = expected_total_variation(exact, count)
    assert total_variation(observed, exact) < 1.5 * noise  # measured 0.97x the noise
    # Negative control: the same chains under the unflipped-filter slip miss it by far.
    slip = ForwardConvolutionBothWays(0, 1, (1, 3, 3), 2, 2, dtype=F64)
    wrong = el.EnergyModel([el.BinaryLayer(n, dtype=F64) for n in (9, 8)], [slip])
    wrong.load_state_dict(conv.state_dict())
    slipped = el.PersistentSampler(wrong, num_particles=count, generator=seeded(7))
    for _ in range(60):
        slipped()
    # Measured 3.6x the noise.
    assert total_variation(state_frequencies(slipped.particles[0], table), exact) > 3 * noise
    estimate = el.ais_log_partition(conv, num_chains=100, num_betas=500, generator=seeded(8), progress=False)
    assert estimate.lower <= float(el.exact_log_partition(dense).detach()) <= estimate.upper


def test_channel_shared_biases_stay_shared_and_their_statistic_is_the_channel_sum():
    conv, _ = models(top=False)
    el.share_bias_by_channel(conv.layers[1], channels=2)
    bias = conv.layers[1].bias
    assert torch.equal(bias[:4], bias[:1].expand(4)) and torch.equal(bias[4:], bias[4:5].expand(4))
    assert dict(conv.named_parameters())["layers.1.parametrizations.bias.original"].shape == (2,)
    v = torch.bernoulli(torch.full((5, 9), 0.5, dtype=F64), generator=seeded(9))
    assert exact_gradient_gap(conv, v) < 1e-10  # the channel sum (pull_back) is the chain rule
    torch.optim.SGD(conv.parameters(), lr=0.5).step()
    assert torch.equal(conv.layers[1].bias[:4], conv.layers[1].bias[:1].expand(4))


@pytest.mark.parametrize(
    ("arguments", "error", "fragment"),
    [
        ((0, 0, (1, 4, 4), 2, 3), ValueError, "two different layers"),
        ((0, 1, (4, 4), 2, 3), ValueError, "in_shape must be (channels, height, width)"),
        ((0, 1, (1, 4, 4), 0, 3), ValueError, "out_channels must be positive"),
        ((0, 1, (1, 4, 4), 2, 5), ValueError, "does not fit images"),
        ((0, 1, (1, 4, 4), 2, 3, 0), ValueError, "stride must be positive"),
        ((0, 1, (1, 4, 4), 2, 3, 1, -1), ValueError, "padding must be >= 0"),
    ],
)
def test_bad_arguments_are_refused(arguments, error, fragment):
    with pytest.raises(error, match=fragment.replace("(", r"\(").replace(")", r"\)")):
        el.Conv2dCoupling(*arguments)


def test_a_model_refuses_a_convolution_that_does_not_fit_its_layers():
    with pytest.raises(ValueError, match="couplings\\[0\\]"):
        el.EnergyModel([el.BinaryLayer(16), el.BinaryLayer(7)], [el.Conv2dCoupling(0, 1, (1, 4, 4), 2, 3)])
