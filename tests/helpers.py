"""Helpers shared by the tests that are not ground truth: snapshots of a module's state, seeded
data, comparison tolerances, the small models several files build, and new processes that start
without re-importing torch (scripts, distributed ranks). The ground truth itself is in
``tests/reference.py``; the fixtures are in ``tests/conftest.py``.
"""

from __future__ import annotations

import itertools
import math
import multiprocessing
import os
import runpy
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import torch
from torch import Tensor

import ebm_layers as el
from tests.reference import build, randomize

F64 = torch.float64

# Library and reference both compute in float64, so they may differ by rounding only.
RTOL, ATOL = 1e-9, 1e-12


def snapshot(module: torch.nn.Module) -> dict[str, torch.Tensor]:
    """A detached copy of every parameter and buffer, to check that a rejected call changed nothing."""
    return {name: value.detach().clone() for name, value in module.state_dict().items()}


def assert_unchanged(module: torch.nn.Module, before: dict[str, torch.Tensor]) -> None:
    after = module.state_dict()
    assert after.keys() == before.keys()
    for name, value in before.items():
        assert torch.equal(after[name], value), f"{name} was modified"


def assert_close(actual: Tensor, expected: Tensor, rtol: float = RTOL, atol: float = ATOL) -> None:
    torch.testing.assert_close(actual.detach(), expected.detach(), rtol=rtol, atol=atol)


def assert_all_close(actual: list[Tensor], expected: list[Tensor]) -> None:
    assert len(actual) == len(expected)
    for got, want in zip(actual, expected):
        assert_close(got, want)


def close(actual: Tensor, expected: Tensor) -> bool:
    """The tolerance of ``assert_close``, as a bool for negative controls."""
    return torch.allclose(actual.detach(), expected.detach(), rtol=RTOL, atol=ATOL)


def seeded(seed: int) -> torch.Generator:
    return torch.Generator().manual_seed(seed)


def binary(shape: tuple[int, ...], seed: int, p: float = 0.5, dtype: torch.dtype = F64) -> Tensor:
    """Bernoulli(p) draws of ``shape`` from a generator seeded ``seed``."""
    return torch.bernoulli(torch.full(shape, p, dtype=dtype), generator=seeded(seed))


def binarised_digits() -> tuple[np.ndarray, np.ndarray]:
    """scikit-learn's bundled 8x8 digits (``sklearn.datasets.load_digits``), pixels binarised at
    >= 8, as float32, with their labels."""
    from sklearn.datasets import load_digits

    x, y = load_digits(return_X_y=True)
    return (x >= 8).astype(np.float32), y


def make_lateral_model() -> el.EnergyModel:
    """Visible layer with lateral couplings, two hidden layers attached to it (closed-form F(v))."""
    return el.EnergyModel(
        layers=[el.BinaryLayer(5), el.BinaryLayer(3), el.BinaryLayer(2)],
        couplings=[el.DenseCoupling(0, 1, 5, 3), el.LateralCoupling(0, 5), el.DenseCoupling(2, 0, 2, 5)],
    )


def closed_form_models() -> dict[str, el.EnergyModel]:
    """Float64 models with a closed-form F(v), parameters from N(0, 1)."""
    lateral = make_lateral_model().double()
    return {
        "rbm": randomize(build("rbm", (5, 3)), seed=0, scale=1.0),
        "visible_lateral": randomize(lateral, seed=1, scale=1.0),
    }


def objective_gradient(objective: el.TwoPhaseObjective, v: Tensor) -> list[Tensor]:
    """The gradient of ``objective(v)`` for every parameter of its model, in ``parameters()`` order."""
    model = objective.model
    model.zero_grad()
    objective(v).backward()
    return [p.grad.clone() for p in model.parameters()]


# ---------------------------------------------------------------------------------------------
# Fresh processes without paying for the imports each time.

# Imported once by the fork server; every process forked from it starts with them in place.
PRELOADED = [
    "torch",
    "ebm_layers",
    "numpy",
    "pytest",
    "tests.helpers",
    "sklearn.datasets",
    "sklearn.linear_model",
    "sklearn.model_selection",
    "matplotlib.figure",
]


def forkserver() -> multiprocessing.context.BaseContext:
    """The ``forkserver`` start method, its server preloading ``PRELOADED``.

    A new process spends about 1.5 s importing torch and the library (1 s more for scikit-learn)
    before it does anything; a process forked from the server starts with them imported. The
    server itself only imports, it never runs a torch operation, so no thread pool exists yet
    when it forks: each child starts its own, as a fresh interpreter would. Call this before the
    first process starts (the server is started once per test session, with the preload list it
    is given then).
    """
    context = multiprocessing.get_context("forkserver")
    context.set_forkserver_preload(PRELOADED)
    return context


def _run_script(path: str, arguments: list[str], cwd: str | None, stdout: str, stderr: str) -> None:
    """In the child: set up what ``python path arguments...`` would, then run the script."""
    for fd, name in ((1, stdout), (2, stderr)):
        handle = os.open(name, os.O_WRONLY | os.O_CREAT | os.O_TRUNC)
        os.dup2(handle, fd)
        os.close(handle)
    if cwd is not None:
        os.chdir(cwd)
    sys.argv = [path, *arguments]
    # As python sets it: the script's folder first, and not the repository (on the test run's path only).
    root = str(Path(__file__).resolve().parents[1])
    sys.path[:] = [os.path.dirname(os.path.abspath(path))] + [
        entry for entry in sys.path if entry and os.path.abspath(entry) != root
    ]
    runpy.run_path(path, run_name="__main__")  # an exception: traceback on stderr, exit code 1


def run_script(
    path: str | Path, *arguments: str, cwd: str | Path | None = None, timeout: float = 120.0
) -> subprocess.CompletedProcess:
    """Run a script as ``python path arguments...`` would, in a new process forked from the
    preloaded server (``forkserver``): its own ``sys.argv``, its folder first on ``sys.path``,
    ``cwd`` as working directory, ``__name__ == "__main__"``. Returns the exit code and the
    captured stdout and stderr like ``subprocess.run(..., capture_output=True, text=True)``;
    raises ``subprocess.TimeoutExpired`` (after killing the process) past ``timeout`` seconds.
    """
    command = [sys.executable, str(path), *arguments]
    with tempfile.TemporaryDirectory() as folder:
        stdout, stderr = Path(folder, "stdout"), Path(folder, "stderr")
        process = forkserver().Process(
            target=_run_script,
            args=(str(path), list(arguments), None if cwd is None else str(cwd), str(stdout), str(stderr)),
        )
        process.start()
        process.join(timeout)
        if process.exitcode is None:
            process.kill()
            process.join()
            raise subprocess.TimeoutExpired(command, timeout, stdout.read_text(), stderr.read_text())
        return subprocess.CompletedProcess(command, process.exitcode, stdout.read_text(), stderr.read_text())


# ---------------------------------------------------------------------------------------------
# Monte Carlo comparisons of sampled states with an exact distribution.


def state_frequencies(samples: Tensor, table: Tensor) -> Tensor:
    """The share of the rows of ``samples`` ``(count, N)`` equal to each row of ``table`` ``(S, N)``
    (distinct rows of 0/1 values): ``(S,)`` float64; ``AssertionError`` if a sample is not in it."""
    powers = 2.0 ** torch.arange(table.shape[1], dtype=F64)
    codes, known = samples.to(F64) @ powers, table.to(F64) @ powers
    order = torch.argsort(known)
    position = torch.searchsorted(known[order], codes).clamp(max=len(known) - 1)
    assert torch.equal(known[order][position], codes), "a sample is not among the listed states"
    return torch.bincount(order[position], minlength=len(table)).to(F64) / len(samples)


def expected_total_variation(p: Tensor, count: int) -> float:
    """Expected total variation between ``count`` exact draws from ``p`` and ``p`` itself:
    ``sum sqrt(2 p (1 - p) / (pi count)) / 2`` (the mean absolute deviation of each share, normal
    approximation; from memory)."""
    p = p.to(F64)
    return float(torch.sqrt(2 * p * (1 - p) / (math.pi * count)).sum() / 2)


def total_variation(p: Tensor, q: Tensor) -> float:
    return 0.5 * float((p.to(F64) - q.to(F64)).abs().sum())


# ---------------------------------------------------------------------------------------------
# A 3 x 3 lattice of binary units (a masked lateral coupling): exact distribution and one sweep.


def lattice_mask(rows: int, columns: int) -> Tensor:
    """Nearest neighbours on a ``rows`` x ``columns`` grid (no wrap-around), units in row order."""
    n = rows * columns
    mask = torch.zeros(n, n, dtype=torch.bool)
    for r, c in itertools.product(range(rows), range(columns)):
        unit = r * columns + c
        if c + 1 < columns:
            mask[unit, unit + 1] = mask[unit + 1, unit] = True
        if r + 1 < rows:
            mask[unit, unit + columns] = mask[unit + columns, unit] = True
    return mask


def lattice_states() -> Tensor:
    """Every state of a 3 x 3 lattice, ``(512, 9)``, in ``itertools.product`` order."""
    return torch.tensor(list(itertools.product((0.0, 1.0), repeat=9)), dtype=F64)


def lattice_probabilities(model: el.EnergyModel) -> Tensor:
    """Exact probabilities of the 512 states from ``b.x + sum over lattice edges w_ij x_i x_j``
    written out edge by edge (mathematics)."""
    x = lattice_states()
    weight = model.couplings[0].weight.detach()
    mask = lattice_mask(3, 3)
    log_f = x @ model.layers[0].bias.detach()
    for i, j in zip(*torch.nonzero(torch.triu(mask, 1), as_tuple=True)):
        log_f = log_f + weight[i, j] * x[:, i] * x[:, j]
    return torch.softmax(log_f, 0)


def total_variation_after_one_sweep(model: el.EnergyModel, count: int, seed: int) -> tuple[float, float]:
    """Chains started at exact draws, one sweep: total variation to the exact distribution, and
    the expected total variation of ``count`` exact draws (normal approximation, from memory)."""
    p = lattice_probabilities(model)
    g = torch.Generator().manual_seed(seed)
    sampler = el.PersistentSampler(model, num_particles=count, generator=g)
    sampler.particles_0 = lattice_states()[torch.multinomial(p, count, replacement=True, generator=g)]
    after = sampler()[0]
    codes = (after.long() * (2 ** torch.arange(8, -1, -1))).sum(1)  # itertools.product order
    frequencies = torch.bincount(codes, minlength=512).to(F64) / count
    return total_variation(frequencies, p), expected_total_variation(p, count)
