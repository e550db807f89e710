"""Learning-driven mixing: how often persistent particles switch modes while the weights learn,
against the same particles under a frozen copy of the same weights.

On the demo data (synthetic marking scans, ``ebm_layers.datasets``), a 144-200-100 chain is
trained by ``fit`` (pretraining, then joint training), then ``mixing_during_learning`` continues
training with the same objective and optimizer (Adam at the end of fit's schedule is at rate 0, so
the continuation uses a fresh Adam at ``--learning-rate``) and, at several successive snapshots,
compares (a) the particles' mode switches per update while learning with (b) the switches of the
same particles under the snapshot's frozen weights, for as many sweeps. Modes: nearest marking
template.

    python benchmarks/mixing.py [--epochs 10] [--updates 300] [--snapshots 3] [--seed 0]

With ``--compare`` it instead trains the same pretrained chain three ways at equal joint-training
wall time (``--budget`` seconds; the epochs of each are set from a one-epoch calibration):
plain persistent chains, fast weights, and replica exchange (``fit(..., mixing_aid=...)``), then
reports the test log-likelihood (the forward-AIS estimate, and reverse AIS, usually low; neither
is a bound) and the mode coverage of 1000 samples drawn after 2000 plain Gibbs sweeps from random states.

    python benchmarks/mixing.py --compare [--budget 60] [--betas 10000]
"""

from __future__ import annotations

import argparse
import copy
import statistics
import time

import torch

import ebm_layers as el
from ebm_layers.datasets import MARKING_TYPES, marking_templates, parts_markings


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--epochs", type=int, default=10, help="joint training epochs before measuring")
    parser.add_argument("--pretrain-epochs", type=int, default=None)
    parser.add_argument("--examples", type=int, default=3000)
    parser.add_argument("--sizes", type=int, nargs="+", default=[144, 200, 100])
    parser.add_argument("--updates", type=int, default=300, help="updates (and frozen sweeps) per snapshot")
    parser.add_argument("--snapshots", type=int, default=3)
    parser.add_argument("--learning-rate", type=float, default=0.001)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--compare", action="store_true", help="plain vs fast weights vs replica exchange")
    parser.add_argument(
        "--budget", type=float, default=60.0, help="joint training seconds per aid (--compare)"
    )
    parser.add_argument(
        "--betas", type=int, default=10_000, help="AIS intermediate distributions (--compare)"
    )
    parser.add_argument("--burn-in", type=int, default=2000, help="sweeps before the samples (--compare)")
    args = parser.parse_args()
    if args.compare:
        compare(args)
        return
    started = time.perf_counter()
    g = torch.Generator().manual_seed(args.seed)
    data, _ = parts_markings(args.examples, generator=g)
    model = el.dbm(*args.sizes, generator=g) if len(args.sizes) > 2 else el.rbm(*args.sizes, generator=g)
    result = el.fit(
        model, data, epochs=args.epochs, pretrain_epochs=args.pretrain_epochs, progress=False, generator=g
    )
    optimizer = torch.optim.Adam(model.parameters(), lr=args.learning_rate)
    assign = el.nearest_template(marking_templates())
    records = el.mixing_during_learning(
        result.objective, optimizer, data, assign, updates=args.updates, snapshots=args.snapshots, generator=g
    )
    sizes = "-".join(map(str, args.sizes))
    print(f"chain {sizes}, {args.epochs} epochs of fit, then Adam at {args.learning_rate}; 100 particles")
    print(f"torch {torch.__version__}, {torch.get_num_threads()} threads; mode = nearest marking template")
    print("mode switches per particle and update:")
    print(f"{'snapshot':>8}  {'learning':>9}  {'frozen':>9}  {'ratio':>6}")
    for r in records:
        print(f"{r['snapshot']:>8}  {r['learning']:>9.4f}  {r['frozen']:>9.4f}  {r['ratio']:>6.2f}")
    ratios = [r["ratio"] for r in records]
    print(f"median ratio {statistics.median(ratios):.2f}; took {time.perf_counter() - started:.0f} s")


def compare(args) -> None:
    started = time.perf_counter()
    g = torch.Generator().manual_seed(args.seed)
    images, _ = parts_markings(args.examples + 1000, generator=g)
    train, test = images[: args.examples], images[args.examples :]
    base = el.dbm(*args.sizes, generator=g)
    el.pretrain(base, train, epochs=args.pretrain_epochs or el.training.pretraining.DEFAULT_PRETRAIN_EPOCHS,
                progress=False, generator=g)  # fmt: skip
    assign = el.nearest_template(marking_templates())
    rows = []
    for aid in (None, "fast-weights", "replica-exchange"):
        timing = copy.deepcopy(base)
        began = time.perf_counter()
        el.fit(timing, train, epochs=1, pretrain_epochs=0, mixing_aid=aid, progress=False, generator=g)
        epochs = max(1, round(args.budget / (time.perf_counter() - began)))
        model = copy.deepcopy(base)
        began = time.perf_counter()
        el.fit(model, train, epochs=epochs, pretrain_epochs=0, mixing_aid=aid, progress=False,
               generator=torch.Generator().manual_seed(args.seed + 1))  # fmt: skip
        seconds = time.perf_counter() - began
        report = el.evaluate(model, train, test=test, num_betas=args.betas, progress=False,
                             generator=torch.Generator().manual_seed(args.seed + 2))  # fmt: skip
        sampler = el.PersistentSampler(model, num_particles=1000, generator=torch.Generator().manual_seed(3))
        samples = sampler.sample(1000, burn_in=args.burn_in, progress=False)[0]
        coverage = el.mode_occupancy(samples, assign, data=test, names=MARKING_TYPES)
        rows.append((aid or "plain", epochs, seconds, report, coverage))
    sizes = "-".join(map(str, args.sizes))
    print(f"chain {sizes} pretrained once, then joint training for about {args.budget:.0f} s per aid")
    print(
        f"torch {torch.__version__}, {torch.get_num_threads()} threads; test log-likelihood in nats per scan"
    )
    print(f"{'aid':<17} {'epochs':>6} {'s':>5} {'estimate':>9} {'reverse AIS':>12} {'TV modes':>8}  missing")
    for name, epochs, seconds, report, coverage in rows:
        t, missing = report.test, ", ".join(coverage.missing) or "-"
        print(
            f"{name:<17} {epochs:>6} {seconds:>5.0f} {t.importance_log_likelihood:>9.2f} "
            f"{t.conservative_log_likelihood:>12.2f} {coverage.total_variation:>8.3f}  {missing}"
        )
    print(f"took {time.perf_counter() - started:.0f} s")


if __name__ == "__main__":
    main()
