"""Annealed importance sampling against exact log Z on models trained on scikit-learn's 8x8 digits
(binarised at >= 8, the split of benchmarks/digits_rbm.py): a 64-16 RBM and a 64-20-10 chain
(exact by enumerating the 2^20 states of its middle layer). For linear and piecewise schedules
("On the Quantitative Analysis of Deep Belief Networks", ICML 2008, spacing from memory) at
several numbers of intermediate distributions: error against the exact value, bracket width,
effective sample size and time, side by side; then the test log-likelihood from forward AIS
(high on average, with exact free energies) and reverse annealing (low on average) against the exact
value.

    python benchmarks/ais.py [--epochs 100] [--pretrain-epochs 30] [--betas 1000 10000] [--repeats 3]

With ``--speed`` it times instead AIS for a 784-500 RBM (random weights of a trained model's scale,
100 chains, ``max(--betas)`` intermediate distributions) against its minimal matrix products, two
per intermediate distribution (``v @ W`` serves both the weight and the next hidden draw, then
``h @ W.T``); target: at most 1.25x.
"""

from __future__ import annotations

import argparse
import statistics
import time
import warnings

import torch
from digits_rbm import digits

import ebm_layers as el
from ebm_layers.evaluation.partition import ais_log_partition, reverse_ais_log_likelihood
from ebm_layers.training.pretraining import DEFAULT_PRETRAIN_EPOCHS


@torch.no_grad()
def exact_log_z(model: el.EnergyModel) -> float:
    return float(el.exact_log_partition(model))


def compare_schedules(model, train, betas_list, repeats) -> float:
    exact = exact_log_z(model)
    print(f"exact log Z {exact:.4f}")
    print(
        f"{'schedule':<10}{'betas':>7}{'mean error':>12}{'max |error|':>12}"
        f"{'bracket':>9}{'ESS':>7}{'seconds':>9}"
    )
    default_seconds = 0.0
    for kind in ("linear", "piecewise"):
        for num_betas in betas_list:
            errors, widths, sizes, seconds = [], [], [], []
            for seed in range(repeats):
                start = time.perf_counter()
                estimate = ais_log_partition(
                    model,
                    num_betas=num_betas,
                    data=train,
                    schedule=kind,
                    generator=torch.Generator().manual_seed(seed),
                    progress=False,
                )
                seconds.append(time.perf_counter() - start)
                errors.append(estimate.log_z - exact)
                widths.append(estimate.upper - estimate.lower)
                sizes.append(estimate.effective_sample_size)
            if kind == "linear" and num_betas == 10_000:
                default_seconds = statistics.mean(seconds)
            print(
                f"{kind:<10}{num_betas:>7}{statistics.mean(errors):>12.4f}{max(map(abs, errors)):>12.4f}"
                f"{statistics.mean(widths):>9.4f}{statistics.mean(sizes):>7.1f}{statistics.mean(seconds):>9.2f}"
            )
    return default_seconds


def speed(num_betas: int) -> None:
    g = torch.Generator().manual_seed(0)
    model = el.rbm(784, 500, generator=g)
    with torch.no_grad():  # the scale of a trained model's parameters
        model.couplings[0].weight.normal_(0.0, 0.05, generator=g)
        model.layers[1].bias.fill_(-1.0)
    data = torch.bernoulli(torch.full((1000, 784), 0.2), generator=g)
    weight = model.couplings[0].weight.detach()
    v = torch.bernoulli(torch.full((100, 784), 0.2), generator=g)
    h = torch.bernoulli(torch.full((100, 500), 0.2), generator=g)

    def products():
        for _ in range(num_betas):
            torch.mm(v, weight)
            torch.mm(h, weight.T)

    start = time.perf_counter()
    products()
    roofline = time.perf_counter() - start
    start = time.perf_counter()
    ais_log_partition(model, num_chains=100, num_betas=num_betas, data=data, progress=False, generator=g)
    seconds = time.perf_counter() - start
    print(
        f"RBM 784-500, 100 chains, {num_betas:,} betas; "
        f"torch {torch.__version__}, {torch.get_num_threads()} threads"
    )
    print(f"{'products s':>10}  {'AIS s':>7}  {'AIS / products':>14}  target")
    print(f"{roofline:>10.2f}  {seconds:>7.2f}  {seconds / roofline:>14.2f}  <= 1.25")


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--epochs", type=int, default=100)
    parser.add_argument(
        "--pretrain-epochs", type=int, default=DEFAULT_PRETRAIN_EPOCHS, help="per RBM of the chain"
    )
    parser.add_argument("--betas", type=int, nargs="+", default=[1000, 10_000])
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--speed", action="store_true", help="time a 784-500 RBM against its products")
    args = parser.parse_args()
    warnings.simplefilter("ignore", UserWarning)  # constant pixels are clipped in the base rates
    if args.speed:
        speed(max(args.betas))
        return
    train, test = digits()
    print(
        f"torch {torch.__version__}, {torch.get_num_threads()} threads; 100 chains; {args.repeats} seeds each"
    )
    for sizes in ((64, 16), (64, 20, 10)):
        g = torch.Generator().manual_seed(0)
        model = el.dbm(*sizes, generator=g)
        pretrain_epochs = args.pretrain_epochs if len(sizes) > 2 else None  # an RBM is not pretrained
        el.fit(model, train, epochs=args.epochs, pretrain_epochs=pretrain_epochs, progress=False, generator=g)
        pretraining = "" if pretrain_epochs is None else f" after {pretrain_epochs} pretraining epochs/RBM"
        print(f"\nmodel {list(sizes)} trained {args.epochs} epochs{pretraining}, else with fit's defaults")
        seconds = compare_schedules(model, train, args.betas, args.repeats)
        if seconds:
            print(f"default settings (linear, 10,000 betas, 100 chains): {seconds:.1f} s")
        if len(sizes) == 2:
            exact = float(el.exact_log_likelihood(model, test).mean())
            num_betas = max(args.betas)
            estimate = ais_log_partition(model, num_betas=num_betas, data=train, progress=False)
            forward = float((-model.free_energy(test, dtype=torch.float64)).mean()) - estimate.log_z
            start = time.perf_counter()
            reverse = float(
                reverse_ais_log_likelihood(
                    model, test, num_betas=num_betas, data=train, progress=False
                ).mean()
            )
            seconds = time.perf_counter() - start
            print(
                f"test log-likelihood: exact {exact:.4f}, forward AIS (high on average) {forward:.4f}, "
                f"reverse (low on average) {reverse:.4f}; gap {forward - reverse:.4f} nats "
                f"({num_betas:,} betas, reverse over {len(test)} examples took {seconds:.1f} s)"
            )


if __name__ == "__main__":
    main()
