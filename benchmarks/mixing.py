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
"""

from __future__ import annotations

import argparse
import statistics
import time

import torch

import ebm_layers as el
from ebm_layers.datasets import marking_templates, parts_markings


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
    args = parser.parse_args()
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


if __name__ == "__main__":
    main()
