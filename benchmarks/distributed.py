"""Data-parallel scaling: training throughput of one process against two (gloo), one thread each.

A 784-500 RBM trained by ``fit`` (mean field + 100 persistent particles per rank, one sweep per
step, Adam) on random binary examples, batch 100 per rank. One process trains plainly; two
processes train with ``fit(..., distributed=True)``, each on its half of every epoch, and all-reduce
the gradient at every step. Each side is warmed up by one untimed epoch; throughput is examples
(over all ranks) per second of wall time. Scaling efficiency = two-process throughput / (2 x
one-process throughput): 1.0 would mean the all-reduce and the second process cost nothing.

    python benchmarks/distributed.py [--examples 20000] [--epochs 1] [--sizes 784 500]
"""

from __future__ import annotations

import argparse
import datetime
import tempfile
import time
from pathlib import Path

import torch
import torch.distributed as dist
import torch.multiprocessing as mp

import ebm_layers as el


def train(sizes: list[int], examples: int, epochs: int, distributed: bool) -> float:
    """Seconds for ``epochs`` timed epochs of ``fit`` after one untimed epoch."""
    data = torch.bernoulli(torch.full((examples, sizes[0]), 0.2), generator=torch.Generator().manual_seed(0))
    model = el.rbm(*sizes, generator=torch.Generator().manual_seed(1))
    options = dict(batch_size=100, progress=False, distributed=distributed)
    el.fit(model, data, epochs=1, generator=torch.Generator().manual_seed(2), **options)  # warm-up
    if distributed:
        dist.barrier()
    started = time.perf_counter()
    el.fit(model, data, epochs=epochs, generator=torch.Generator().manual_seed(3), **options)
    if distributed:
        dist.barrier()
    return time.perf_counter() - started


def rank_worker(rank: int, folder: str, sizes: list[int], examples: int, epochs: int) -> None:
    torch.set_num_threads(1)
    dist.init_process_group(
        "gloo", init_method=f"file://{folder}/rendezvous", rank=rank, world_size=2,
        timeout=datetime.timedelta(seconds=300),
    )  # fmt: skip
    seconds = train(sizes, examples, epochs, distributed=True)
    if rank == 0:
        (Path(folder) / "seconds").write_text(str(seconds))
    dist.barrier()
    dist.destroy_process_group()


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--examples", type=int, default=20_000)
    parser.add_argument("--epochs", type=int, default=1)
    parser.add_argument("--sizes", type=int, nargs=2, default=[784, 500])
    args = parser.parse_args()

    torch.set_num_threads(1)
    one = train(args.sizes, args.examples, args.epochs, distributed=False)
    with tempfile.TemporaryDirectory() as folder:
        mp.start_processes(
            rank_worker, args=(folder, args.sizes, args.examples, args.epochs), nprocs=2, start_method="spawn"
        )
        two = float((Path(folder) / "seconds").read_text())
    # With two ranks an epoch covers the data once in total: each rank takes half of it.
    one_rate = args.examples * args.epochs / one
    two_rate = 2 * (args.examples // 2) * args.epochs / two
    sizes = "-".join(map(str, args.sizes))
    print(f"RBM {sizes}, batch 100 per rank, {args.examples} examples x {args.epochs} epochs")
    print(f"torch {torch.__version__}, gloo, 1 thread per process")
    print(f"{'processes':>9}  {'seconds':>8}  {'examples/s':>10}")
    print(f"{1:>9}  {one:>8.2f}  {one_rate:>10.0f}")
    print(f"{2:>9}  {two:>8.2f}  {two_rate:>10.0f}")
    print(
        f"scaling efficiency: {two_rate / (2 * one_rate):.2f}  (two-process rate / twice the one-process one)"
    )


if __name__ == "__main__":
    main()
