"""The fast Bernoulli draw behind every Gibbs update: exact probabilities, independent units.

Sources of the checks: binomial z-scores of draw counts (mathematics); Pearson's chi-square test
of independence on 2x2 tables, ``scipy.stats.chi2_contingency``; the grid of torch's uniform
draws is checked directly, since the exactness argument rests on it. The draws are checked on both
paths: the native Philox kernel (when a C compiler is present) and torch's own generator.
"""

from __future__ import annotations

import pytest
import torch
from scipy.stats import chi2_contingency

from ebm_layers.model import functional as F
from ebm_layers.model import native
from ebm_layers.model.functional import UNIFORM_GRID, _count, bernoulli_from_uniforms

Z_BOUND = 4.5


@pytest.fixture(params=["native", "torch"])
def draw_path(request, monkeypatch):
    """Run a test on the native kernel's path and on torch's own uniforms."""
    if request.param == "torch":
        monkeypatch.setenv("EBM_LAYERS_NATIVE", "0")
    else:
        request.getfixturevalue("native_kernel")
    return request.param


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_uniform_draws_lie_on_the_assumed_grid(dtype):
    u = torch.empty(1_000_000, dtype=dtype).uniform_(generator=torch.Generator().manual_seed(0))
    scaled = u / UNIFORM_GRID[dtype]
    assert bool((scaled == scaled.floor()).all()) and float(u.max()) < 1.0 and float(u.min()) >= 0.0


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_draws_have_the_right_mean_across_the_unit_interval(dtype, draw_path):
    g = torch.Generator().manual_seed(1)
    p = torch.tensor([0.0, 1e-3, 0.01, 0.1, 0.25, 0.5, 0.7, 0.9, 0.999, 1.0], dtype=dtype)
    draws = F.sample_bernoulli(p.expand(200_000, -1).contiguous(), g)
    assert draws.dtype == dtype and set(draws.unique().tolist()) <= {0.0, 1.0}
    mean = draws.mean(0)
    error = (p * (1 - p) / len(draws)).sqrt()
    inner = (p > 0) & (p < 1)
    z = ((mean - p)[inner] / error[inner]).abs()
    assert float(z.max()) < Z_BOUND, z
    assert mean[0] == 0.0 and mean[-1] == 1.0


def test_probabilities_below_the_grid_are_drawn_exactly():
    # p far below float32's uniform grid (2^-24): a plain `u < p` would give exactly p(on) = 2^-24
    # for every such p. The exact draw turns units on only in the grid cell [0, 2^-24), and there
    # with probability p / 2^-24; conditioned on that cell (u = 0) the rate must be that fraction.
    g = torch.Generator().manual_seed(2)
    grid = UNIFORM_GRID[torch.float32]
    for p in (2.0**-30, 1e-12, 1e-40):  # 1e-40 is subnormal in float32
        probabilities = torch.full((400_000,), p, dtype=torch.float32)
        on = bernoulli_from_uniforms(probabilities, torch.zeros_like(probabilities), g)  # every u in p's cell
        fraction = torch.tensor(p, dtype=torch.float32).double() / grid
        expected = float(fraction) * len(on)
        assert abs(float(on.sum()) - expected) < Z_BOUND * max(expected, 1.0) ** 0.5 + 1
    # In the cell of a probability on the grid's scale: p = (3 + 0.25) * 2^-24.
    p = torch.full((400_000,), 3.25 * grid)
    for k, rate in ((0, 1.0), (2, 1.0), (3, 0.25), (4, 0.0), (1000, 0.0)):
        on = bernoulli_from_uniforms(p, torch.full_like(p, k * grid), g)
        error = (rate * (1 - rate) / len(on)) ** 0.5
        assert abs(float(on.mean()) - rate) <= Z_BOUND * error + 1e-12, (k, float(on.mean()))
    # Negative control: the plain comparison turns the cell's units always on.
    assert float((torch.full_like(p, 3 * grid) < p).float().mean()) == 1.0


def chi_square_p(a: torch.Tensor, b: torch.Tensor) -> float:
    table = [[int(((a == i) & (b == j)).sum()) for j in (0, 1)] for i in (0, 1)]
    return chi2_contingency(table).pvalue


def test_units_and_successive_draws_are_independent(draw_path):
    g = torch.Generator().manual_seed(3)
    p = torch.tensor([0.3, 0.5, 0.8, 0.5])
    first = F.sample_bernoulli(p.expand(100_000, -1).contiguous(), g)
    second = F.sample_bernoulli(p.expand(100_000, -1).contiguous(), g)
    p_values = [chi_square_p(first[:, i], first[:, j]) for i in range(4) for j in range(i + 1, 4)]
    p_values += [chi_square_p(first[:, i], second[:, i]) for i in range(4)]  # successive draws
    p_values += [chi_square_p(first[:-1, 0], first[1:, 0])]  # neighbouring rows
    assert min(p_values) > 1e-4, p_values  # 11 tests: a false alarm has probability about 1e-3
    # Negative control: one uniform shared by a row's units makes them dependent.
    u = torch.rand(100_000, 1, generator=g).expand(-1, 4)
    shared = (u < p).float()
    assert chi_square_p(shared[:, 0], shared[:, 1]) < 1e-10


def test_draws_follow_the_generator(draw_path):
    p = torch.rand(50, 20, generator=torch.Generator().manual_seed(4))
    a = F.sample_bernoulli(p, torch.Generator().manual_seed(5))
    b = F.sample_bernoulli(p, torch.Generator().manual_seed(5))
    c = F.sample_bernoulli(p, torch.Generator().manual_seed(6))
    assert torch.equal(a, b) and not torch.equal(a, c)
    assert torch.equal(p, torch.rand(50, 20, generator=torch.Generator().manual_seed(4)))  # input untouched


def test_large_draws_do_not_depend_on_the_number_of_threads(draw_path):
    # torch's path splits draws of 2^17 units or more between two threads; the numbers must not change.
    p = torch.full((400, 1000), 0.5)
    threads = torch.get_num_threads()
    try:
        torch.set_num_threads(1)
        one = F.sample_bernoulli(p, torch.Generator().manual_seed(7))
        torch.set_num_threads(2)
        two = F.sample_bernoulli(p, torch.Generator().manual_seed(7))
    finally:
        torch.set_num_threads(threads)
    assert torch.equal(one, two)
    halves = one.view(-1).chunk(2)  # the halves come from different generators (or stream parts): not copies
    assert not torch.equal(*halves) and abs(float(halves[0].mean()) - float(halves[1].mean())) < 0.01


def test_uniform_blocks_hand_out_one_draw_in_order(monkeypatch):
    monkeypatch.setenv("EBM_LAYERS_NATIVE", "0")  # torch's path: blocks of torch's uniforms
    g = torch.Generator().manual_seed(8)
    uniforms = F.Uniforms(g, torch.float32, block_size=10)
    parts = [uniforms.take((2, 3)), uniforms.take((4,))]
    whole = torch.empty(10).uniform_(generator=torch.Generator().manual_seed(8))
    assert torch.equal(torch.cat([parts[0].reshape(-1), parts[1]]), whole)
    # The block is exhausted: the next request draws a new one (large enough for it).
    big = uniforms.take((25,))
    assert big.shape == (25,) and not torch.equal(big[:10], whole)
    # A float64 request from a float32 block draws its own uniforms from the same generator.
    draws = F.sample_bernoulli(torch.full((3,), 0.5, dtype=torch.float64), uniforms)
    assert draws.dtype == torch.float64


def test_native_blocks_hand_out_one_stream_in_order(native_kernel):
    uniforms = F.Uniforms(torch.Generator().manual_seed(8), torch.float32, block_size=10)
    parts = [uniforms.take((2, 3)), uniforms.take((4,)), uniforms.take((25,))]
    key = F.stream_key(torch.Generator().manual_seed(8))  # one number of the generator keys the stream
    whole = native.fill_uniforms(torch.empty(35), key, 0)
    assert torch.equal(torch.cat([part.reshape(-1) for part in parts]), whole)
    # A fused draw takes its place in the same stream without storing the uniforms.
    p = torch.rand(7, generator=torch.Generator().manual_seed(0))
    on = F.sample_bernoulli(p, uniforms)
    assert torch.equal(on, (p - native.fill_uniforms(torch.empty(7), key, 35) > 0).float())


def test_native_draws_decide_the_grid_cell_exactly(native_kernel):
    # The fused kernel only counts the units whose uniform fell in their probability's grid cell;
    # sample_bernoulli must then decide those with probability (p - u) / grid, as the torch path does.
    grid = UNIFORM_GRID[torch.float32]
    u = native.fill_uniforms(torch.empty(400_000), F.stream_key(torch.Generator().manual_seed(12)), 0)
    in_cell = u < 0.25  # there p = u + grid / 4 is representable, in u's cell
    p = torch.where(in_cell, u + grid / 4, 1.0)  # elsewhere always on
    on = F.sample_bernoulli(p, torch.Generator().manual_seed(12))
    assert bool((on[~in_cell] == 1).all())
    rate, count = float(on[in_cell].mean()), int(in_cell.sum())
    assert abs(rate - 0.25) < Z_BOUND * (0.25 * 0.75 / count) ** 0.5, rate
    # Negative control: the kernel's own comparison leaves every cell unit off.
    plain = torch.empty_like(p)
    assert native.bernoulli(p, plain, F.stream_key(torch.Generator().manual_seed(12)), 0) == count
    assert float(plain[in_cell].sum()) == 0.0


def test_a_sweep_is_reproducible_from_the_generator_state(draw_path):
    import ebm_layers as el

    model = el.dbm(6, 5, 4, generator=torch.Generator().manual_seed(9))
    runs = []
    for seed in (10, 10, 11):
        states = [torch.zeros(3, n) for n in model.sizes]
        el.phases.gibbs.gibbs_sweep(model, states, torch.Generator().manual_seed(seed))
        runs.append(torch.cat(states, dim=1))
    assert torch.equal(runs[0], runs[1]) and not torch.equal(runs[0], runs[2])


def test_counts_of_large_zero_one_tensors_are_exact():
    # Float32 sums are exact below 2^24 terms (IEEE 754 single precision, from memory); larger
    # tensors are counted in parts, so the count stays exact past 2^24 ones.
    ones = torch.ones(2**24 + 5)
    ones[7] = 0.0
    assert _count(ones) == 2**24 + 4
    assert _count(torch.tensor([0.0, 1.0, 1.0])) == 2
