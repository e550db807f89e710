"""Grey-level scans with their marking type as a label layer: a Gaussian-visible model that both
describes the scans and names their type.

The data are synthetic (``ebm_layers.datasets.grey_parts_markings``): the parts line's eight marking
types scanned in grey levels, with soft stroke edges, a per-scan ink contrast and Gaussian sensor
noise. Pixels are standardised with the training scans' statistics (the scale a ``GaussianLayer``
with its default standard deviation of 1 expects). The script

1. builds ``GaussianLayer(144) - BinaryLayer(hidden) - CategoricalLayer(1, 8)`` with the scan layer
   and the label layer both observed, and trains it on ``(scans, labels)`` with ``fit`` and the
   hybrid objective (the generative two-phase statistics plus ``--weight`` times the label's exact
   conditional log-likelihood);
2. measures the joint log-likelihood ``log p(scan, label)`` of test scans: forward AIS for log Z
   with its bracket, the exact free energy (the hidden layer sums out), and reverse annealing as a
   conservative counterpart (a density of standardised grey levels, in nats per scan: it is not
   comparable with the binary demo's probabilities);
3. names the type of test scans by comparing free energies (``predict``) against plain logistic
   regression on the same standardised pixels;
4. generates scans of each type with the label clamped (``sample_given``) and saves them, with the
   filters, as ``samples_by_type.png`` and ``filters.png``, and the numbers as ``report.json``, in ``--out``.

About a minute on 2 cores with the defaults:

    python examples/grey_markings.py [--epochs 20] [--seed 0] [--out out/grey] [--no-progress]
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

import torch
from parts_markings import softmax_regression_accuracy  # the same plain classifier as the binary demo

import ebm_layers as el
from ebm_layers.datasets import IMAGE_SHAPE, MARKING_TYPES, grey_parts_markings


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--epochs", type=int, default=20, help="training passes (default 20)")
    parser.add_argument("--hidden", type=int, default=200, help="hidden units (default 200)")
    parser.add_argument("--weight", type=float, default=10.0, help="weight of the label's conditional term")
    parser.add_argument("--learning-rate", type=float, default=0.001, help="Adam's starting rate")
    parser.add_argument("--seed", type=int, default=0, help="seed of the data, the model and every draw")
    parser.add_argument("--out", type=Path, default=Path("out/grey"), help="folder for pictures and report")
    parser.add_argument("--no-progress", action="store_true", help="no progress bars")
    parser.add_argument("--examples", type=int, default=3000, help="training scans (default 3000)")
    parser.add_argument("--test-examples", type=int, default=1000, help="held-out scans (default 1000)")
    parser.add_argument("--betas", type=int, default=3000, help="AIS intermediate distributions")
    parser.add_argument("--sweeps", type=int, default=500, help="Gibbs sweeps for the samples of each type")
    args = parser.parse_args()
    progress, started = not args.no_progress, time.perf_counter()
    args.out.mkdir(parents=True, exist_ok=True)

    g = torch.Generator().manual_seed(args.seed)
    scans, labels = grey_parts_markings(args.examples + args.test_examples, generator=g)
    centre, scale = scans[: args.examples].mean(0), scans[: args.examples].std(0)
    scans = (scans - centre) / scale
    train, test = (
        (scans[: args.examples], labels[: args.examples]),
        (scans[args.examples :], labels[args.examples :]),
    )

    # 1. The model and its training: both observed layers clamped in the data phase.
    types = len(MARKING_TYPES)
    model = el.EnergyModel(
        [el.GaussianLayer(144), el.BinaryLayer(args.hidden), el.CategoricalLayer(1, types)],
        [el.DenseCoupling(0, 1, 144, args.hidden), el.DenseCoupling(1, 2, args.hidden, types)],
        observed=(0, 2),
    )
    model.reset_parameters(g)
    objective = el.TwoPhaseObjective(
        model,
        el.MeanField(model),
        el.PersistentSampler(model, num_particles=100, generator=g),
        discriminative_layer=2,
        discriminative_weight=args.weight,
    )
    optimizer, decay = el.default_optimizer(model, args.epochs, args.learning_rate)
    el.fit(
        model,
        train,
        epochs=args.epochs,
        objective=objective,
        optimizer=optimizer,
        scheduler=decay,
        progress=progress,
        generator=g,
    )

    # 2. The joint log-likelihood, both annealing directions.
    report = el.evaluate(model, train, test=test, num_betas=args.betas, generator=g, progress=progress)

    # 3. Naming the type: free energies of the eight labels against plain logistic regression.
    with torch.no_grad():
        predicted = el.predict(model, test[0], 2).argmax(1)
    model_accuracy = float((predicted == test[1]).float().mean())
    pixel_accuracy = softmax_regression_accuracy(train[0], train[1], test[0], test[1])

    # 4. Scans of each type with the label clamped: the scan layer's conditional mean after the sweeps.
    per_type = 8
    clamped = torch.arange(types).repeat_interleave(per_type)
    states = el.sample_given(model, {2: clamped}, sweeps=args.sweeps, generator=g, progress=progress)
    with torch.no_grad():
        generated = model.conditional_mean(states, 0) * scale + centre
    pictures = [
        el.save_image_grid(
            args.out / "samples_by_type.png", generated.clamp(0, 1), IMAGE_SHAPE, columns=per_type
        ),
        el.save_image_grid(
            args.out / "filters.png",
            model.couplings[0].weight.detach().T[:100],
            IMAGE_SHAPE,
            normalize="each",
        ),
    ]
    summary = {
        "data": f"{args.examples} training and {args.test_examples} test grey scans, seed {args.seed}",
        "model": f"Gaussian 144 - binary {args.hidden} - categorical 1x{types}, observed layers 0 and 2",
        "training": f"{args.epochs} epochs, Adam {args.learning_rate:g}, hybrid weight {args.weight:g}",
        "log_z": report.log_z,
        "log_z_source": report.log_z_source,
        "log_z_bracket": None if report.estimate is None else [report.estimate.lower, report.estimate.upper],
        "test_joint_log_likelihood": report.test.log_likelihood,
        "test_joint_log_likelihood_label": report.test.log_likelihood_label,
        "test_joint_log_likelihood_reverse": report.test.conservative_log_likelihood,
        "train_joint_log_likelihood": report.train.log_likelihood,
        "accuracy_free_energy": model_accuracy,
        "accuracy_logistic_regression": pixel_accuracy,
        "warnings": list(report.warnings),
        "seconds": time.perf_counter() - started,
    }
    (args.out / "report.json").write_text(json.dumps(summary, indent=2))
    print_table(summary)
    print(f"\nsaved {', '.join(str(p) for p in [*pictures, args.out / 'report.json'])}")


def print_table(summary: dict) -> None:
    bracket = summary["log_z_bracket"]
    note = summary["log_z_source"] + (
        "" if bracket is None else f", bracket [{bracket[0]:.2f}, {bracket[1]:.2f}]"
    )
    rows = [
        ("log Z", f"{summary['log_z']:.2f}", note),
        (
            "test log p(scan, type)",
            f"{summary['test_joint_log_likelihood']:.2f}",
            f"{summary['test_joint_log_likelihood_label']}",
        ),
        (
            "test log p(scan, type), reverse AIS",
            f"{summary['test_joint_log_likelihood_reverse']:.2f}",
            "usually low, not a bound",
        ),
        ("train log p(scan, type)", f"{summary['train_joint_log_likelihood']:.2f}", "as the test value"),
        ("accuracy, free energy", f"{100 * summary['accuracy_free_energy']:.1f}%", "predict: softmax of -F"),
        (
            "accuracy, logistic regression",
            f"{100 * summary['accuracy_logistic_regression']:.1f}%",
            "softmax regression on the pixels",
        ),
    ]
    width = max(len(r[0]) for r in rows)
    print(f"\ngrey markings: {summary['data']}\n{summary['model']}; {summary['training']}")
    print("(log-likelihoods in nats per scan: densities of standardised grey levels)")
    for name, value, note in rows:
        print(f"  {name:<{width}}  {value:>9}  {note}")
    for warning in summary["warnings"]:
        print(f"WARNING: {warning}")
    print(f"\ntook {summary['seconds']:.0f} s")


if __name__ == "__main__":
    main()
