"""A convolutional RBM of whole inspection sheets against dense RBMs, each trained for the same
wall-clock time.

The data are synthetic (``ebm_layers.datasets.marking_sheets``): binarised 48x48 sheets, each
carrying three stamped markings (the parts line's eight 12x12 marking types) at random places, with
1% of the pixels flipped. A marking means the same wherever it sits, which is what shared filters
assume. The script

1. builds a convolutional RBM: the 2,304 pixels joined by ``--filters`` filters of ``--kernel`` x
   ``--kernel`` pixels, moved in steps of ``--stride`` (``Conv2dCoupling``), to as many feature maps,
   each map's bias shared by its units (``share_bias_by_channel``); and a dense RBM (``rbm``) whose
   number of parameters, every bias included, is the nearest to the convolutional one's. The
   visible biases alone are 2,304 parameters and every dense hidden unit costs 2,305 more, so that
   leaves the dense model one or two hidden units: that is the point of the comparison. A third
   model, a dense RBM with ``--wide-hidden`` hidden units (far more parameters; about as many
   training steps in the budget as the convolutional model on 1-2 threads), shows what a usual
   dense model does in the same time;
2. trains each for ``--seconds`` of wall-clock time, measured here, in the same loop (mean field
   for the data, persistent chains for the model, Adam with its rate decayed linearly to zero over
   the budget);
3. measures the test log-likelihood in nats per sheet: the exact free energy minus log Z, with log
   Z from forward AIS and its bracket (exact, by enumeration, for the one-unit dense model), and
   reverse annealing on a subset of the test sheets as the counterpart from the other direction;
4. asks which marking types each test sheet carries (eight yes/no questions, one logistic
   regression each) from each model's features (the convolutional model's hidden probabilities
   max- and mean-pooled over each feature map: two numbers per filter, the same wherever the
   marking lies; the dense models' hidden probabilities) against the raw pixels;
5. prints one table and saves the filters, each model's samples after ``--sweeps`` Gibbs sweeps,
   some training sheets (PNG) and ``report.json`` in ``--out``.

The budgets are wall-clock time, so the number of training steps (printed), and with it every
result, changes from run to run and from machine to machine (two default runs on one machine:
-247.5 and -238.6 nats per sheet for the convolutional model). About 9 minutes on 2 cores with the
defaults; ``--quick`` runs everything at a toy size in seconds (not results):

    python examples/marking_sheets.py [--seconds 90] [--seed 0] [--out out/marking_sheets] [--no-progress]
"""

from __future__ import annotations

import argparse
import json
import math
import time
from dataclasses import dataclass
from pathlib import Path

import torch
from torch import Tensor
from tqdm.auto import tqdm

import ebm_layers as el
from ebm_layers.datasets import MARKING_TYPES, marking_sheets

SIDE = 48
PIXELS = SIDE * SIDE
# Settings of --quick: a toy size that runs the whole script in seconds (a smoke test, not results).
QUICK = {
    "examples": 200,
    "test_examples": 100,
    "seconds": 0.5,
    "filters": 8,
    "wide_hidden": 20,
    "chains": 8,
    "betas": 50,
    "reverse_examples": 10,
    "sweeps": 10,
}
# Enumerate log Z exactly up to this many hidden units (2^16 states of the hidden layer: a second).
EXACT_HIDDEN = 16


@dataclass
class Trained:
    """A model after its time budget, and what the budget bought."""

    name: str
    model: el.EnergyModel
    maps: int | None  # feature maps of a convolutional model (pooled features), None for a dense one
    steps: int
    epochs: float
    seconds: float


@dataclass
class Likelihood:
    """Test log-likelihoods of one model, in nats per sheet, and where its log Z came from."""

    log_z: float
    bracket: tuple[float, float] | None  # None: log Z exact
    effective_sample_size: float | None
    test: float  # -F(v) - log Z, mean over the test sheets
    label: str  # what kind of number ``test`` is (el.log_likelihood's label)
    reverse: float | None  # reverse AIS, mean over the subset
    forward_on_subset: float | None  # ``test`` on the same subset
    warning: str | None


def convolutional_rbm(filters: int, kernel: int, stride: int, generator: torch.Generator) -> el.EnergyModel:
    """The sheets joined to ``filters`` feature maps by ``kernel``-square filters, one shared bias per
    map: the weight and bias sharing of "Convolutional Deep Belief Networks for Scalable
    Unsupervised Learning of Hierarchical Representations" (ICML 2009)."""
    coupling = el.Conv2dCoupling(0, 1, (1, SIDE, SIDE), filters, kernel, stride)
    maps = el.BinaryLayer(filters * coupling.out_shape[1] * coupling.out_shape[2])
    model = el.EnergyModel([el.BinaryLayer(PIXELS), el.share_bias_by_channel(maps, filters)], [coupling])
    model.reset_parameters(generator)
    return model


def parameter_count(model: el.EnergyModel) -> int:
    """Every learned number, weights and biases (a shared bias counts once)."""
    return sum(p.numel() for p in model.parameters())


def train_for(
    name: str,
    model: el.EnergyModel,
    train: Tensor,
    learning_rate: float,
    args: argparse.Namespace,
    generator: torch.Generator,
) -> tuple[int, float, float]:
    """Train ``model`` on ``train`` until ``args.seconds`` of wall-clock time have passed; returns
    the steps taken, the passes over the data and the seconds.

    ``fit``'s learning rule (mean field for the data phase, exact for an RBM; persistent chains for
    the model phase; visible biases started at the data's base rates) in a loop of our own, because
    the budget is time, not epochs: Adam's rate decays linearly to zero over the budget, as ``fit``'s
    default schedule does over its epochs (measured best on the 8x8 digits,
    ``benchmarks/digits_rbm.py``)."""
    model.init_visible_bias_from(train)
    sampler = el.PersistentSampler(model, num_particles=args.particles, generator=generator)
    objective = el.TwoPhaseObjective(model, el.MeanField(model), sampler)
    optimizer = torch.optim.Adam(model.parameters(), lr=learning_rate)
    steps = seen = 0
    started = time.perf_counter()
    with tqdm(total=round(args.seconds), desc=name, unit="s", disable=args.no_progress) as bar:
        while True:
            for batch in torch.randperm(len(train), generator=generator).split(args.batch_size):
                elapsed = time.perf_counter() - started
                bar.update(min(round(elapsed), bar.total) - bar.n)
                if elapsed >= args.seconds:
                    return steps, seen / len(train), elapsed
                for group in optimizer.param_groups:
                    group["lr"] = learning_rate * (1.0 - elapsed / args.seconds)
                loss = objective(train[batch])
                optimizer.zero_grad()
                loss.backward()
                optimizer.step()
                steps, seen = steps + 1, seen + len(batch)


def likelihood_of(
    model: el.EnergyModel, train: Tensor, test: Tensor, args: argparse.Namespace, generator: torch.Generator
) -> Likelihood:
    """Forward AIS for log Z (exact by enumeration for a few hidden units), the exact free energy
    (closed form), and reverse annealing on ``args.reverse_examples`` test sheets."""
    progress = not args.no_progress
    if model.sizes[1] <= EXACT_HIDDEN:
        with torch.no_grad():
            log_z, estimate = el.exact_log_partition(model), None
    else:
        log_z = estimate = el.ais_log_partition(
            model,
            num_chains=args.chains,
            num_betas=args.betas,
            data=train,
            generator=generator,
            progress=progress,
        )
    result = el.log_likelihood(model, test, log_z)
    reverse = forward_on_subset = None
    if estimate is not None and args.reverse_examples > 0:
        subset = torch.randperm(len(test), generator=generator)[: args.reverse_examples]
        low = el.reverse_ais_log_likelihood(
            model, test[subset], num_betas=args.betas, data=train, generator=generator, progress=progress
        )
        reverse, forward_on_subset = float(low.mean()), float(result.values[subset].mean())
    return Likelihood(
        log_z=result.log_z,
        bracket=None if estimate is None else (estimate.lower, estimate.upper),
        effective_sample_size=None if estimate is None else estimate.effective_sample_size,
        test=result.mean,
        label=result.label,
        reverse=reverse,
        forward_on_subset=forward_on_subset,
        warning=None if estimate is None else estimate.warning,
    )


@torch.no_grad()
def hidden_features(model: el.EnergyModel, sheets: Tensor, maps: int | None, chunk: int = 250) -> Tensor:
    """Hidden probabilities ``p(h = 1 | sheet)`` (``FeatureExtractor``: mean field, exact for an RBM);
    with ``maps`` feature maps, each map's largest and mean probability instead, ``(N, 2 maps)``,
    the same wherever on the sheet a marking lies (max-pooling as in the ICML 2009 paper above,
    there of states in blocks, from memory; the mean is our addition)."""
    extractor = el.FeatureExtractor(model)
    out = []
    for part in sheets.split(chunk):
        probabilities = extractor(part)
        if maps is not None:
            per_map = probabilities.view(len(part), maps, -1)
            probabilities = torch.cat([per_map.amax(2), per_map.mean(2)], 1)
        out.append(probabilities)
    return torch.cat(out)


def presence(types: Tensor) -> Tensor:
    """``(N, 8)`` float 0/1: which marking types each sheet carries."""
    return torch.zeros(len(types), len(MARKING_TYPES)).scatter_(1, types, 1.0)


def presence_accuracy(train: Tensor, train_present: Tensor, test: Tensor, test_present: Tensor) -> float:
    """Share of the test sheets' yes/no answers to "does it carry this type?" that are right, over
    the eight types: one logistic regression per type (L2 1e-3, full-batch L-BFGS: common practice,
    no source) on standardised inputs, the same plain classifier for the pixels and for every
    model's features (as in ``parts_markings.py``)."""
    mean, scale = train.mean(0), train.std(0).clamp_min(1e-6)
    train, test = (train - mean) / scale, (test - mean) / scale
    weight = torch.zeros(train.shape[1], train_present.shape[1], requires_grad=True)
    bias = torch.zeros(train_present.shape[1], requires_grad=True)
    optimizer = torch.optim.LBFGS([weight, bias], max_iter=200, line_search_fn="strong_wolfe")

    def closure() -> Tensor:
        optimizer.zero_grad()
        # The sum over types of each type's own loss: eight independent regressions fitted at once.
        loss = torch.nn.functional.binary_cross_entropy_with_logits(
            train @ weight + bias, train_present, reduction="sum"
        )
        loss = loss / len(train) + 1e-3 * weight.square().sum()
        loss.backward()
        return loss

    optimizer.step(closure)
    with torch.no_grad():
        return float(((test @ weight + bias > 0) == test_present.bool()).float().mean())


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--seconds", type=float, default=90.0, help="training time per model (default 90)")
    parser.add_argument("--filters", type=int, default=32, help="convolutional filters (default 32)")
    parser.add_argument("--kernel", type=int, default=8, help="side of a filter in pixels (default 8)")
    # Stride 2 rather than 1, measured while writing this example (test log-likelihood after 60 s
    # budgets, one thread, Adam 0.01, seeds 0 and 1): with stride 1 (four times the hidden units,
    # under half the steps) -299 and -918 nats, the persistent chains of seed 1 having fallen onto
    # blank sheets; with stride 2, -252 and -272 (16 filters 12x12), -254 and -247 (32 filters 8x8).
    parser.add_argument("--stride", type=int, default=2, help="step between filter positions (default 2)")
    parser.add_argument(
        "--wide-hidden", type=int, default=700, help="hidden units of the third model (0: none; default 700)"
    )
    # Measured while writing this example (60 s budgets, one thread, seed 0): the convolutional
    # model reached -252 / -262 / -270 nats at Adam 0.01 / 0.005 / 0.003 (16 filters 12x12, stride
    # 2; at 0.03, tried with stride 1 only, the two annealing directions disagreed by 143 nats);
    # the 700-unit dense model -326 at 0.01, -298 at 0.003.
    parser.add_argument(
        "--learning-rate", type=float, default=0.01, help="convolutional model's Adam rate (0.01)"
    )
    parser.add_argument(
        "--dense-learning-rate", type=float, default=0.003, help="dense models' Adam rate (0.003)"
    )
    parser.add_argument("--batch-size", type=int, default=20, help="sheets per step (default 20)")
    parser.add_argument("--particles", type=int, default=20, help="persistent chains (default 20)")
    parser.add_argument("--examples", type=int, default=3000, help="training sheets (default 3000)")
    parser.add_argument("--test-examples", type=int, default=1000, help="held-out sheets (default 1000)")
    parser.add_argument("--chains", type=int, default=50, help="AIS chains (default 50)")
    parser.add_argument(
        "--betas", type=int, default=3000, help="AIS intermediate distributions (default 3000)"
    )
    parser.add_argument(
        "--reverse-examples", type=int, default=50, help="test sheets for reverse AIS (default 50)"
    )
    parser.add_argument("--sweeps", type=int, default=1000, help="Gibbs sweeps before the samples")
    parser.add_argument("--seed", type=int, default=0, help="seed of the data, the models and every draw")
    parser.add_argument(
        "--out", type=Path, default=Path("out/marking_sheets"), help="folder for pictures and report"
    )
    parser.add_argument("--no-progress", action="store_true", help="no progress bars")
    parser.add_argument("--quick", action="store_true", help=f"a toy size for a smoke run: {QUICK}")
    args = parser.parse_args()
    if args.quick:
        for key, value in QUICK.items():
            setattr(args, key, value)
    started = time.perf_counter()
    args.out.mkdir(parents=True, exist_ok=True)

    g = torch.Generator().manual_seed(args.seed)
    sheets, types, _ = marking_sheets(args.examples + args.test_examples, generator=g)
    train, test = sheets[: args.examples], sheets[args.examples :]
    present = presence(types)
    train_present, test_present = present[: args.examples], present[args.examples :]

    # 1. The models; the first dense one sized to the nearest parameter count.
    convolutional = convolutional_rbm(args.filters, args.kernel, args.stride, g)
    matched = max(1, round((parameter_count(convolutional) - PIXELS) / (PIXELS + 1)))
    models = [
        ("convolutional", convolutional, args.filters, args.learning_rate),
        (f"dense, {matched} hidden", el.rbm(PIXELS, matched, generator=g), None, args.dense_learning_rate),
    ]
    if args.wide_hidden:
        wide = el.rbm(PIXELS, args.wide_hidden, generator=g)
        models.append((f"dense, {args.wide_hidden} hidden", wide, None, args.dense_learning_rate))

    # 2. The same wall-clock time for each, one after the other in this process.
    trained = [
        Trained(name, model, maps, *train_for(name, model, train, rate, args, g))
        for name, model, maps, rate in models
    ]

    # 3. Likelihoods; 4. features.
    likelihoods = [likelihood_of(t.model, train, test, args, g) for t in trained]
    accuracies = [
        presence_accuracy(
            hidden_features(t.model, train, t.maps),
            train_present,
            hidden_features(t.model, test, t.maps),
            test_present,
        )
        for t in trained
    ]
    pixel_accuracy = presence_accuracy(train, train_present, test, test_present)
    # Answering every question with the training sheets' commoner answer (common practice, no source).
    commoner = float(((train_present.mean(0) > 0.5) == test_present.bool()).float().mean())

    # 5. Pictures: training sheets, the filters, and each model's samples after a long run of Gibbs
    # sweeps from random states (the pixels' probabilities given the last hidden states).
    pictures = [
        el.save_image_grid(args.out / "training_sheets.png", train[:16], (SIDE, SIDE), columns=8, scale=2),
        el.save_image_grid(
            args.out / "filters.png",
            convolutional.couplings[0].weight.detach().flatten(1),
            (args.kernel, args.kernel),
            columns=16,
            normalize="each",
            scale=6,
        ),
    ]
    for t, slug in zip(trained, ("convolutional", "dense", "wide")):
        sampler = el.PersistentSampler(t.model, num_particles=16, generator=g)
        for _ in tqdm(range(args.sweeps), desc=f"sampling {t.name}", disable=args.no_progress):
            sampler()
        with torch.no_grad():
            pixels = t.model.conditional_mean(sampler.particles, 0)
        path = args.out / f"samples_{slug}.png"
        pictures.append(el.save_image_grid(path, pixels, (SIDE, SIDE), columns=8, scale=2))

    summary = {
        "data": (
            f"{args.examples} training and {args.test_examples} test sheets {SIDE}x{SIDE} "
            f"(synthetic, 3 markings each), seed {args.seed}"
        ),
        "convolution": f"{args.filters} filters {args.kernel}x{args.kernel}, stride {args.stride}",
        "training": {
            "seconds_per_model": args.seconds,
            "learning_rate_convolutional": args.learning_rate,
            "learning_rate_dense": args.dense_learning_rate,
            "batch_size": args.batch_size,
            "particles": args.particles,
            "threads": torch.get_num_threads(),
        },
        "ais": {"chains": args.chains, "betas": args.betas, "reverse_examples": args.reverse_examples},
        "models": [
            {
                "name": t.name,
                "parameters": parameter_count(t.model),
                "hidden_units": t.model.sizes[1],
                "steps": t.steps,
                "epochs": t.epochs,
                "seconds": t.seconds,
                "log_z": lik.log_z,
                "log_z_bracket": lik.bracket,
                "log_z_effective_sample_size": lik.effective_sample_size,
                "test_log_likelihood": lik.test,
                "test_log_likelihood_label": lik.label,
                "test_log_likelihood_reverse": lik.reverse,
                "test_log_likelihood_on_reverse_subset": lik.forward_on_subset,
                "presence_accuracy": accuracy,
                "warning": lik.warning,
            }
            for t, lik, accuracy in zip(trained, likelihoods, accuracies)
        ],
        "presence_accuracy_raw_pixels": pixel_accuracy,
        "presence_accuracy_commoner_answer": commoner,
        "seconds": time.perf_counter() - started,
    }
    (args.out / "report.json").write_text(json.dumps(summary, indent=2))
    print_table(summary)
    print(f"\nsaved {', '.join(str(p) for p in [*pictures, args.out / 'report.json'])}")


def print_table(summary: dict) -> None:
    models, training, ais = summary["models"], summary["training"], summary["ais"]

    def row(title: str, values: list[str]) -> None:
        print(f"  {title:<34}" + "".join(f"{value:>20}" for value in values))

    def number(value: float | None, digits: int = 1) -> str:
        return "-" if value is None else f"{value:.{digits}f}"

    def bracket(model: dict) -> str:
        if model["log_z_bracket"] is None:
            return "exact"
        low, high = model["log_z_bracket"]
        return f"[{'-inf' if math.isinf(low) else f'{low:.1f}'}, {high:.1f}]"

    threads = f"{training['threads']} thread{'s' if training['threads'] > 1 else ''}"
    print(f"\nmarking sheets: {summary['data']}")
    print(
        f"each model trained for {training['seconds_per_model']:g} s on {threads}: batches of "
        f"{training['batch_size']}, {training['particles']} persistent chains,\nAdam "
        f"{training['learning_rate_convolutional']:g} (convolutional) / {training['learning_rate_dense']:g} "
        "(dense) decayed linearly to 0 over the budget"
    )
    print(f"convolutional model: {summary['convolution']}; nats per sheet\n")
    row("", [m["name"] for m in models])
    row("parameters", [f"{m['parameters']:,}" for m in models])
    row("hidden units", [f"{m['hidden_units']:,}" for m in models])
    row("training steps (passes over data)", [f"{m['steps']:,} ({m['epochs']:.0f})" for m in models])
    row("log Z", [number(m["log_z"]) for m in models])
    row("  bracket", [bracket(m) for m in models])
    row("  effective sample size", [number(m["log_z_effective_sample_size"]) for m in models])
    row("test log-likelihood", [number(m["test_log_likelihood"]) for m in models])
    row(
        f"  on {ais['reverse_examples']} test sheets",
        [number(m["test_log_likelihood_on_reverse_subset"]) for m in models],
    )
    row("  reverse AIS on the same sheets", [number(m["test_log_likelihood_reverse"]) for m in models])
    row("type presence accuracy, features", [f"{100 * m['presence_accuracy']:.1f}%" for m in models])
    row("  raw pixels", [f"{100 * summary['presence_accuracy_raw_pixels']:.1f}%"])
    row("  always the commoner answer", [f"{100 * summary['presence_accuracy_commoner_answer']:.1f}%"])
    convolutional, matched = models[0], models[1]
    units = f"{matched['hidden_units']} hidden unit{'s' if matched['hidden_units'] > 1 else ''}"
    print(
        "\n- parameters: every weight and bias (a shared bias counts once). The dense model closest in\n"
        f"  parameters to the convolutional one has {units}: its {PIXELS:,} visible biases alone are\n"
        f"  {100 * PIXELS / convolutional['parameters']:.0f}% of the convolutional model's parameters, "
        f"and each hidden unit costs {PIXELS + 1:,} more."
    )
    # The directions of the errors: forward AIS is unbiased in Z, so low on average in log Z, and the
    # log-likelihood built on it high on average; reverse AIS is low on average (Jensen's inequality;
    # el.ais_log_partition, el.log_likelihood's labels, el.reverse_ais_log_likelihood). The bracket
    # is the library's three standard errors (common practice, no source).
    print(
        f"- log Z: forward AIS ({ais['chains']} chains, {ais['betas']:,} intermediate distributions), on "
        "average below\n  the true value; its bracket is three standard errors of the importance weights, "
        "and '-inf'\n  as the lower end means they spread too widely for a bracket at all. 'exact': "
        "enumerated over\n  the hidden states."
    )
    print(
        "- test log-likelihood: mean over the test sheets of -F(v) - log Z (the free energy F exact).\n"
        "  With an AIS log Z it is high on average; with the exact log Z it is exact. The next two rows\n"
        f"  give it on {ais['reverse_examples']} test sheets and, on the same sheets, reverse annealing, "
        "which is low\n  on average. Neither is a bound; where they agree, the agreement is the evidence "
        "that the\n  test log-likelihood lies near them."
    )
    for m in models:
        forward, reverse = m["test_log_likelihood_on_reverse_subset"], m["test_log_likelihood_reverse"]
        if forward is not None:
            # Within a nat: the threshold parts_markings.py uses (our choice, no source).
            verdict = (
                "too far apart to trust either (raise --betas)"
                if abs(forward - reverse) >= 1.0
                else "they agree, though forward AIS gave no bracket (see the warning)"
                if m["warning"]
                else "they agree"
            )
            print(f"  {m['name']}: the two directions differ by {forward - reverse:.1f} nats: {verdict}.")
    print(
        '- type presence accuracy: for each test sheet and each of the eight marking types, "does the\n'
        '  sheet carry one?"; the share of right answers, one logistic regression per type trained on\n'
        "  the training sheets. Features: the convolutional model's largest and mean hidden probability\n"
        "  in each feature map (two numbers per filter), the dense models' hidden probabilities; beside\n"
        "  the raw pixels, and answering every question with the training sheets' commoner answer."
    )
    for m in models:
        if m["warning"]:
            print(f"WARNING ({m['name']}): {m['warning']}")
    print(f"\ntook {summary['seconds']:.0f} s")


if __name__ == "__main__":
    main()
