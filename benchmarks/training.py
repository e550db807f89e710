"""Training throughput: PCD-1 with TwoPhaseObjective + SGD against scikit-learn's BernoulliRBM.fit
doing the same work at the same precision, measured side by side in one run.

The same work: an RBM, one Gibbs sweep of as many persistent chains as the batch has rows per
update (BernoulliRBM keeps one chain per batch row), plain SGD, the same number of epochs, and the
same floating-point type on both sides: float32 data and a float32 model (scikit-learn keeps
float32 input in float32), then float64 for both as a second, labelled row. Our side is a plain
torch loop (``loss = objective(v); loss.backward(); optimizer.step()``) and ``fit`` with the same
objective and optimizer. Throughput in training examples per second; ratio = ours / theirs, the
median over ``--runs`` runs (the contenders alternating). Targets (float32): 784-500 on 10,000
random binary examples at batch 100, and the bundled 8x8 digits at 64-100, batch 10. A last
column times the same arithmetic written as a bare torch loop (gradients set by hand, the same
``torch.optim.SGD``, ``u < p`` draws): what eager torch and its optimizer cost without the library.

    python benchmarks/training.py [--epochs 2] [--digits-epochs 5] [--runs 3] [--threads 2]
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np
import torch
from sklearn.datasets import load_digits
from sklearn.neural_network import BernoulliRBM

import ebm_layers as el

LEARNING_RATE = 0.01


def ours(data: torch.Tensor, n_hidden: int, epochs: int, batch: int, with_fit: bool) -> float:
    """Seconds for ``epochs`` passes of PCD-1 + SGD over ``data`` (the model in ``data``'s dtype)."""
    g = torch.Generator().manual_seed(0)
    model = el.rbm(data.shape[1], n_hidden, generator=g).to(data.dtype)
    sampler = el.PersistentSampler(model, num_particles=batch, generator=g)
    objective = el.TwoPhaseObjective(model, el.MeanField(model), sampler)
    optimizer = torch.optim.SGD(model.parameters(), lr=LEARNING_RATE)
    start = time.perf_counter()
    if with_fit:
        el.fit(
            model,
            data,
            objective=objective,
            optimizer=optimizer,
            epochs=epochs,
            batch_size=batch,
            progress=False,
            generator=g,
        )
    else:
        for _ in range(epochs):
            for v in data[torch.randperm(len(data), generator=g)].split(batch):
                loss = objective(v)
                optimizer.zero_grad()
                loss.backward()
                optimizer.step()
    return time.perf_counter() - start


def plain(data: torch.Tensor, n_hidden: int, epochs: int, batch: int) -> float:
    """Seconds for the same epochs as a bare torch loop: no phases, no checks, no autograd."""
    g = torch.Generator().manual_seed(0)
    n_visible, dtype = data.shape[1], data.dtype
    weight = (0.01 * torch.randn(n_visible, n_hidden, generator=g)).to(dtype)
    visible_bias, hidden_bias = torch.zeros(n_visible, dtype=dtype), torch.zeros(n_hidden, dtype=dtype)
    optimizer = torch.optim.SGD([weight, visible_bias, hidden_bias], lr=LEARNING_RATE)
    fantasy = torch.zeros(batch, n_hidden, dtype=dtype)
    start = time.perf_counter()
    for _ in range(epochs):
        for v in data[torch.randperm(len(data), generator=g)].split(batch):
            hidden = torch.sigmoid(torch.addmm(hidden_bias, v, weight))
            visible = torch.sigmoid(torch.addmm(visible_bias, fantasy[: len(v)], weight.T))
            visible = (torch.rand(visible.shape, dtype=dtype, generator=g) < visible).to(dtype)
            fantasy = torch.sigmoid(torch.addmm(hidden_bias, visible, weight))
            fantasy = (torch.rand(fantasy.shape, dtype=dtype, generator=g) < fantasy).to(dtype)
            weight.grad = (visible.T @ fantasy - v.T @ hidden) / len(v)
            visible_bias.grad = visible.mean(0) - v.mean(0)
            hidden_bias.grad = fantasy.mean(0) - hidden.mean(0)
            optimizer.step()
    return time.perf_counter() - start


def theirs(data: np.ndarray, n_hidden: int, epochs: int, batch: int) -> float:
    rbm = BernoulliRBM(
        n_components=n_hidden, learning_rate=LEARNING_RATE, batch_size=batch, n_iter=epochs, random_state=0
    )
    start = time.perf_counter()
    rbm.fit(data)
    assert rbm.components_.dtype == data.dtype  # the same precision as ours
    return time.perf_counter() - start


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--epochs", type=int, default=2, help="epochs on the random examples")
    parser.add_argument("--digits-epochs", type=int, default=5)
    parser.add_argument("--runs", type=int, default=3, help="runs per row (median kept)")
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--examples", type=int, default=10_000, help="random examples for 784-500")
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    g = torch.Generator().manual_seed(1)
    random = torch.bernoulli(torch.full((args.examples, 784), 0.3), generator=g)
    digits = torch.from_numpy((load_digits().data >= 8).astype(np.float32))
    print(
        f"PCD-1, SGD {LEARNING_RATE}; torch {torch.__version__}, {args.threads} threads; examples per "
        f"second, medians of {args.runs} runs (each side warmed up by one untimed epoch)"
    )
    print(
        f"{'problem':>28}  {'dtype':>7}  {'scikit-learn':>12}  {'own loop':>9}  {'ratio':>5}  "
        f"{'fit':>9}  {'ratio':>5}  {'bare torch':>10}  {'ratio':>5}  target"
    )
    for name, data, n_hidden, epochs, batch, target in (
        (f"random {args.examples} x 784-500, b100", random, 500, args.epochs, 100, ">= 1.4"),
        (f"digits {len(digits)} x 64-100, b10", digits, 100, args.digits_epochs, 10, ">= 1"),
    ):
        for dtype in (torch.float32, torch.float64):
            rows = data.to(dtype)
            array = rows.numpy()
            examples = len(rows) * epochs
            theirs(array, n_hidden, 1, batch), ours(rows, n_hidden, 1, batch, with_fit=False)  # warm-up
            times: dict[str, list[float]] = {"theirs": [], "loop": [], "fit": [], "plain": []}
            for _ in range(args.runs):
                times["theirs"].append(theirs(array, n_hidden, epochs, batch))
                times["loop"].append(ours(rows, n_hidden, epochs, batch, with_fit=False))
                times["fit"].append(ours(rows, n_hidden, epochs, batch, with_fit=True))
                times["plain"].append(plain(rows, n_hidden, epochs, batch))
            rate = {key: examples / statistics.median(values) for key, values in times.items()}
            ratios = {
                key: statistics.median(t / o for t, o in zip(times["theirs"], times[key]))
                for key in ("loop", "fit", "plain")
            }
            label = "float32" if dtype == torch.float32 else "float64"
            goal = target if dtype == torch.float32 else "(second row)"
            print(
                f"{name:>28}  {label:>7}  {rate['theirs']:>12.0f}  {rate['loop']:>9.0f}  "
                f"{ratios['loop']:>5.2f}  {rate['fit']:>9.0f}  {ratios['fit']:>5.2f}  "
                f"{rate['plain']:>10.0f}  {ratios['plain']:>5.2f}  {goal}",
                flush=True,
            )


if __name__ == "__main__":
    main()
