"""Gaussian units (``el.GaussianLayer``): the layer on its own against closed forms and scipy, the
Gaussian-binary RBM against its mixture-of-Gaussians form, Gibbs sampling, annealed importance
sampling, exact gradients, mean field, training, and the errors where the mathematics does not apply.

Sources of the checks:

- the mixture form (mathematics): with ``E(v, h) = sum (v - b)^2 / (2 s^2) - c.h - v W h`` the
  visible units integrate out of ``exp(-E(v, h))`` for each hidden state ``h`` by completing the
  square, so ``p(v)`` is a mixture over ``h`` in {0, 1}^K of ``N(b + s^2 (W h), diag s^2)`` with
  weights proportional to ``exp(c.h + b.(W h) + s^2 |W h|^2 / 2)`` (elementwise ``s^2``); its
  densities are evaluated with ``scipy.stats.multivariate_normal``, its moments summed by exact
  enumeration of the ``2^K`` hidden states.
- one-dimensional integrals by ``scipy.integrate.quad``, entropies by ``scipy.stats.norm.entropy``,
  Gaussian averages by ``scipy.stats.norm.expect``, densities by ``scipy.stats.norm.logpdf``, draws
  by ``scipy.stats.kstest``.
- z-scores of Monte Carlo averages against their standard errors: common practice, no source.

Every random draw uses an explicit seeded ``torch.Generator``. Comparisons with references are in
float64. Each subtle property has a negative control: a subclass of ``GaussianLayer`` with one
deliberately wrong formula that the same check rejects.
"""

from __future__ import annotations

import io
import itertools
import math
from dataclasses import dataclass

import numpy as np
import pytest
import torch
from scipy import integrate, stats
from torch import Tensor

import ebm_layers as el

F64 = torch.float64


def seeded(seed: int) -> torch.Generator:
    return torch.Generator().manual_seed(seed)


# ---------------------------------------------------------------------------------------------
# Deliberately wrong Gaussian layers (negative controls).


class LogPartitionWithoutVariance(el.GaussianLayer):
    """Negative control: the quadratic term of the Gaussian integral forgets ``s^2`` (``u^2 / 2``)."""

    def log_partition(self, input: Tensor) -> Tensor:
        terms = self.bias * input + input.square() / 2.0 + (0.5 * math.log(2 * math.pi) + self.log_std)
        return terms.sum(-1)


class NoiseScaledByVariance(el.GaussianLayer):
    """Negative control: draws with noise ``s^2 * N(0, 1)`` instead of ``s * N(0, 1)``."""

    def sample(self, input: Tensor, generator: torch.Generator) -> Tensor:
        with torch.no_grad():
            mean = self.mean(input)
            noise = torch.randn(mean.shape, dtype=mean.dtype, generator=generator)
            return mean + (2.0 * self.log_std).exp() * noise


class MeanScaledByStd(el.GaussianLayer):
    """Negative control: the conditional mean ``b + s * input`` (std where the variance belongs)."""

    def mean(self, input: Tensor) -> Tensor:
        return self.bias + self.log_std.exp() * input


class ExpectedStatisticsWithoutVariance(el.GaussianLayer):
    """Negative control: ``E[(x - b)^2] / s^2`` taken at the mean, forgetting the ``+ 1`` of the variance."""

    def expected_statistics(self, mean: Tensor, weights: Tensor | None = None) -> dict[str, Tensor]:
        return self.statistics(mean, weights)


# ---------------------------------------------------------------------------------------------
# Models and the mixture reference.

# Standard deviations of the visible units: one fixed std of 1, a fixed std other than 1, and a
# learned std (a parameter) with a different value per unit.
STD_CASES = {
    "std=1": {"std": 1.0},
    "std=0.6": {"std": 0.6},
    "learned": {"log_std": (-0.4, 0.3, 0.1)},
}


def gaussian_rbm(
    n_visible: int,
    n_hidden: int,
    *,
    std: float = 1.0,
    log_std: tuple[float, ...] | None = None,
    seed: int = 0,
    scale: float = 0.8,
    layer: type[el.GaussianLayer] = el.GaussianLayer,
) -> el.EnergyModel:
    """A float64 RBM with a Gaussian visible layer: biases from N(0, 1), weights from N(0, scale^2);
    with ``log_std`` the std is learned (``learn_std=True``) and set to ``exp(log_std)`` per unit."""
    learn = log_std is not None
    visible = layer(n_visible, std=std, learn_std=learn, dtype=F64)
    model = el.EnergyModel(
        [visible, el.BinaryLayer(n_hidden, dtype=F64)],
        [el.DenseCoupling(0, 1, n_visible, n_hidden, dtype=F64)],
    )
    g = seeded(seed)
    with torch.no_grad():
        for unit in model.layers:
            unit.bias.copy_(torch.randn(unit.bias.shape, dtype=F64, generator=g))
        weight = model.couplings[0].weight
        weight.copy_(scale * torch.randn(weight.shape, dtype=F64, generator=g))
        if learn:
            visible.log_std.copy_(torch.tensor(log_std, dtype=F64))
    return model


@dataclass
class Mixture:
    """The Gaussian-binary RBM as a mixture (mathematics, see the module docstring), in numpy."""

    hidden: np.ndarray  # (2^K, K) every hidden state
    weights: np.ndarray  # (2^K,) mixture weights, summing to one
    means: np.ndarray  # (2^K, n) component means b + s^2 (W h)
    variances: np.ndarray  # (n,) the diagonal covariance s^2 shared by every component

    def log_density(self, v: np.ndarray) -> np.ndarray:
        """``log p(v)`` ``(B,)``; each component's density by ``scipy.stats.multivariate_normal``."""
        components = np.stack(
            [stats.multivariate_normal(mean, np.diag(self.variances)).logpdf(v) for mean in self.means], 1
        )
        return np.logaddexp.reduce(np.log(self.weights) + components.reshape(len(v), -1), axis=1)

    def moments(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``E[v]``, ``Cov[v] = sum_h p(h) mu_h mu_h^T + diag s^2 - E[v] E[v]^T`` and ``P(h_j = 1)``,
        by exact enumeration of the hidden states."""
        mean = self.weights @ self.means
        second = np.einsum("k,ki,kj->ij", self.weights, self.means, self.means)
        return mean, second + np.diag(self.variances) - np.outer(mean, mean), self.weights @ self.hidden


def mixture(model: el.EnergyModel) -> Mixture:
    """The mixture of a Gaussian-binary RBM, from its parameters alone (the formula of the module
    docstring; weights normalised by their sum)."""
    visible, hidden = model.layers
    b, c = visible.bias.detach().numpy(), hidden.bias.detach().numpy()
    weight = model.couplings[0].weight.detach().numpy()
    variances = np.exp(2.0 * visible.log_std.detach().numpy())
    states = np.array(list(itertools.product((0.0, 1.0), repeat=len(c))))
    inputs = states @ weight.T  # (2^K, n): W h for every h
    log_weights = states @ c + inputs @ b + (variances * inputs**2).sum(1) / 2.0
    weights = np.exp(log_weights - np.logaddexp.reduce(log_weights))
    return Mixture(states, weights, b + variances * inputs, variances)


def real_data(rows: int, columns: int, seed: int) -> Tensor:
    """float64 N(0, 1.5^2) draws: real-valued data spread over the mixture's components."""
    return 1.5 * torch.randn(rows, columns, dtype=F64, generator=seeded(seed))


# ---------------------------------------------------------------------------------------------
# 1. The Gaussian-binary RBM is a mixture of 2^K Gaussians.


@pytest.mark.parametrize("case", list(STD_CASES))
def test_rbm_log_density_is_the_mixture_of_gaussians(case):
    model = gaussian_rbm(3, 4, **STD_CASES[case])
    v = real_data(12, 3, seed=1)
    ours = el.exact_log_likelihood(model, v).detach().numpy()
    # The mixture of 2^4 = 16 Gaussians, densities by scipy.stats.multivariate_normal.
    np.testing.assert_allclose(ours, mixture(model).log_density(v.numpy()), rtol=1e-10, atol=1e-10)
    # Measured: the largest difference is about 4e-15.


def test_negative_control_log_partition_without_variance_misses_the_mixture():
    # With a std other than 1 the wrong quadratic term changes log Z, which the comparison sees.
    wrong = gaussian_rbm(3, 4, layer=LogPartitionWithoutVariance, **STD_CASES["learned"])
    v = real_data(12, 3, seed=1)
    ours = el.exact_log_likelihood(wrong, v).detach().numpy()
    reference = mixture(wrong).log_density(v.numpy())  # scipy.stats.multivariate_normal
    assert not np.allclose(ours, reference, rtol=1e-10, atol=1e-10)
    assert np.abs(ours - reference).min() > 0.1  # measured: about 0.6 on every row


def test_gaussian_hidden_layer_is_summed_out_by_its_integral():
    """Binary visible, Gaussian hidden (learned, unequal std): p(v) by exact enumeration of the 8
    visible states, each hidden unit integrated numerically (scipy.integrate.quad)."""
    model = el.EnergyModel(
        [el.BinaryLayer(3, dtype=F64), el.GaussianLayer(2, learn_std=True, dtype=F64)],
        [el.DenseCoupling(0, 1, 3, 2, dtype=F64)],
    )
    g = seeded(2)
    with torch.no_grad():
        for parameter in model.parameters():
            parameter.copy_(0.7 * torch.randn(parameter.shape, dtype=F64, generator=g))
    c = model.layers[0].bias.detach().numpy()
    b, s = model.layers[1].bias.detach().numpy(), model.layers[1].log_std.detach().exp().numpy()
    weight = model.couplings[0].weight.detach().numpy()
    v = np.array(list(itertools.product((0.0, 1.0), repeat=3)))
    log_f = []
    for row in v:
        u = row @ weight
        total = c @ row
        for j in range(2):
            value, _ = integrate.quad(
                lambda h, j=j, u=u: math.exp(-((h - b[j]) ** 2) / (2 * s[j] ** 2) + h * u[j]), -np.inf, np.inf
            )
            total += math.log(value)
        log_f.append(total)
    log_f = np.array(log_f)
    log_z = np.logaddexp.reduce(log_f)
    np.testing.assert_allclose(float(el.exact_log_partition(model).detach()), log_z, rtol=1e-9)
    ours = el.exact_log_likelihood(model, torch.tensor(v)).detach().numpy()
    np.testing.assert_allclose(ours, log_f - log_z, rtol=1e-9, atol=1e-9)


# ---------------------------------------------------------------------------------------------
# 2. Gibbs sampling reaches the mixture's moments.

# Independent chains from the layers' own initial states. Measured (10,000 chains, parameter seeds
# 0-2): every z-score below 2.4 after 40 sweeps; 20,000 chains after 100 sweeps (seed 0): below 1.9.
# So 40 sweeps are past burn-in for these models.
NUM_CHAINS, SWEEPS = 10_000, 40
# 3 means + 6 covariances + 2 hidden marginals = 11 z-scores of independent chains; a bound of
# 4.5 standard errors leaves a chance of about 1e-4 that an exact sampler fails (normal tails;
# common practice, no source).
Z_BOUND = 4.5


def gibbs_z_scores(model: el.EnergyModel, seed: int = 7) -> dict[str, float]:
    """The largest |z| of the visible means, visible covariances and hidden marginals of
    ``NUM_CHAINS`` chains after ``SWEEPS`` sweeps, against the mixture's exact moments.

    The chains are independent, so their final states are independent draws: the mean's standard
    error is ``sqrt(Var[v_i] / P)`` with the exact variance; a covariance is the average of
    ``(v_i - E v_i)(v_j - E v_j)`` (exact means), its standard error the spread of those products
    over ``sqrt(P)``; a hidden marginal's is ``sqrt(p (1 - p) / P)``."""
    mean, covariance, hidden = mixture(model).moments()
    sampler = el.PersistentSampler(model, num_particles=NUM_CHAINS, sweeps=SWEEPS, generator=seeded(seed))
    v, h = (x.numpy() for x in sampler())
    z_mean = (v.mean(0) - mean) / np.sqrt(np.diag(covariance) / NUM_CHAINS)
    centred = v - mean
    products = centred[:, :, None] * centred[:, None, :]
    upper = np.triu_indices(3)
    z_cov = (products.mean(0) - covariance)[upper] / (products.std(0)[upper] / math.sqrt(NUM_CHAINS))
    z_hidden = (h.mean(0) - hidden) / np.sqrt(hidden * (1 - hidden) / NUM_CHAINS)
    return {
        "mean": float(np.abs(z_mean).max()),
        "covariance": float(np.abs(z_cov).max()),
        "hidden": float(np.abs(z_hidden).max()),
    }


GIBBS_MODEL = {"n_visible": 3, "n_hidden": 2, "scale": 1.0, **STD_CASES["learned"]}


def test_gibbs_chains_reach_the_exact_mixture_moments():
    z = gibbs_z_scores(gaussian_rbm(**GIBBS_MODEL))
    # Exact moments by enumeration of the mixture; measured: 1.9, 1.9, 1.3.
    assert max(z.values()) < Z_BOUND, z


@pytest.mark.parametrize("layer", [NoiseScaledByVariance, MeanScaledByStd])
def test_negative_control_gibbs_with_a_wrong_variance_misses_the_moments(layer):
    z = gibbs_z_scores(gaussian_rbm(**GIBBS_MODEL, layer=layer))
    # Measured: covariances off by 57 (noise s^2) and 15 (mean b + s u) standard errors.
    assert max(z.values()) > 2 * Z_BOUND, z


def test_sample_given_draws_each_conditional():
    model = gaussian_rbm(3, 2, **STD_CASES["learned"])
    visible, _ = model.layers
    count = 4000
    # Hidden clamped to one state: v | h ~ N(b + s^2 W h, s^2), tested unit by unit
    # (scipy.stats.kstest against scipy.stats.norm).
    h = torch.tensor([[1.0, 0.0]], dtype=F64).expand(count, -1)
    v, _ = el.sample_given(model, {1: h}, sweeps=1, generator=seeded(3), progress=False)
    std = visible.log_std.detach().exp()
    centre = visible.bias.detach() + std.square() * (model.couplings[0].weight.detach() @ h[0])
    for i in range(3):
        assert stats.kstest(v[:, i].numpy(), stats.norm(float(centre[i]), float(std[i])).cdf).pvalue > 1e-3
    # Visible clamped: P(h_j = 1 | v) = sigmoid(c + W^T v) (mathematics), z-scores of the draws.
    v0 = real_data(1, 3, seed=4).expand(count, -1)
    _, h = el.sample_given(model, {0: v0}, sweeps=1, generator=seeded(5), progress=False)
    p = torch.sigmoid(model.layers[1].bias.detach() + v0[0] @ model.couplings[0].weight.detach())
    z = (h.mean(0) - p) / torch.sqrt(p * (1 - p) / count)
    assert float(z.abs().max()) < Z_BOUND


# ---------------------------------------------------------------------------------------------
# 3. Annealed importance sampling against exact log Z.

AIS_CASES = {"fixed std": {"std": 0.7}, "learned std": STD_CASES["learned"]}


def mixture_draws(model: el.EnergyModel, count: int, seed: int) -> Tensor:
    """Exact draws from the model (a component by its weight, then its Gaussian; numpy's generator)."""
    mix = mixture(model)
    rng = np.random.default_rng(seed)
    component = rng.choice(len(mix.weights), size=count, p=mix.weights)
    noise = rng.standard_normal((count, len(mix.variances)))
    return torch.tensor(mix.means[component] + np.sqrt(mix.variances) * noise)


@pytest.mark.parametrize("case", list(AIS_CASES))
@pytest.mark.parametrize("base", ["uniform", "standardised data", "model data"])
def test_ais_brackets_the_exact_log_partition(case, base):
    model = gaussian_rbm(3, 2, scale=1.0, **AIS_CASES[case])
    exact = float(el.exact_log_partition(model).detach())  # exact enumeration of the hidden states
    data = None
    if base == "standardised data":
        # Standardised columns have mean 0 up to rounding: this base is the uniform one again.
        raw = 2.0 + 3.0 * torch.randn(200, 3, dtype=F64, generator=seeded(8))
        data = (raw - raw.mean(0)) / raw.std(0)
    elif base == "model data":
        # A base at the mean of data the model fits (its own draws), far from zero.
        data = mixture_draws(model, 200, seed=8)
    estimate = el.ais_log_partition(
        model,
        num_chains=100,
        num_betas=1000,
        data=data,
        base="uniform" if data is None else "data",
        generator=seeded(9),
        progress=False,
    )
    # "Annealed Importance Sampling" (Statistics and Computing, 2001); the bracket of three standard
    # errors (common practice, no source) covers the exact log Z. Measured widths: 0.06-0.07 from the
    # zero base, 0.006-0.012 from the model's data (so that base is used: it starts the chains near
    # the model).
    assert estimate.lower <= exact <= estimate.upper, (estimate, exact)
    assert estimate.upper - estimate.lower < (0.03 if base == "model data" else 0.3)


def test_reverse_ais_is_close_to_the_exact_log_likelihood():
    model = gaussian_rbm(3, 2, scale=1.0, **STD_CASES["learned"])
    v = real_data(4, 3, seed=10)
    exact = el.exact_log_likelihood(model, v).detach()  # exact enumeration
    estimate = el.reverse_ais_log_likelihood(
        model, v, num_chains=20, num_betas=1000, generator=seeded(11), progress=False
    )
    # "Accurate and Conservative Estimates of MRF Log-likelihood using Reverse Annealing" (AISTATS
    # 2015): the estimate is of the forward process's probability of v, which tends to log p(v) as
    # the betas grow, and is stochastic per example (either side). Measured here: within 0.035 of the
    # exact value; 0.15 leaves room for the noise of 20 chains yet catches a wrong weight (a missing
    # log Z_A term or a wrong base would be off by whole nats).
    torch.testing.assert_close(estimate, exact, rtol=0, atol=0.15)


# ---------------------------------------------------------------------------------------------
# 4. Exact objective gradients.


def mixture_negative_log_likelihood(model: el.EnergyModel, v: Tensor) -> Tensor:
    """The mean exact ``-log p(v)`` of a Gaussian-binary RBM written in torch from the mixture form
    (mathematics, independent of the library's enumeration and its custom backward):
    ``log p(v) = logsumexp_h [-sum (v - b)^2 / (2 s^2) + c.h + v.(W h)] - log Z`` and
    ``log Z = logsumexp_h [c.h + b.(W h) + sum s^2 (W h)^2 / 2] + sum (log(2 pi) / 2 + log s)``."""
    visible, hidden = model.layers
    b, log_s, c, weight = visible.bias, visible.log_std, hidden.bias, model.couplings[0].weight
    states = torch.tensor(list(itertools.product((0.0, 1.0), repeat=hidden.size)), dtype=F64)
    inputs = states @ weight.T  # (2^K, n)
    variances = (2.0 * log_s).exp()
    joint = -((v - b).square() / (2.0 * variances)).sum(1, keepdim=True) + states @ c + v @ inputs.T
    log_z = (
        torch.logsumexp(states @ c + inputs @ b + (variances * inputs.square()).sum(1) / 2.0, 0)
        + (0.5 * math.log(2 * math.pi) + log_s).sum()
    )
    return -(torch.logsumexp(joint, 1) - log_z).mean()


def exact_objective_gradient(model: el.EnergyModel, v: Tensor) -> dict[str, Tensor]:
    objective = el.TwoPhaseObjective(model, el.MeanField(model, tol=1e-10), el.ExactStatistics(model))
    model.zero_grad()
    objective(v).backward()
    return {name: p.grad.clone() for name, p in model.named_parameters()}


def autograd_of(model: el.EnergyModel, loss) -> dict[str, Tensor]:
    model.zero_grad()
    loss().backward()
    return {name: p.grad.clone() for name, p in model.named_parameters()}


@pytest.mark.parametrize("case", ["std=0.6", "learned"])
def test_exact_objective_gradient_is_the_autograd_of_the_exact_likelihood(case):
    model = gaussian_rbm(3, 3, **STD_CASES[case])
    v = real_data(9, 3, seed=12)
    ours = exact_objective_gradient(model, v)
    expected_names = {"layers.0.bias", "layers.1.bias", "couplings.0.weight"}
    assert set(ours) == expected_names | ({"layers.0.log_std"} if case == "learned" else set())
    # Autograd of the library's exact mean negative log-likelihood (exact enumeration).
    library = autograd_of(model, lambda: -el.exact_log_likelihood(model, v).mean())
    for name in ours:
        torch.testing.assert_close(ours[name], library[name], rtol=1e-9, atol=1e-10, msg=name)


@pytest.mark.parametrize("case", ["std=0.6", "learned"])
def test_exact_objective_gradient_is_the_gradient_of_the_mixture_likelihood(case):
    model = gaussian_rbm(3, 3, **STD_CASES[case])
    v = real_data(9, 3, seed=12)
    ours = exact_objective_gradient(model, v)
    # Autograd of the mixture form written here (mathematics), which uses nothing of the library's
    # enumeration or its log Z backward. (It agrees with central finite differences of the
    # library's exact_log_likelihood values to 1e-8; measured while writing the test.)
    independent = autograd_of(model, lambda: mixture_negative_log_likelihood(model, v))
    for name in ours:
        torch.testing.assert_close(ours[name], independent[name], rtol=1e-9, atol=1e-10, msg=name)


def test_log_partition_gradient_in_a_learned_std_without_coupling():
    """The minimal case: zero weights and hidden biases, so log Z = K log 2 + sum_i (log(2 pi) / 2 +
    log s_i) and d log Z / d log s_i = 1 exactly (mathematics). A variance term that ignored the total of
    enumeration's unnormalised chunk weights gave 1 / 2^K (0.5 here)."""
    model = gaussian_rbm(2, 1, log_std=(0.2, -0.3))
    with torch.no_grad():
        model.couplings[0].weight.zero_()
        model.layers[1].bias.zero_()
    model.zero_grad()
    el.exact_log_partition(model).backward()
    torch.testing.assert_close(model.layers[0].log_std.grad, torch.ones(2, dtype=F64))


def test_negative_control_expected_statistics_without_variance_breaks_the_std_gradient():
    model = gaussian_rbm(3, 3, layer=ExpectedStatisticsWithoutVariance, **STD_CASES["learned"])
    v = real_data(9, 3, seed=12)
    ours = exact_objective_gradient(model, v)
    independent = autograd_of(model, lambda: mixture_negative_log_likelihood(model, v))  # mathematics
    # The model phase's log_std statistic is short by exactly 1 per unit: the gradient (model minus
    # data statistic) is 1 too small there, and right elsewhere.
    torch.testing.assert_close(
        ours["layers.0.log_std"] - independent["layers.0.log_std"], -torch.ones(3, dtype=F64)
    )
    torch.testing.assert_close(ours["couplings.0.weight"], independent["couplings.0.weight"])


# ---------------------------------------------------------------------------------------------
# 5. The layer on its own.


def unequal_layer(learn_std: bool = True) -> el.GaussianLayer:
    """Three float64 units with bias (0.3, -1.2, 2.0) and std exp(-0.5, 0, 0.4) (learned), or 0.7."""
    layer = el.GaussianLayer(3, std=0.7, learn_std=learn_std, dtype=F64)
    with torch.no_grad():
        layer.bias.copy_(torch.tensor([0.3, -1.2, 2.0], dtype=F64))
        if learn_std:
            layer.log_std.copy_(torch.tensor([-0.5, 0.0, 0.4], dtype=F64))
    return layer


def numpy_parameters(layer: el.GaussianLayer) -> tuple[np.ndarray, np.ndarray]:
    return layer.bias.detach().numpy(), layer.log_std.detach().exp().numpy()


INPUTS = torch.tensor([[-1.3, 0.0, 2.2], [0.5, -2.0, 0.1]], dtype=F64)


def test_mean_is_bias_plus_variance_times_input():
    layer = unequal_layer()
    b, s = numpy_parameters(layer)
    # The conditional N(b + s^2 u, s^2) of the brief (completing the square, mathematics).
    np.testing.assert_allclose(layer.mean(INPUTS).detach().numpy(), b + s**2 * INPUTS.numpy(), rtol=1e-14)


@pytest.mark.parametrize("learn_std", [False, True])
def test_log_partition_is_the_gaussian_integral(learn_std):
    layer = unequal_layer(learn_std)
    b, s = numpy_parameters(layer)
    expected = []
    for row in INPUTS.numpy():
        total = 0.0
        for i in range(3):
            # scipy.integrate.quad of exp(-(x - b)^2 / (2 s^2) + x u) over the real line, one unit at a time.
            value, _ = integrate.quad(
                lambda x, i=i, u=row[i]: math.exp(-((x - b[i]) ** 2) / (2 * s[i] ** 2) + x * u),
                -np.inf,
                np.inf,
            )
            total += math.log(value)
        expected.append(total)
    np.testing.assert_allclose(layer.log_partition(INPUTS).detach().numpy(), expected, rtol=1e-9)


def test_log_probability_is_the_normal_density():
    layer = unequal_layer()
    b, s = numpy_parameters(layer)
    x = real_data(2, 3, seed=13)
    ours = layer.log_probability(x, INPUTS).detach().numpy()
    # scipy.stats.norm.logpdf of N(b + s^2 u, s^2), summed over the units.
    expected = stats.norm.logpdf(x.numpy(), b + s**2 * INPUTS.numpy(), s).sum(1)
    np.testing.assert_allclose(ours, expected, rtol=1e-12)


def test_entropy_matches_scipy():
    layer = unequal_layer()
    _, s = numpy_parameters(layer)
    means = real_data(4, 3, seed=14)
    entropy = layer.entropy(means)
    assert entropy.shape == (4,)
    # scipy.stats.norm.entropy of each unit, summed; it does not depend on the mean.
    np.testing.assert_allclose(
        entropy.detach().numpy(), np.full(4, stats.norm.entropy(scale=s).sum()), rtol=1e-12
    )


def test_expected_energy_and_expected_statistics_are_gaussian_averages():
    layer = unequal_layer()
    b, s = numpy_parameters(layer)
    means = real_data(2, 3, seed=15)
    expected_energy, bias_statistic, std_statistic = [], [], []
    for row in means.numpy():
        units = [stats.norm(row[i], s[i]) for i in range(3)]
        # scipy.stats.norm.expect: averages over x ~ N(mean, s^2) of U and of -dU/dtheta.
        expected_energy.append(
            sum(units[i].expect(lambda x, i=i: (x - b[i]) ** 2 / (2 * s[i] ** 2)) for i in range(3))
        )
        bias_statistic.append([units[i].expect(lambda x, i=i: (x - b[i]) / s[i] ** 2) for i in range(3)])
        std_statistic.append([units[i].expect(lambda x, i=i: (x - b[i]) ** 2 / s[i] ** 2) for i in range(3)])
    np.testing.assert_allclose(layer.expected_energy(means).detach().numpy(), expected_energy, rtol=1e-9)
    averages = layer.expected_statistics(means)
    np.testing.assert_allclose(averages["bias"].numpy(), np.mean(bias_statistic, 0), rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(averages["log_std"].numpy(), np.mean(std_statistic, 0), rtol=1e-9)


def test_draws_follow_the_conditional_normal():
    layer = unequal_layer()
    b, s = numpy_parameters(layer)
    count = 20_000
    input = INPUTS[:1].expand(count, -1)
    centre = b + s**2 * INPUTS[0].numpy()

    def smallest_p_value(unit: el.GaussianLayer) -> float:
        x = unit.sample(input, seeded(16)).numpy()
        # scipy.stats.kstest of each unit's draws against scipy.stats.norm(b + s^2 u, s).
        return min(stats.kstest(x[:, i], stats.norm(centre[i], s[i]).cdf).pvalue for i in range(3))

    assert smallest_p_value(layer) > 1e-3  # measured: 0.11
    wrong = NoiseScaledByVariance(3, learn_std=True, dtype=F64)
    wrong.load_state_dict(layer.state_dict())
    assert smallest_p_value(wrong) < 1e-10  # negative control: noise s^2 instead of s
    # Sample moments, z-scores of the mean (common practice, no source) and the std within 3%.
    x = layer.sample(input, seeded(17))
    z = (x.mean(0).numpy() - centre) / (s / math.sqrt(count))
    assert np.abs(z).max() < Z_BOUND
    np.testing.assert_allclose(x.std(0).numpy(), s, rtol=0.03)
    assert not x.requires_grad


@pytest.mark.parametrize("learn_std", [False, True])
def test_statistics_are_the_autograd_default(learn_std):
    layer = unequal_layer(learn_std)
    x = real_data(6, 3, seed=18)
    weights = torch.softmax(torch.randn(6, dtype=F64, generator=seeded(19)), 0)
    for w in (None, weights):
        ours = layer.statistics(x, w)
        # The protocol's generic statistics: autograd of -energy, averaged over the batch.
        reference = el.UnitLayer.statistics(layer, x, w)
        assert set(ours) == set(reference) == ({"bias", "log_std"} if learn_std else {"bias"})
        for name in ours:
            torch.testing.assert_close(ours[name], reference[name], rtol=1e-12, atol=1e-12, msg=name)


@pytest.mark.parametrize("learn_std", [False, True])
def test_state_dict_round_trip(learn_std):
    layer = unequal_layer(learn_std)
    parameters = dict(layer.named_parameters())
    buffers = dict(layer.named_buffers())
    if learn_std:
        assert "log_std" in parameters and "log_std" not in buffers
    else:
        assert "log_std" in buffers and "log_std" not in parameters  # saved, but not trained
    assert set(layer.state_dict()) == {"bias", "log_std"}
    saved = io.BytesIO()
    torch.save(layer.state_dict(), saved)
    saved.seek(0)
    fresh = el.GaussianLayer(3, std=2.5, learn_std=learn_std, dtype=F64)
    fresh.load_state_dict(torch.load(saved))
    for name, value in layer.state_dict().items():
        assert torch.equal(fresh.state_dict()[name], value), name
    torch.testing.assert_close(fresh.log_partition(INPUTS), layer.log_partition(INPUTS), rtol=0, atol=0)


def test_float32_by_default_and_float64_on_request():
    layer = el.GaussianLayer(3)
    assert layer.bias.dtype == layer.log_std.dtype == torch.float32
    input = torch.randn(5, 3, generator=seeded(20))
    for out in (
        layer.mean(input),
        layer.sample(input, seeded(21)),
        layer.log_partition(input),
        layer.entropy(input),
    ):
        assert out.dtype == torch.float32
    wide = el.GaussianLayer(3, dtype=F64)
    assert wide.bias.dtype == wide.log_std.dtype == F64
    converted = el.GaussianLayer(3, std=0.5).double()  # the log_std buffer follows the module
    assert converted.log_std.dtype == F64
    torch.testing.assert_close(converted.log_std, torch.full((3,), math.log(0.5), dtype=F64))
    # A float32 model goes through sampling and the exact likelihood (computed in float64), and
    # agrees with its float64 copy to float32 precision.
    model = el.EnergyModel([el.GaussianLayer(3), el.BinaryLayer(2)], [el.DenseCoupling(0, 1, 3, 2)])
    model.reset_parameters(seeded(22))
    v = torch.randn(4, 3, generator=seeded(23))
    assert el.PersistentSampler(model, num_particles=7, generator=seeded(24))()[0].dtype == torch.float32
    low = el.exact_log_likelihood(model, v)
    high = el.exact_log_likelihood(model.double(), v.double())
    assert low.dtype == F64
    torch.testing.assert_close(low, high, rtol=1e-5, atol=1e-5)


@pytest.mark.parametrize(
    ("arguments", "error", "name"),
    [
        ({"size": 0}, ValueError, "size"),
        ({"size": -2}, ValueError, "size"),
        ({"size": 2.5}, TypeError, "size"),
        ({"size": 3, "std": 0.0}, ValueError, "std"),
        ({"size": 3, "std": -1.0}, ValueError, "std"),
        ({"size": 3, "std": math.inf}, ValueError, "std"),
        ({"size": 3, "std": math.nan}, ValueError, "std"),
        ({"size": 3, "std": "1"}, TypeError, "std"),
        ({"size": 3, "learn_std": 1}, TypeError, "learn_std"),
        ({"size": 3, "learn_std": "yes"}, TypeError, "learn_std"),
    ],
)
def test_bad_constructor_arguments_are_refused_by_name(arguments, error, name):
    arguments = dict(arguments)
    with pytest.raises(error, match=rf"^{name}\b"):
        el.GaussianLayer(arguments.pop("size"), **arguments)


def test_initial_states_and_base_parameters():
    layer = unequal_layer()
    b, s = numpy_parameters(layer)
    draws = layer.initial_states(20_000, seeded(25)).numpy()
    # A draw from the layer alone, N(b, s^2): scipy.stats.kstest per unit.
    assert min(stats.kstest(draws[:, i], stats.norm(b[i], s[i]).cdf).pvalue for i in range(3)) > 1e-3
    given = real_data(4, 3, seed=26)
    assert torch.equal(layer.initial_states(4, seeded(27), mean=given), given)
    base = layer.base_parameters()
    assert torch.equal(base["bias"], torch.zeros(3, dtype=F64))
    assert torch.equal(base["log_std"], layer.log_std.detach())  # its own std is kept along the path
    torch.testing.assert_close(layer.base_parameters(given)["bias"], given.mean(0))
    assert set(unequal_layer(learn_std=False).base_parameters()) == {"bias"}


# ---------------------------------------------------------------------------------------------
# 6. Mean field with a Gaussian visible layer.


def gaussian_chain(seed: int = 3) -> el.EnergyModel:
    """Gaussian 4 (learned, unequal std) - binary 3 - binary 2, float64, parameters from N(0, 0.7^2)."""
    model = el.EnergyModel(
        [
            el.GaussianLayer(4, learn_std=True, dtype=F64),
            el.BinaryLayer(3, dtype=F64),
            el.BinaryLayer(2, dtype=F64),
        ],
        [el.DenseCoupling(0, 1, 4, 3, dtype=F64), el.DenseCoupling(1, 2, 3, 2, dtype=F64)],
    )
    g = seeded(seed)
    with torch.no_grad():
        for parameter in model.parameters():
            parameter.copy_(0.7 * torch.randn(parameter.shape, dtype=F64, generator=g))
    return model


MISSING = torch.tensor([[True, False, False, True]] * 5)


@pytest.mark.parametrize("missing", [None, MISSING], ids=["observed", "two missing"])
def test_mean_field_converges_to_the_fixed_point(missing):
    model = gaussian_chain()
    v = real_data(5, 4, seed=28)
    mf = el.MeanField(model, tol=1e-12, max_iter=500)
    with torch.no_grad():
        mu0, mu1, mu2 = mf(v, missing=missing)
        assert mf.converged
        # The fixed-point equations, written out (mathematics): binary marginals are sigmoids of their
        # input, a missing Gaussian unit sits at b + s^2 * (its input).
        visible, middle, top = model.layers
        w0, w1 = model.couplings[0].weight, model.couplings[1].weight
        torch.testing.assert_close(
            mu1, torch.sigmoid(middle.bias + mu0 @ w0 + mu2 @ w1.T), rtol=0, atol=1e-10
        )
        torch.testing.assert_close(mu2, torch.sigmoid(top.bias + mu1 @ w1), rtol=0, atol=1e-10)
        inferred = visible.bias + (2 * visible.log_std).exp() * (mu1 @ w0.T)
        expected0 = v if missing is None else torch.where(missing, inferred, v)
        torch.testing.assert_close(mu0, expected0, rtol=0, atol=1e-10)
        # Damped parallel updates reach the same fixed point.
        parallel = el.MeanField(model, update="parallel", tol=1e-12, max_iter=2000)(v, missing=missing)
        for got, want in zip(parallel, (mu0, mu1, mu2)):
            torch.testing.assert_close(got, want, rtol=0, atol=1e-9)


@pytest.mark.parametrize("missing", [None, MISSING], ids=["observed", "two missing"])
def test_implicit_mean_field_gradient_equals_the_unrolled_one(missing):
    model = gaussian_chain()
    x = real_data(5, 4, seed=28)
    gradients = []
    for backward in ("implicit", "unroll"):
        v = x.clone().requires_grad_()
        mf = el.MeanField(model, tol=1e-12, max_iter=500, backward=backward)
        marginals = mf(v, missing=missing)
        assert mf.converged
        loss = sum(
            (mu * torch.randn(mu.shape, dtype=F64, generator=seeded(30 + i))).sum()
            for i, mu in enumerate(marginals)
        )
        model.zero_grad()
        loss.backward()
        grads = {"v": v.grad.clone()}
        grads.update(
            {name: None if p.grad is None else p.grad.clone() for name, p in model.named_parameters()}
        )
        gradients.append(grads)
    implicit, unrolled = gradients
    if missing is not None:  # the inferred Gaussian units depend on the visible bias and std
        assert implicit["layers.0.log_std"] is not None
    for name in implicit:
        if unrolled[name] is None:
            assert implicit[name] is None, name
            continue
        torch.testing.assert_close(implicit[name], unrolled[name], rtol=1e-8, atol=1e-10, msg=name)


def test_mean_field_marginals_pass_gradcheck_in_the_gaussian_data():
    model = gaussian_chain()
    mf = el.MeanField(model, tol=1e-13, max_iter=1000)
    v = real_data(2, 4, seed=31).requires_grad_()
    # torch.autograd.gradcheck: the implicit backward against finite differences, float64.
    assert torch.autograd.gradcheck(lambda x: tuple(mf(x)[1:]), (v,), eps=1e-6, atol=1e-6)


def test_mean_field_statistics_of_missing_gaussian_units_average_over_their_variance():
    model = gaussian_rbm(3, 2, **STD_CASES["learned"])
    v = real_data(4, 3, seed=32)
    missing = torch.tensor([[False, True, False]] * 4)
    mf = el.MeanField(model, tol=1e-12, max_iter=1000)
    statistics = mf.statistics(v, missing=missing)
    with torch.no_grad():
        mu = mf(v, missing=missing)[0]
        visible = model.layers[0]
        variances = (2 * visible.log_std).exp()
        # Mathematics: a missing unit's mean-field factor is N(mu, s^2), so E[(x - b)^2] / s^2 is
        # (mu - b)^2 / s^2 + 1 there; an observed unit contributes its value's statistic.
        expected = ((mu - visible.bias).square() / variances + missing.to(F64)).mean(0)
    torch.testing.assert_close(statistics["layers.0.log_std"], expected, rtol=1e-10, atol=1e-10)


# ---------------------------------------------------------------------------------------------
# 7. Training: fit and pretraining (tiny runs: do they run, and start where they should).


def training_data(rows: int = 40, seed: int = 33) -> Tensor:
    """float32 data standardised with the generator's mean and std (so its sample mean is small but
    not zero, which the bias check needs)."""
    means, scales = torch.tensor([1.0, -2.0, 0.5, 3.0]), torch.tensor([1.0, 2.0, 0.5, 3.0])
    raw = means + scales * torch.randn(rows, 4, generator=seeded(seed))
    return (raw - means) / scales


def float_rbm(learn_std: bool = False) -> el.EnergyModel:
    model = el.EnergyModel(
        [el.GaussianLayer(4, learn_std=learn_std), el.BinaryLayer(3)], [el.DenseCoupling(0, 1, 4, 3)]
    )
    model.reset_parameters(seeded(34))
    return model


@pytest.mark.parametrize("negative", ["persistent", "contrastive-divergence"])
def test_fit_starts_the_gaussian_biases_at_the_data_mean_and_trains(negative):
    data = training_data()
    model = float_rbm(learn_std=True)
    el.fit(model, data, epochs=0, progress=False, generator=seeded(35), negative=negative)
    # The rule of fit for an untrained model (common practice, no source): Gaussian biases start at
    # the data's mean.
    assert model.layers[0].bias.detach().abs().min() > 0  # not vacuous: the sample mean is not zero
    torch.testing.assert_close(model.layers[0].bias.detach(), data.mean(0))
    model = float_rbm(learn_std=True)
    before = {name: p.detach().clone() for name, p in model.named_parameters()}
    result = el.fit(
        model, data, epochs=2, batch_size=10, progress=False, generator=seeded(35), negative=negative
    )
    assert len(result.history) == 2 and not result.pretraining
    for name, parameter in model.named_parameters():
        assert torch.isfinite(parameter).all(), name
        assert not torch.equal(parameter.detach(), before[name]), name


def float_chain(learn_std: bool = False) -> el.EnergyModel:
    model = el.EnergyModel(
        [el.GaussianLayer(4, learn_std=learn_std), el.BinaryLayer(3), el.BinaryLayer(2)],
        [el.DenseCoupling(0, 1, 4, 3), el.DenseCoupling(1, 2, 3, 2)],
    )
    model.reset_parameters(seeded(36))
    return model


def test_fit_pretrains_a_chain_with_a_gaussian_layer_0():
    model = float_chain()
    result = el.fit(model, training_data(), epochs=1, pretrain_epochs=2, progress=False, generator=seeded(37))
    assert len(result.pretraining) == 2 and all(len(stage) == 2 for stage in result.pretraining)
    assert not model.untrained()
    assert all(torch.isfinite(p).all() for p in model.parameters())


def test_pretrain_composes_a_chain_with_a_learned_gaussian_std():
    model = float_chain(learn_std=True)
    results = el.pretrain(model, training_data(), epochs=2, progress=False, generator=seeded(38))
    assert len(results) == 2
    assert not model.untrained()
    # The learned std was trained by the first RBM and written into the chain.
    assert not torch.equal(model.layers[0].log_std.detach(), torch.zeros(4))
    assert all(torch.isfinite(p).all() for p in model.parameters())


# ---------------------------------------------------------------------------------------------
# 8. Clear errors where the mathematics does not apply.


def test_pseudo_likelihood_refuses_a_gaussian_visible_layer():
    model = float_rbm()
    with pytest.raises(ValueError, match="GaussianLayer"):
        el.pseudo_log_likelihood(model, training_data())


def test_exact_enumeration_refuses_two_coupled_gaussian_layers():
    # No layer of the cover lists its states, so nothing can be enumerated (and such a model need
    # not even be normalisable).
    model = el.EnergyModel([el.GaussianLayer(3), el.GaussianLayer(2)], [el.DenseCoupling(0, 1, 3, 2)])
    for call in (lambda: el.exact_log_partition(model), lambda: el.ExactStatistics(model)):
        with pytest.raises(ValueError, match="num_states"):
            call()
