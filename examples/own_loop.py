"""Train an RBM in a plain torch loop: the loop fit() runs (shuffling, monitors, atomic checkpoints,
resume), by hand, with choices of your own (plain persistent chains, weight decay, clipping).

The data are invented on/off flags of 16 sensors on a machine that runs in one of four modes;
each mode switches on its own group of sensors, with a few flags flipped at random.

    python examples/own_loop.py [--epochs 30] [--seed 0] [--checkpoint out/own_loop.pt] [--resume]

With ``--resume`` it continues from the checkpoint, exactly as if it had not stopped.
"""

from __future__ import annotations

import argparse
from pathlib import Path

import torch

import ebm_layers as el


def sensor_flags(num_rows: int, generator: torch.Generator) -> torch.Tensor:
    """(num_rows, 16) binary flags: mode m switches on sensors 4m..4m+3; 5% of flags flip."""
    modes = torch.randint(0, 4, (num_rows,), generator=generator)
    clean = torch.zeros(num_rows, 16)
    for m in range(4):
        clean[modes == m, 4 * m : 4 * m + 4] = 1.0
    flips = torch.bernoulli(torch.full((num_rows, 16), 0.05), generator=generator)
    return (clean + flips) % 2


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--epochs", type=int, default=30)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--checkpoint", type=Path, default=Path("out/own_loop.pt"))
    parser.add_argument("--resume", action="store_true", help="continue from --checkpoint")
    args = parser.parse_args()
    g = torch.Generator().manual_seed(args.seed)
    train, held_out = sensor_flags(800, g), sensor_flags(200, g)

    model = el.rbm(16, 8, generator=g)
    model.init_visible_bias_from(train)
    sampler = el.PersistentSampler(model, num_particles=100, sweeps=1, generator=g)
    objective = el.TwoPhaseObjective(model, el.MeanField(model), sampler)
    # Weight decay on the weights only; torch's own weight_decay would decay the biases too.
    optimizer = torch.optim.Adam(el.weight_decay_groups(model, 1e-4), lr=0.01)
    # A decay that does not depend on --epochs, so that a run extended with --resume continues it.
    scheduler = torch.optim.lr_scheduler.ExponentialLR(optimizer, gamma=0.9)

    start = 0
    if args.resume:
        state = torch.load(args.checkpoint, weights_only=True)
        objective.load_state_dict(state["objective"])
        optimizer.load_state_dict(state["optimizer"])
        scheduler.load_state_dict(state["scheduler"])
        g.set_state(state["generator"])
        start = state["epoch"]
    print(f"{'epoch':>5} {'lr':>8} {'stat gap':>9} {'F(data)':>8} {'F(chains)':>9} {'test log p':>10}")
    for epoch in range(start, args.epochs):
        order = torch.randperm(len(train), generator=g)
        for start in range(0, len(train), 10):
            loss = objective(train[order[start : start + 10]])  # a surrogate: its value means nothing
            optimizer.zero_grad()
            loss.backward()  # gradient = -(data statistics - model statistics)
            torch.nn.utils.clip_grad_norm_(model.parameters(), max_norm=1.0)
            optimizer.step()
        last = objective.last  # monitors of the latest batch
        with torch.no_grad():
            test_log_p = el.exact_log_likelihood(model, held_out).mean()
        print(
            f"{epoch + 1:>5} {scheduler.get_last_lr()[0]:>8.5f} {last.statistics_gap:>9.4f} "
            f"{last.data_free_energy:>8.2f} {last.particle_free_energy:>9.2f} {test_log_p:>10.3f}"
        )
        scheduler.step()
        # Atomic (temporary file, then rename), like fit's checkpoints; --resume loads it back.
        el.save_checkpoint(
            {
                "epoch": epoch + 1,
                "objective": objective.state_dict(),  # model, particles, generator state
                "optimizer": optimizer.state_dict(),
                "scheduler": scheduler.state_dict(),
                "generator": g.get_state(),
            },
            args.checkpoint,
        )

    samples = sampler.sample(8, burn_in=200, thin=20, progress=False)[0]
    print("\neight samples from the model (sensors 0-15, one mode per group of four):")
    for row in samples.int().tolist():
        print("  " + " ".join("".join(map(str, row[i : i + 4])) for i in range(0, 16, 4)))
    print(f"checkpoint of the last epoch: {args.checkpoint}")


if __name__ == "__main__":
    main()
