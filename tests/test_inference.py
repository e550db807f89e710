"""Mean-field inference against independent formulas.

The reference fixed-point equation and mean-field free energy are written from the
mathematics over the stacked units (``interaction_matrix`` of ``tests/reference.py``, in
numpy): mu = sigmoid(b + mu J) on the free units, and F_MF(mu) = -b.mu - 1/2 mu J mu^T - H(mu)
with H the entropy of independent Bernoulli units. Gradients are checked with
``torch.autograd.gradcheck`` (finite differences).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import torch
from scipy.special import expit
from torch.func import functional_call

import ebm_layers as el
from tests.helpers import assert_unchanged, snapshot
from tests.reference import brute_force, build, interaction_matrix, randomize

DTYPE = torch.float64
# Model shapes of tests/reference.py with their layer sizes: free layers coupled in a chain, by a
# skip-layer coupling (three colour classes), laterally, and the RBM.
MODELS = {
    "rbm": (5, 3),
    "chain3": (4, 3, 2),
    "skip": (4, 3, 2),
    "hidden_lateral_chain": (4, 3, 2),
    "chain4": (3, 3, 2, 2),
}


def model_of(shape: str, seed: int = 0, scale: float = 1.0) -> el.EnergyModel:
    return randomize(build(shape, MODELS[shape]), seed, scale)


def data(batch: int, width: int, seed: int = 1) -> torch.Tensor:
    generator = torch.Generator().manual_seed(seed)
    return torch.bernoulli(torch.full((batch, width), 0.5, dtype=DTYPE), generator=generator)


def stacked(marginals: list[torch.Tensor]) -> np.ndarray:
    return torch.cat(marginals, dim=1).detach().numpy()


def fixed_point_residual(model: el.EnergyModel, marginals: list[torch.Tensor], free: list[int]) -> float:
    """Mathematics: max |sigmoid(b + mu J) - mu| over the free units, in numpy float64."""
    bias = torch.cat([layer.bias.detach() for layer in model.layers]).numpy()
    interaction = interaction_matrix(model).detach().numpy()
    mu = stacked(marginals)
    ends = np.cumsum((0,) + model.sizes)
    columns = np.concatenate([np.arange(ends[i], ends[i + 1]) for i in free])
    return float(np.abs(expit(bias + mu @ interaction) - mu)[:, columns].max())


def mean_field_free_energy(model: el.EnergyModel, marginals: list[torch.Tensor]) -> np.ndarray:
    """Mathematics: F_MF(mu) = -b.mu - 1/2 mu J mu^T - H(mu), per batch row."""
    bias = torch.cat([layer.bias.detach() for layer in model.layers]).numpy()
    interaction = interaction_matrix(model).detach().numpy()
    mu = np.clip(stacked(marginals), 1e-300, 1 - 1e-16)
    entropy = -(mu * np.log(mu) + (1 - mu) * np.log1p(-mu)).sum(1)
    return -mu @ bias - 0.5 * ((mu @ interaction) * mu).sum(1) - entropy


@pytest.mark.parametrize("update", ["colour", "parallel"])
@pytest.mark.parametrize("shape", list(MODELS))
def test_converged_marginals_are_a_fixed_point(shape, update):
    model = model_of(shape)
    mf = el.MeanField(model, update=update, tol=1e-10, max_iter=2000)
    marginals = mf(data(6, model.sizes[0]))
    assert mf.converged and mf.residual < 1e-10
    free = list(range(1, len(model.sizes)))
    # Mathematics: the fixed-point equation, evaluated independently in numpy.
    assert fixed_point_residual(model, marginals, free) < 1e-10
    assert mf.iterations < 2000


def count_matrix_products(monkeypatch) -> list[int]:
    """Count the products ``DenseCoupling.input_to`` computes (every layer input goes through it)."""
    calls: list[int] = []
    input_to = el.DenseCoupling.input_to

    def counted(self, target, x):
        calls.append(1)
        return input_to(self, target, x)

    monkeypatch.setattr(el.DenseCoupling, "input_to", counted)
    return calls


def test_rbm_is_exact_in_one_pass(monkeypatch):
    model = model_of("rbm", scale=2.0)
    v = data(8, 5)
    calls = count_matrix_products(monkeypatch)
    with torch.no_grad():
        hidden = el.MeanField(model)(v)[1]
    assert len(calls) == 1  # one matrix product, v @ W, and no residual check after the update
    # Exact enumeration (mathematics): p(h_j = 1 | v) from the joint probabilities of every state.
    ref = brute_force(model)
    rows = [(ref.states[0] == row).all(1) for row in v]
    exact = torch.stack([ref.prob[r] @ ref.states[1][r] / ref.prob[r].sum() for r in rows])
    torch.testing.assert_close(hidden, exact, rtol=1e-10, atol=1e-12)


def test_rbm_with_gradients_still_costs_one_pass(monkeypatch):
    model, v = model_of("rbm"), data(4, 5)
    calls = count_matrix_products(monkeypatch)
    hidden = el.MeanField(model)(v)[1]
    assert len(calls) == 1 and hidden.requires_grad
    (gradient,) = torch.autograd.grad(hidden.sum(), model.couplings[0].weight)
    # Mathematics: d/dW_ij sum_bk sigmoid(c_k + v_b W_k) = sum_b v_bi s'(.)_bj.
    slope = hidden * (1 - hidden)
    torch.testing.assert_close(gradient, v.T @ slope.detach())


def test_float32_tol_below_its_resolution_says_so():
    """Rounding keeps a float32 residual near its epsilon (measured here: 1.2e-7), never 1e-9."""
    generator = torch.Generator().manual_seed(0)
    model = el.dbm(60, 40, 40, generator=generator)
    with torch.no_grad():
        for coupling in model.couplings:
            coupling.weight.normal_(0.0, 0.5, generator=generator)
    v = torch.bernoulli(torch.full((20, 60), 0.5), generator=generator)
    with (
        pytest.warns(RuntimeWarning, match="torch.float32 resolves residuals only to about 1e-06"),
        torch.no_grad(),
    ):
        el.MeanField(model, tol=1e-9, max_iter=300)(v)


def test_clamped_layer_leaves_one_free_class():
    model = model_of("chain3")
    v, top = data(4, 4), data(4, 2, seed=2)
    mf = el.MeanField(model)
    marginals = mf(v, clamp={2: top})
    assert mf.iterations == 1 and marginals[2] is top and marginals[0] is v
    bias, (w01, w12) = model.layers[1].bias, model.weights()
    # Mathematics: the middle layer's conditional given both neighbours.
    torch.testing.assert_close(marginals[1], torch.sigmoid(bias + v @ w01 + top @ w12.T))


@pytest.mark.filterwarnings("ignore:mean field did not converge")
@pytest.mark.parametrize("shape", ["chain3", "skip", "hidden_lateral_chain", "chain4"])
def test_colour_sweeps_lower_the_mean_field_free_energy(shape):
    model = model_of(shape, seed=3, scale=2.0)
    v = data(5, model.sizes[0])
    energies = []
    with torch.no_grad():
        for sweeps in range(1, 16):
            marginals = el.MeanField(model, tol=1e-300, max_iter=sweeps)(v)
            energies.append(mean_field_free_energy(model, marginals))
    # Mathematics: each colour-class update minimises F_MF exactly over that class's units
    # ("A View of the EM Algorithm that Justifies Incremental, Sparse, and Other Variants",
    # Learning in Graphical Models, 1998, for coordinate-wise free-energy descent).
    steps = np.diff(np.stack(energies), axis=0)
    assert (steps <= 1e-12).all()


def inhibition_pair() -> el.EnergyModel:
    """Two hidden units in separate layers with mutual inhibition, w = -6, biases 2.

    The symmetric fixed point mu = sigmoid(2 - 6 mu) = 0.4005 has s = mu (1 - mu) = 0.240, so the
    parallel map's Jacobian eigenvalues are +-6 s = +-1.44. Started symmetric (both at 0.5) the
    parallel iteration stays symmetric and follows x <- sigmoid(2 - 6 x), whose slope -1.44 < -1
    at the fixed point makes it oscillate with period two; damped with 0.5 the slope becomes
    0.5 + 0.5 (-1.44) = -0.22 (converges; a slope above -3 suffices). The symmetric point is a
    saddle of the mean-field free energy; colour-ordered updates break the symmetry and reach a
    minimum. Mathematics; "common practice, no source" for damping against oscillation.
    """
    model = el.EnergyModel(
        [el.BinaryLayer(1, dtype=DTYPE) for _ in range(3)], [el.DenseCoupling(1, 2, 1, 1, dtype=DTYPE)]
    )
    with torch.no_grad():
        model.couplings[0].weight.fill_(-6.0)
        model.layers[1].bias.fill_(2.0)
        model.layers[2].bias.fill_(2.0)
    return model


def test_undamped_parallel_oscillates_with_period_two():
    model, v = inhibition_pair(), torch.zeros(1, 1, dtype=DTYPE)
    mf = el.MeanField(model, update="parallel", damping=0.0, tol=1e-8, max_iter=200)
    with pytest.warns(RuntimeWarning, match="did not converge"), torch.no_grad():
        even = mf(v)
    assert not mf.converged and mf.iterations == 200 and mf.residual > 0.5
    with torch.no_grad(), warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        mf.max_iter = 201
        odd = mf(v)
        mf.max_iter = 202
        later = mf(v)
    assert not caught  # warned once per module
    assert abs(float(even[1] - later[1])) < 1e-8  # period two
    assert abs(float(even[1] - odd[1])) > 0.5


def test_damped_parallel_and_colour_converge_where_undamped_oscillates():
    model, v = inhibition_pair(), torch.zeros(1, 1, dtype=DTYPE)
    with torch.no_grad():
        damped = el.MeanField(model, update="parallel", damping=0.5, tol=1e-10)
        symmetric = damped(v)
        colour = el.MeanField(model, damping=0.0, tol=1e-10)
        broken = colour(v)
    assert damped.converged and colour.converged
    for marginals in (symmetric, broken):
        assert fixed_point_residual(model, marginals, [1, 2]) < 1e-10  # mathematics
    assert abs(float(symmetric[1] - symmetric[2])) < 1e-12  # the saddle
    assert abs(float(broken[1] - broken[2])) > 0.5  # a minimum: one unit on, one off
    assert mean_field_free_energy(model, broken) < mean_field_free_energy(model, symmetric)


def test_undamped_parallel_can_raise_the_free_energy():
    """Negative control for the descent test: the parallel oscillation does not descend."""
    model, v = inhibition_pair(), torch.zeros(1, 1, dtype=DTYPE)
    energies = []
    with torch.no_grad(), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for updates in range(1, 8):
            mf = el.MeanField(model, update="parallel", damping=0.0, tol=1e-300, max_iter=updates)
            energies.append(mean_field_free_energy(model, mf(v)))
    assert (np.diff(np.stack(energies), axis=0) > 1e-3).any()


def test_implicit_backward_at_a_saddle_raises_instead_of_returning_garbage():
    model, v = inhibition_pair(), torch.zeros(1, 1, dtype=DTYPE)
    mf = el.MeanField(model, update="parallel", damping=0.5, tol=1e-10)
    marginals = mf(v)
    assert mf.converged  # at the symmetric saddle, where the damped update has eigenvalue 1.22
    asymmetric = marginals[1].sum() - 2 * marginals[2].sum()
    with pytest.raises(RuntimeError, match="backward diverged"):
        asymmetric.backward()
    assert all(p.grad is None for p in model.parameters())  # nothing reached the parameters
    # The unrolled backward differentiates the iterations themselves and stays finite.
    unrolled = el.MeanField(model, update="parallel", damping=0.5, tol=1e-10, backward="unroll")(v)
    (unrolled[1].sum() - 2 * unrolled[2].sum()).backward()
    grads = [p.grad for p in model.parameters() if p.grad is not None]
    assert len(grads) == 3 and all(torch.isfinite(g).all() for g in grads)  # the visible bias is unused


def frustrated_triangle() -> el.EnergyModel:
    """Three laterally coupled hidden units with mutual inhibition -2.4 and bias 2.4, plus a
    weakly coupled visible layer.

    Near the symmetric fixed point (mu ~ 0.5, s ~ 0.25) the undamped parallel Jacobian
    s J has eigenvalues 2 s w ~ -1.2 and -s w ~ 0.6 (twice): the undamped iteration, and with it
    the plain adjoint iteration g <- grad + J^T g, diverges; damped with 0.5 the eigenvalues are
    ~ -0.1 and 0.8, so a damped forward and a damped adjoint both converge. Mathematics.
    """
    generator = torch.Generator().manual_seed(5)
    model = el.EnergyModel(
        [el.BinaryLayer(2, dtype=DTYPE), el.BinaryLayer(3, dtype=DTYPE)],
        [el.DenseCoupling(0, 1, 2, 3, dtype=DTYPE), el.LateralCoupling(1, 3, dtype=DTYPE)],
    )
    with torch.no_grad():
        model.couplings[0].weight.copy_(0.1 * torch.randn(2, 3, generator=generator, dtype=DTYPE))
        model.layers[1].bias.fill_(2.4)
        model.couplings[1].weight = -2.4 * (1 - torch.eye(3, dtype=DTYPE))
    return model


def gradient_inputs(mf: el.MeanField, v: torch.Tensor, first: int = 1, **call):
    """``f(v, *parameters)`` -> marginals of layers ``first`` onwards (keywords ``call`` passed to
    ``mf``), for gradcheck over v and every parameter."""
    names = [name for name, _ in mf.named_parameters()]

    def marginals(v, *params):
        return tuple(functional_call(mf, dict(zip(names, params)), (v,), call)[first:])

    params = tuple(p.detach().clone().requires_grad_() for p in mf.parameters())
    return marginals, (v.clone().requires_grad_(), *params)


GRADIENT_CASES = [
    ("chain3", "colour"),
    ("skip", "colour"),
    ("hidden_lateral_chain", "colour"),
    ("chain3", "parallel"),
    ("hidden_lateral_chain", "parallel"),
]


@pytest.mark.parametrize("shape, update", GRADIENT_CASES)
@pytest.mark.parametrize("backward", ["implicit", "unroll"])
def test_gradients_pass_gradcheck(shape, update, backward):
    model = model_of(shape, seed=7)
    mf = el.MeanField(model, update=update, tol=1e-13, max_iter=1000, backward=backward)
    v = torch.rand(3, model.sizes[0], dtype=DTYPE, generator=torch.Generator().manual_seed(8))
    v = v.clamp(0.05, 0.95)  # means away from the ends of [0, 1], so finite differences stay inside
    function, inputs = gradient_inputs(mf, v)
    # torch.autograd.gradcheck: analytical against finite-difference Jacobians.
    assert torch.autograd.gradcheck(function, inputs, atol=1e-6, rtol=1e-4)


def gradients(mf: el.MeanField, v: torch.Tensor) -> list[torch.Tensor]:
    """Gradients of a fixed random linear function of the free marginals w.r.t. v and parameters."""
    v = v.clone().requires_grad_()
    marginals = mf(v)[1:]
    generator = torch.Generator().manual_seed(9)
    loss = sum((torch.randn(mu.shape, generator=generator, dtype=DTYPE) * mu).sum() for mu in marginals)
    inputs = [v, *mf.parameters()]
    return list(torch.autograd.grad(loss, inputs, allow_unused=True, materialize_grads=True))


@pytest.mark.parametrize("shape, update", GRADIENT_CASES)
def test_implicit_and_unrolled_gradients_agree(shape, update):
    model, v = model_of(shape, seed=11, scale=1.5), data(4, MODELS[shape][0])
    implicit = gradients(el.MeanField(model, update=update, tol=1e-13, max_iter=1000), v)
    unrolled = gradients(el.MeanField(model, update=update, tol=1e-13, max_iter=1000, backward="unroll"), v)
    for got, want in zip(implicit, unrolled):
        torch.testing.assert_close(got, want, rtol=1e-8, atol=1e-10)


def test_implicit_backward_converges_where_the_plain_adjoint_diverges():
    model, v = frustrated_triangle(), data(2, 2)
    mf = el.MeanField(model, update="parallel", damping=0.5, tol=1e-13, max_iter=1000)
    with torch.no_grad():
        star = mf(v)[1]
    assert mf.converged
    # The undamped map's Jacobian at the fixed point, one batch row: its spectral radius > 1, so the
    # plain adjoint iteration diverges there (mathematics), while the damped one's is < 1.
    lateral = model.couplings[1].weight.detach()
    slope = (star * (1 - star))[0]
    eigenvalues = torch.linalg.eigvals(slope[:, None] * lateral).real
    assert eigenvalues.min() < -1.1 and eigenvalues.max() < 1
    assert (0.5 + 0.5 * eigenvalues).abs().max() < 1
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # neither the forward nor the adjoint may warn
        function, inputs = gradient_inputs(mf, v.clamp(0.05, 0.95))
        # torch.autograd.gradcheck: analytical against finite-difference Jacobians.
        assert torch.autograd.gradcheck(function, inputs, atol=1e-6, rtol=1e-4)


def test_not_converged_falls_back_to_unrolling():
    model, v = inhibition_pair(), torch.zeros(1, 1, dtype=DTYPE)
    implicit = el.MeanField(model, update="parallel", damping=0.0, max_iter=30)
    with pytest.warns(RuntimeWarning) as caught:
        got = gradients(implicit, v)
    messages = [str(warning.message) for warning in caught]
    assert any("did not converge in max_iter=30" in m for m in messages)
    assert any("recomputing with the iterations unrolled" in m for m in messages)
    assert not implicit.converged
    with pytest.warns(RuntimeWarning, match="did not converge"):
        want = gradients(
            el.MeanField(model, update="parallel", damping=0.0, max_iter=30, backward="unroll"), v
        )
    for a, b in zip(got, want):
        torch.testing.assert_close(a, b, rtol=0, atol=0)


def peak_saved_bytes(run) -> int:
    """Peak bytes of tensors held by autograd graphs while ``run()`` builds and frees them.

    Saved-tensor hooks see every tensor a graph keeps for its backward, including the graphs the
    implicit backward builds inside the backward pass.
    """
    live, peak = [0], [0]

    class Held:
        def __init__(self, tensor: torch.Tensor) -> None:
            self.tensor, self.size = tensor, tensor.numel() * tensor.element_size()
            live[0] += self.size
            peak[0] = max(peak[0], live[0])

        def __del__(self) -> None:
            live[0] -= self.size

    with torch.autograd.graph.saved_tensors_hooks(Held, lambda held: held.tensor):
        run()
    return peak[0]


def test_implicit_backward_memory_does_not_grow_with_iterations():
    model = randomize(el.dbm(20, 30, 30, dtype=DTYPE), seed=12, scale=1.0)
    v = data(50, 20)
    peaks, iterations = {}, {}
    for backward in ("implicit", "unroll"):
        for tol in (1e-3, 1e-12):
            mf = el.MeanField(model, tol=tol, max_iter=1000, backward=backward)
            peaks[backward, tol] = peak_saved_bytes(lambda mf=mf: sum(x.sum() for x in mf(v)[1:]).backward())
            iterations[tol] = mf.iterations
    assert iterations[1e-12] > 2 * iterations[1e-3]
    assert peaks["implicit", 1e-12] == peaks["implicit", 1e-3]
    # Negative control: unrolled, memory grows with the iterations.
    assert peaks["unroll", 1e-12] > 2 * peaks["unroll", 1e-3] > 2 * peaks["implicit", 1e-12]


def test_no_grad_costs_nothing_extra(monkeypatch):
    model, v = model_of("chain3"), data(4, 4)
    calls = count_matrix_products(monkeypatch)
    with torch.no_grad():
        plain = el.MeanField(model, tol=1e-10)(v)
    without_graph = len(calls)
    calls.clear()
    tracked = el.MeanField(model, tol=1e-10)(v)
    # With a graph, the implicit backward records one more colour sweep: the input of the clamped
    # visible layer again (v @ W01), then the two classes (h1 @ W12 and h2 @ W12^T).
    assert len(calls) == without_graph + 3
    assert not any(mu.requires_grad for mu in plain) and tracked[1].requires_grad
    for a, b in zip(plain, tracked):
        torch.testing.assert_close(a, b.detach(), rtol=1e-6, atol=1e-6)


def test_bottom_up_initialisation():
    model, v = model_of("chain3"), data(3, 4)
    mf = el.MeanField(model, update="parallel", damping=0.5, init="bottom-up", max_iter=1)
    with pytest.warns(RuntimeWarning, match="did not converge"), torch.no_grad():
        marginals = mf(v)
    (b1, b2), (w01, w12) = [layer.bias for layer in model.layers[1:]], model.weights()
    # The bottom-up pass with doubled weights below the top (the recognition pass of "Efficient
    # Learning of Deep Boltzmann Machines", AISTATS 2010), then one half-damped parallel update.
    mu1 = torch.sigmoid(b1 + v @ (2 * w01))
    mu2 = torch.sigmoid(b2 + mu1 @ w12)
    torch.testing.assert_close(marginals[1], 0.5 * mu1 + 0.5 * torch.sigmoid(b1 + v @ w01 + mu2 @ w12.T))
    torch.testing.assert_close(marginals[2], 0.5 * mu2 + 0.5 * torch.sigmoid(b2 + mu1 @ w12))
    # The same pass as feedforward_network's (an invariant) ...
    network = el.feedforward_network(model, layers=[1, 2])
    torch.testing.assert_close(torch.cat([mu1, mu2], 1), network(v))
    # ... and not the plain one (negative control: the undoubled pass gives other marginals).
    plain1 = torch.sigmoid(b1 + v @ w01)
    assert not torch.allclose(marginals[1], 0.5 * plain1 + 0.5 * torch.sigmoid(b1 + v @ w01 + mu2 @ w12.T))


def test_statistics_are_the_pair_averages_of_the_marginals():
    model, v = model_of("hidden_lateral_chain"), data(6, 4)
    mf = el.MeanField(model, tol=1e-12)
    stats = mf.statistics(v)
    marginals = mf(v)
    assert sorted(stats) == sorted(name for name, _ in model.named_parameters())
    for i, mu in enumerate(marginals):
        torch.testing.assert_close(stats[f"layers.{i}.bias"], mu.mean(0).detach())
    for k, (a, b) in enumerate(model.edges):
        pair = (marginals[a].T @ marginals[b] / 6).detach()
        if a == b:  # a lateral statistic: the strict upper triangle (the free matrix's entries)
            torch.testing.assert_close(stats[f"couplings.{k}.parametrizations.weight.original"], pair.triu(1))
        else:
            torch.testing.assert_close(stats[f"couplings.{k}.weight"], pair)
    assert not any(x.requires_grad for x in stats.values())


def test_float32_model_and_repr():
    model = el.dbm(6, 4, 3, generator=torch.Generator().manual_seed(0))
    mf = el.MeanField(model, update="parallel", damping=0.3)
    marginals = mf(torch.ones(2, 6))
    assert all(mu.dtype == torch.float32 for mu in marginals) and mf.converged
    assert "update='parallel', damping=0.3" in repr(mf)
    assert "sizes=[6, 4, 3]" in repr(mf)


# (id, constructor keywords, exception type, fragment of the message)
CONSTRUCTOR_CASES = [
    ("update unknown", {"update": "random"}, ValueError, "update"),
    ("backward unknown", {"backward": "adjoint"}, ValueError, "backward"),
    ("damping negative", {"damping": -0.1}, ValueError, "damping"),
    ("damping one", {"damping": 1.0}, ValueError, "damping"),
    ("damping a string", {"damping": "0.5"}, TypeError, "damping"),
    ("tol zero", {"tol": 0.0}, ValueError, "tol"),
    ("tol negative", {"tol": -1e-5}, ValueError, "tol"),
    ("tol NaN", {"tol": float("nan")}, ValueError, "tol"),
    ("max_iter zero", {"max_iter": 0}, ValueError, "max_iter"),
    ("max_iter float", {"max_iter": 2.5}, TypeError, "max_iter"),
    ("init above one", {"init": 1.5}, ValueError, "init"),
    ("init unknown", {"init": "top-down"}, ValueError, "init"),
]


@pytest.mark.parametrize(
    "keywords, error, fragment",
    [case[1:] for case in CONSTRUCTOR_CASES],
    ids=[c[0] for c in CONSTRUCTOR_CASES],
)
def test_bad_constructor_arguments(keywords, error, fragment):
    with pytest.raises(error, match=fragment):
        el.MeanField(el.rbm(6, 4), **keywords)


def test_model_must_be_an_energy_model():
    with pytest.raises(TypeError, match="model"):
        el.MeanField(torch.nn.Linear(2, 2))


GOOD = torch.ones(2, 6)
CALL_CASES = [
    ("v wrong width", lambda mf: mf(torch.ones(2, 5)), ValueError, "v must have 6 columns"),
    ("v NaN", lambda mf: mf(torch.full((2, 6), float("nan"))), ValueError, "v holds"),
    ("v above one", lambda mf: mf(2 * GOOD), ValueError, r"v must lie in \[0, 1\]"),
    ("v wrong dtype", lambda mf: mf(GOOD.double()), TypeError, "v has dtype"),
    ("clamp unknown layer", lambda mf: mf(GOOD, {5: torch.ones(2, 3)}), ValueError, "clamp layer"),
    ("clamp layer 0", lambda mf: mf(GOOD, {0: GOOD}), ValueError, "layer 0"),
    ("clamp wrong width", lambda mf: mf(GOOD, {2: torch.ones(2, 4)}), ValueError, r"clamp\[2\]"),
    ("clamp wrong batch", lambda mf: mf(GOOD, {2: torch.ones(3, 3)}), ValueError, r"clamp\[2\]"),
    ("clamp NaN", lambda mf: mf(GOOD, {2: torch.full((2, 3), float("nan"))}), ValueError, r"clamp\[2\]"),
    ("clamp not a dict", lambda mf: mf(GOOD, [torch.ones(2, 3)]), TypeError, "clamp"),
    ("statistics: v wrong width", lambda mf: mf.statistics(torch.ones(2, 7)), ValueError, "v must"),
    ("missing not bool", lambda mf: mf(GOOD, missing=torch.zeros(2, 6)), TypeError, "missing must be a bool"),
    (
        "missing wrong shape",
        lambda mf: mf(GOOD, missing=torch.zeros(2, 5).bool()),
        ValueError,
        "missing must",
    ),
    (
        "NaN where not missing",
        lambda mf: mf(torch.full((2, 6), float("nan")), missing=torch.eye(2, 6).bool()),
        ValueError,
        "v holds",
    ),
]


@pytest.mark.parametrize(
    "call, error, fragment", [case[1:] for case in CALL_CASES], ids=[c[0] for c in CALL_CASES]
)
def test_bad_call_changes_nothing(call, error, fragment):
    mf = el.MeanField(el.dbm(6, 4, 3, generator=torch.Generator().manual_seed(0)))
    mf(GOOD)
    before, record = snapshot(mf), (mf.iterations, mf.converged, mf.residual)
    with pytest.raises(error, match=fragment):
        call(mf)
    assert_unchanged(mf, before)
    assert (mf.iterations, mf.converged, mf.residual) == record


@pytest.mark.parametrize("update", ["colour", "parallel"])
@pytest.mark.parametrize("shape", ["rbm", "chain3", "semi_restricted"])
def test_missing_visible_values_are_inferred(shape, update):
    sizes = {"semi_restricted": (5, 3)}.get(shape, MODELS.get(shape))
    model = randomize(build(shape, sizes), seed=13, scale=1.0)
    v = data(6, sizes[0])
    missing = torch.rand(v.shape, generator=torch.Generator().manual_seed(14)) < 0.4
    missing[0] = True  # a row with nothing observed
    mf = el.MeanField(model, update=update, tol=1e-11, max_iter=2000)
    marginals = mf(torch.where(missing, float("nan"), v), missing=missing)
    assert mf.converged
    assert torch.equal(marginals[0][~missing], v[~missing])
    # Mathematics: the fixed-point equation holds on the missing visible units and on every hidden
    # unit; the observed units are clamped.
    mu = stacked(marginals)
    bias = torch.cat([layer.bias.detach() for layer in model.layers]).numpy()
    gap = np.abs(expit(bias + mu @ interaction_matrix(model).detach().numpy()) - mu)
    free_units = np.concatenate([missing.numpy(), np.ones((6, sum(sizes[1:])), dtype=bool)], axis=1)
    assert gap[free_units].max() < 1e-10
    assert gap[~free_units].max() > 1e-3  # negative control: observed units are not at their own fixed point


def test_nothing_missing_is_plain_clamping():
    model, v = model_of("chain3"), data(4, 4)
    mf = el.MeanField(model, tol=1e-12)
    plain, masked = mf(v), mf(v, missing=torch.zeros(4, 4, dtype=torch.bool))
    for a, b in zip(plain, masked):
        torch.testing.assert_close(a, b, rtol=0, atol=0)


@pytest.mark.parametrize("backward", ["implicit", "unroll"])
def test_gradients_through_a_clamped_layer_pass_gradcheck(backward):
    model = model_of("chain4", seed=17)
    mf = el.MeanField(model, tol=1e-13, max_iter=1000, backward=backward)
    generator = torch.Generator().manual_seed(18)
    v = torch.rand(2, 3, dtype=DTYPE, generator=generator).clamp(0.05, 0.95).requires_grad_()
    top = torch.rand(2, 2, dtype=DTYPE, generator=generator).clamp(0.05, 0.95).requires_grad_()
    # torch.autograd.gradcheck: analytical against finite-difference Jacobians, in v and the clamped layer.
    assert torch.autograd.gradcheck(lambda v, top: tuple(mf(v, clamp={3: top})[1:3]), (v, top))


@pytest.mark.parametrize("backward", ["implicit", "unroll"])
def test_gradients_with_missing_values_pass_gradcheck(backward):
    model = model_of("chain3", seed=15)
    missing = torch.tensor([[True, False, False, True], [False, True, False, False]])
    mf = el.MeanField(model, tol=1e-13, max_iter=1000, backward=backward)
    v = torch.rand(2, 4, dtype=DTYPE, generator=torch.Generator().manual_seed(16)).clamp(0.05, 0.95)
    # Layer 0 included: its filled-in values depend on v and the parameters too.
    function, inputs = gradient_inputs(mf, v, first=0, missing=missing)
    # torch.autograd.gradcheck: analytical against finite-difference Jacobians.
    assert torch.autograd.gradcheck(function, inputs, atol=1e-6, rtol=1e-4)
