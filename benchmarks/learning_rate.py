"""Mode coverage against the learning rate, on the demo data.

The demo's trained chain puts too little mass on some marking types: its own samples miss them,
while the persistent particles during training did not. This script measures how much of that
follows from the learning rate. On the demo data (synthetic marking scans,
``ebm_layers.datasets``) it trains, for every rate and seed,

- an RBM 144-200 with ``fit`` for ``--epochs`` passes, Adam starting at the rate (the default
  optimizer and its linear decay, ``el.default_optimizer``), and
- a chain 144-200-100 pretrained with ``pretrain(learning_rate=rate)``, then trained jointly with
  ``fit`` for ``--epochs`` passes (Adam at ``--joint-rate``, default fit's 0.001, decayed linearly),

and reports the total variation between the data's type shares and those of 1000 samples drawn
after ``--burn-in`` plain Gibbs sweeps from random states (mode = nearest marking template; for
the chain also right after pretraining), and the test log-likelihood in nats per scan: the
forward-AIS estimate (high on average for the RBM, error of unknown sign for the chain) and
reverse AIS (usually low); neither is a bound.

    python benchmarks/learning_rate.py [--models rbm chain] [--rates 0.01 0.003 0.001] [--seeds 0 1 2]

About 25 s per RBM run and 2 minutes per chain run on 2 cores.
"""

from __future__ import annotations

import argparse
import statistics
import time

import torch

import ebm_layers as el
from ebm_layers.datasets import MARKING_TYPES, marking_templates, parts_markings

ASSIGN = el.nearest_template(marking_templates())  # mode = the nearest marking type's template


def sample_distance(model: el.EnergyModel, test: torch.Tensor, burn_in: int, seed: int) -> float:
    """Total variation between the test scans' type shares and those of the model's samples."""
    sampler = el.PersistentSampler(model, num_particles=1000, generator=torch.Generator().manual_seed(seed))
    samples = sampler.sample(1000, burn_in=burn_in, progress=False)[0]
    return el.mode_occupancy(samples, ASSIGN, data=test, names=MARKING_TYPES).total_variation


def run(kind: str, rate: float, seed: int, args) -> dict:
    g = torch.Generator().manual_seed(seed)
    images, _ = parts_markings(args.examples + args.test_examples, generator=g)
    train, test = images[: args.examples], images[args.examples :]
    row = {"model": kind, "rate": rate, "seed": seed}
    began = time.perf_counter()
    if kind == "rbm":
        model = el.rbm(144, 200, generator=g)
        optimizer, scheduler = el.default_optimizer(model, args.epochs, rate)
        el.fit(model, train, epochs=args.epochs, optimizer=optimizer, scheduler=scheduler,
               progress=False, generator=g)  # fmt: skip
    else:
        model = el.dbm(144, 200, 100, generator=g)
        el.pretrain(
            model, train, epochs=args.pretrain_epochs, learning_rate=rate, progress=False, generator=g
        )
        row["pretrained"] = sample_distance(model, test, args.burn_in, seed + 1)
        optimizer, scheduler = el.default_optimizer(model, args.epochs, args.joint_rate)
        el.fit(model, train, epochs=args.epochs, optimizer=optimizer, scheduler=scheduler, pretrain_epochs=0,
               progress=False, generator=g)  # fmt: skip
    row["seconds"] = time.perf_counter() - began
    row["distance"] = sample_distance(model, test, args.burn_in, seed + 1)
    report = el.evaluate(model, train, test=test, num_betas=args.betas, progress=False,
                         generator=torch.Generator().manual_seed(seed + 2))  # fmt: skip
    test_metrics = report.test  # an RBM's log-likelihood uses the exact free energy: no importance step
    importance = test_metrics.importance_log_likelihood
    row["estimate"] = test_metrics.log_likelihood if importance is None else importance
    row["conservative"] = test_metrics.conservative_log_likelihood
    return row


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--models", nargs="+", choices=["rbm", "chain"], default=["rbm", "chain"])
    parser.add_argument("--rates", type=float, nargs="+", default=[0.01, 0.003, 0.001],
                        help="Adam starting rates: the RBM's, or the chain's pretraining RBMs'")  # fmt: skip
    parser.add_argument("--seeds", type=int, nargs="+", default=[0, 1, 2], help="seeds of data and model")
    parser.add_argument("--epochs", type=int, default=40, help="training passes (the chain: joint)")
    parser.add_argument("--joint-rate", type=float, default=None, help="the chain's joint Adam rate (fit's)")
    parser.add_argument(
        "--pretrain-epochs", type=int, default=el.training.pretraining.DEFAULT_PRETRAIN_EPOCHS
    )
    parser.add_argument("--examples", type=int, default=3000)
    parser.add_argument("--test-examples", type=int, default=1000)
    parser.add_argument("--burn-in", type=int, default=2000, help="Gibbs sweeps before the samples")
    parser.add_argument("--betas", type=int, default=3000, help="AIS intermediate distributions")
    args = parser.parse_args()
    started = time.perf_counter()
    print(f"demo data: {args.examples} training and {args.test_examples} test scans; {args.epochs} epochs")
    print(
        f"torch {torch.__version__}, {torch.get_num_threads()} threads; log-likelihoods in nats per test scan"
    )
    print("distance: total variation between the test scans' and 1000 samples' marking-type shares")
    print(f"{'model':<6} {'rate':>6} {'seed':>4} {'pretrained':>10} {'distance':>8} {'estimate':>9} "
          f"{'reverse AIS':>12} {'s':>5}")  # fmt: skip
    rows = []
    for kind in args.models:
        for rate in args.rates:
            for seed in args.seeds:
                row = run(kind, rate, seed, args)
                rows.append(row)
                pretrained = f"{row['pretrained']:.3f}" if "pretrained" in row else "-"
                print(f"{kind:<6} {rate:>6g} {seed:>4} {pretrained:>10} {row['distance']:>8.3f} "
                      f"{row['estimate']:>9.2f} {row['conservative']:>12.2f} {row['seconds']:>5.0f}",
                      flush=True)  # fmt: skip
    print("medians over seeds:")
    for kind in args.models:
        for rate in args.rates:
            chosen = [r for r in rows if r["model"] == kind and r["rate"] == rate]
            keys = ("distance", "estimate", "conservative")
            medians = {key: statistics.median(r[key] for r in chosen) for key in keys}
            print(f"{kind:<6} {rate:>6g}  distance {medians['distance']:.3f}  estimate "
                  f"{medians['estimate']:.2f}  reverse AIS {medians['conservative']:.2f}")  # fmt: skip
    print(f"took {time.perf_counter() - started:.0f} s")


if __name__ == "__main__":
    main()
