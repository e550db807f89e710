"""Training throughput: PCD-1 with TwoPhaseObjective + SGD against scikit-learn's BernoulliRBM.fit
doing the same work, measured side by side in one run.

The same work: an RBM, batches of 100, one Gibbs sweep of as many persistent chains per update
(BernoulliRBM keeps one chain per batch row), plain SGD, the same number of epochs. Our side is a
plain torch loop (``loss = objective(v); loss.backward(); optimizer.step()``) and ``fit`` with the
same objective and optimizer. Throughput in training examples per second; ratio = ours / theirs.
Targets: at least 2x for 784-500 on 10,000 random binary examples, at least 1x on the bundled 8x8
digits at 64-100.

    python benchmarks/training.py [--epochs 2] [--digits-epochs 20] [--threads 2]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import torch
from sklearn.datasets import load_digits
from sklearn.neural_network import BernoulliRBM

import ebm_layers as el

BATCH, LEARNING_RATE = 100, 0.01


def ours(data: torch.Tensor, n_hidden: int, epochs: int, with_fit: bool) -> float:
    """Seconds for ``epochs`` passes of PCD-1 + SGD over ``data``."""
    g = torch.Generator().manual_seed(0)
    model = el.rbm(data.shape[1], n_hidden, generator=g)
    sampler = el.PersistentSampler(model, num_particles=BATCH, generator=g)
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
            batch_size=BATCH,
            progress=False,
            generator=g,
        )
    else:
        for _ in range(epochs):
            for v in data[torch.randperm(len(data), generator=g)].split(BATCH):
                loss = objective(v)
                optimizer.zero_grad()
                loss.backward()
                optimizer.step()
    return time.perf_counter() - start


def theirs(data: np.ndarray, n_hidden: int, epochs: int) -> float:
    rbm = BernoulliRBM(
        n_components=n_hidden, learning_rate=LEARNING_RATE, batch_size=BATCH, n_iter=epochs, random_state=0
    )
    start = time.perf_counter()
    rbm.fit(data)
    return time.perf_counter() - start


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--epochs", type=int, default=2, help="epochs on the random examples")
    parser.add_argument("--digits-epochs", type=int, default=20)
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--examples", type=int, default=10_000, help="random examples for 784-500")
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    g = torch.Generator().manual_seed(1)
    random = torch.bernoulli(torch.full((args.examples, 784), 0.3), generator=g)
    digits = torch.from_numpy((load_digits().data >= 8).astype(np.float32))
    print(
        f"PCD-1, batch {BATCH}, SGD {LEARNING_RATE}; torch {torch.__version__}, {args.threads} threads; "
        "examples per second (each side warmed up by one untimed epoch)"
    )
    print(
        f"{'problem':>22}  {'scikit-learn':>12}  {'own loop':>9}  {'ratio':>5}  "
        f"{'fit':>9}  {'ratio':>5}  target"
    )
    for name, data, n_hidden, epochs, target in (
        (f"random {args.examples} x 784-500", random, 500, args.epochs, 2.0),
        (f"digits {len(digits)} x 64-100", digits, 100, args.digits_epochs, 1.0),
    ):
        examples, array = len(data) * epochs, data.numpy().astype(np.float64)
        theirs(array, n_hidden, 1), ours(data, n_hidden, 1, with_fit=False)  # warm-up
        reference = examples / theirs(array, n_hidden, epochs)
        loop = examples / ours(data, n_hidden, epochs, with_fit=False)
        fitted = examples / ours(data, n_hidden, epochs, with_fit=True)
        print(
            f"{name:>22}  {reference:>12.0f}  {loop:>9.0f}  {loop / reference:>5.2f}  {fitted:>9.0f}  "
            f"{fitted / reference:>5.2f}  >= {target:g}",
            flush=True,
        )


if __name__ == "__main__":
    main()
