"""Train on several processes with torch.distributed: launch one process per rank with torchrun.

    torchrun --nproc-per-node 2 examples/distributed.py [--epochs 10] [--seed 0] [--out out] [--resume]

Every rank runs this same script. ``fit(..., distributed=True)`` wraps the objective in
``DistributedDataParallel`` (gloo on CPU). What each rank holds:

- the same model parameters and optimizer state: rank 0's parameters are broadcast once, then
  every step applies the gradient averaged over the ranks;
- its own share of every batch (a ``DistributedSampler``; ``--batch-size`` is per rank);
- its own 100 persistent particles and their generator, seeded from ``--seed`` and the rank, never
  broadcast: with two ranks the model statistics come from 200 particles.

Rank 0 writes the checkpoint (atomically) with every rank's particles and generator state, so
``--resume`` continues each rank exactly where it stopped, given the same number of ranks. The data
are the synthetic marking scans of ``ebm_layers.datasets``.
"""

from __future__ import annotations

import argparse
import os
from pathlib import Path

import torch
import torch.distributed as dist

import ebm_layers as el
from ebm_layers.datasets import parts_markings


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--epochs", type=int, default=10)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--batch-size", type=int, default=20, help="examples per rank and step")
    parser.add_argument("--out", type=Path, default=Path("out"))
    parser.add_argument("--resume", action="store_true", help="continue from the checkpoint in --out")
    parser.add_argument("--no-progress", action="store_true")
    parser.add_argument(
        "--init-method",
        default="env://",
        help="rendezvous (default env://, set up by torchrun; or file://PATH)",
    )
    args = parser.parse_args(argv)
    if "RANK" not in os.environ:
        raise SystemExit("launch with torchrun, e.g.: torchrun --nproc-per-node 2 examples/distributed.py")
    torch.set_num_threads(int(os.environ.get("OMP_NUM_THREADS", "1")))
    # torchrun provides the rank, the world size and (for env://) where the ranks meet.
    rank, world = int(os.environ["RANK"]), int(os.environ["WORLD_SIZE"])
    dist.init_process_group("gloo", init_method=args.init_method, rank=rank, world_size=world)

    data, _ = parts_markings(3000, generator=torch.Generator().manual_seed(args.seed))  # same on every rank
    model = el.rbm(144, 100, generator=torch.Generator().manual_seed(args.seed))
    checkpoint = args.out / "distributed.pt"
    result = el.fit(
        model,
        data,
        epochs=args.epochs,
        batch_size=args.batch_size,
        checkpoint=checkpoint,
        resume=checkpoint if args.resume else None,
        progress=not args.no_progress,
        generator=torch.Generator().manual_seed(args.seed),
        distributed=True,
    )
    particles = result.objective.negative.particles[0]
    weight = model.couplings[0].weight.detach()
    # What differs between ranks and what does not, gathered to rank 0 for printing.
    facts = [None] * world
    fact = (rank, float(weight.sum()), float(particles.mean()), result.history[-1]["statistics_gap"])
    dist.all_gather_object(facts, fact)
    if rank == 0:
        print(f"{world} ranks, {args.epochs} epochs, batch {args.batch_size} per rank")
        print(f"{'rank':>4}  {'sum of weights':>14}  {'mean of particles':>17}  {'statistics gap':>14}")
        for r, weights, mean, gap in facts:
            print(f"{r:>4}  {weights:>14.6f}  {mean:>17.4f}  {gap:>14.4f}")
        print(f"checkpoint with every rank's particles: {checkpoint}")
    dist.barrier()  # no rank tears the group down while another still uses it
    dist.destroy_process_group()


if __name__ == "__main__":
    main()
